"""``dicert inspect``: counts, correlators, CHSH value and its finite-statistics bound."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, kv_table, progress_bar, stdout_console


def register(app: typer.Typer) -> None:
    app.command("inspect")(inspect_cmd)


# long: one typer option per line and the table rendering; the numbers come from
# dicert.inspection.inspect_summary.
@handle_errors
def inspect_cmd(
    log: Annotated[Optional[str], typer.Argument(help="Trial log: a file, a directory of files, a glob pattern, or a log spec (TOML).")] = None,
    error: Annotated[float, typer.Option("--error", help="Error probability eps of the lower bound on S.")] = 1e-6,
    gamma: Annotated[Optional[float], typer.Option("--gamma", help="Test-round probability of the design (1 = uniform settings every round). Default: the protocol's, else the observed fraction of test rounds of a log with a t column (labelled), else 1.")] = None,
    protocol: Annotated[Optional[Path], typer.Option("--protocol", help="Protocol file: use its declared design and run its design-conformance checks.")] = None,
    block_trials: Annotated[int, typer.Option("--block-trials", help="Trials per block for drift diagnostics.")] = 1 << 20,
    block_error: Annotated[float, typer.Option("--block-error", help="Error per side of each block's interval.")] = 1e-3,
    plot: Annotated[Optional[Path], typer.Option("--plot", help="Write a plot of S per block to this file (PNG/PDF/SVG).")] = None,
    fmt: Annotated[Optional[str], typer.Option("--format", help="Force the input format (csv, binary, npz, parquet, hdf5).")] = None,
    log_spec: Annotated[Optional[Path], typer.Option("--log-spec", help="Log spec (TOML) describing the run: station files, join key, columns, value maps (instead of LOG).")] = None,
    scheduler: Annotated[Optional[str], typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: count and hash the log's files on its workers (needs dicert[cluster]).")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Read a trial log (streaming) and report counts, correlators, the CHSH value, its lower
    confidence bound valid for devices with memory, and the p-value of local realism."""
    from dicert.estimate import block_estimates
    from dicert.errors import ParameterError
    from dicert.logspec import choose_source

    if plot is not None:
        from dicert.plotting import check_plot_path

        check_plot_path(plot)
    log = choose_source(log, log_spec)

    proto = None
    if protocol is not None:
        from dicert.protocol import load_protocol

        proto = load_protocol(protocol)
        if gamma is not None and gamma != proto.gamma:
            raise ParameterError(f"--gamma {gamma:g} disagrees with the protocol's settings.gamma "
                                 f"= {proto.gamma:g}; give one of them")
    from dicert.logs import summarize_log

    if scheduler:
        from dicert.cluster import summarize_log as summarize_on_cluster

        summary = summarize_on_cluster(log, scheduler=scheduler, block_trials=block_trials,
                                       format=fmt)
    else:
        with progress_bar() as bar:
            task = bar.add_task("reading log", total=None)
            summary = summarize_log(
                log, block_trials=block_trials, digest=False, format=fmt,
                progress=lambda done, total: bar.update(task, completed=done, total=total),
            )
    from dicert.inspection import inspect_summary

    look = inspect_summary(summary, protocol=proto, gamma=gamma, eps=error, source=log)
    design, source, report, est = look.design, look.design_source, look.design_report, look.estimate
    settings_ok = all(c.passed for c in report.checks
                      if c.name.startswith(("test_settings", "serial", "generation")))
    blocks = block_estimates(summary.block_counts, summary.block_trials, design, eps=block_error)
    lower_shown, lower_note = _clip(est.chsh_lower)
    declared = proto is not None or gamma is not None
    p_refused = None if settings_ok or not declared else (
        "refused: the settings frequencies or sequence contradict the declared design")
    if plot is not None:
        from dicert.plotting import plot_chsh_blocks

        threshold, threshold_label = _protocol_threshold(proto)
        plot_chsh_blocks(blocks, plot, eps=block_error, overall=est.chsh,
                         overall_lower=lower_shown, threshold=threshold,
                         threshold_label=threshold_label)
    if as_json:
        emit_json(
            {
                "log": log,
                "files": [f.path for f in summary.files],
                "trials": summary.trials,
                "test_trials": est.test_trials,
                "has_test_flag": summary.has_test_flag,
                "counts": {
                    f"t{t}x{x}y{y}a{a}b{b}": int(summary.counts[t, x, y, a, b])
                    for t in (0, 1) for x in (0, 1) for y in (0, 1) for a in (0, 1) for b in (0, 1)
                },
                "counts_layout": "counts[t][x][y][a][b]; logs without a t column count every trial as a test round (t=1)",
                "counts_array": summary.counts,
                "correlators": est.correlators,
                "correlator_stderr": est.correlator_stderr,
                "chsh": est.chsh,
                "chsh_stderr": est.chsh_stderr,
                "chsh_martingale": est.chsh_martingale,
                "chsh_lower": est.chsh_lower,
                "margin": est.margin,
                "error": error,
                "gamma": design.gamma,
                "gamma_source": source,
                "chsh_lower_shown": lower_shown,
                "chsh_lower_note": lower_note,
                "local_win_bound": est.local_win_bound,
                "p_value_refused": p_refused,
                "design_checks": report.to_dict(),
                "bound_method": est.bound_method,
                "win_probability": est.win_probability,
                "wins": est.wins,
                "p_value_local": None if p_refused else est.p_value_local,
                "log10_p_value_local": None if p_refused else est.log10_p_value_local,
                "p_value_method": est.p_value_method,
                "blocks": [
                    {"index": b.index, "first_trial": b.first_trial, "trials": b.trials,
                     "chsh": b.chsh, "chsh_lower": b.chsh_lower, "chsh_upper": b.chsh_upper}
                    for b in blocks
                ],
                "plot": str(plot) if plot else None,
                "log_spec": summary.log_spec,
                "join_charge": None if look.charge is None else {
                    **look.charge.to_dict(),
                    "charged_chsh_estimate": look.charged_estimate.chsh_estimate,
                    "charged_chsh_lower_bound": look.charged_estimate.chsh_lower_bound,
                    "charged_p_value_local": look.charged_estimate.p_value_local},
            }
        )
        return
    con = stdout_console()
    rows = [
        ("trials", f"{summary.trials:,}"),
        ("test rounds", f"{est.test_trials:,}"),
        ("CHSH S (ratio estimator)", f"{est.chsh:.5f} \u00b1 {est.chsh_stderr:.5f} (i.i.d. std. error)"),
        ("CHSH S (martingale estimator)", (lambda v, note: f"{v:.5f}" + (f"  ({note})" if note else ""))(*_clip(est.chsh_martingale))),
        ("gamma (test-round probability)", f"{design.gamma:.6g} ({source})"),
        (f"lower bound on S at eps={error:g}", f"{lower_shown:.5f}  (margin {est.margin:.5f}; valid with memory{'; ' + lower_note if lower_note else ''})"),
        ("CHSH-game win probability", f"{est.win_probability:.6f}"),
        ("p-value of local realism", p_refused if p_refused else (
            (f"{est.p_value_local:.3e}" if est.p_value_local > 0 else f"10^{est.log10_p_value_local:.1f}")
            + f" (local win bound {est.local_win_bound:.4g} at the observed settings frequencies)")),
    ]
    bad = [c for c in report.checks if not c.passed]
    rows.append(("design checks", f"{len(report.checks)} run at significance {report.significance:g}: "
                 + ("all passed" if not bad else "FAILED: " + "; ".join(f"{c.name}: {c.detail}" for c in bad))))
    if summary.log_spec is not None and summary.log_spec.get("join") is not None:
        j = summary.log_spec["join"]
        rows.append(("station join", f"{j['matched']:,} trials matched; missing at A "
                     f"{j['missing_at_a']:,}, at B {j['missing_at_b']:,} (tolerated: "
                     f"{j['max_missing']:,}); keys {j['first_key']} to {j['last_key']}"))
    if look.charge is not None:
        ch, ce = look.charge, look.charged_estimate
        rows.append(("charged: dropped = lost test rounds", f"S (martingale) {ce.chsh_estimate:.5f}, lower bound {_clip(ce.chsh_lower_bound)[0]:.5f} (uncharged {lower_shown:.5f}); certify also subtracts {ch.raw_bits_subtracted:,} raw bits + {ch.pattern_bits:.6g} drop-pattern bits"))
    con.print(kv_table(f"Bell test summary: {log}", rows))
    from rich.table import Table

    tab = Table(title="Correlators E_xy = P(a=b) - P(a!=b) (test rounds)", title_justify="left")
    for col in ("x", "y", "trials", "E_xy", "std. error"):
        tab.add_column(col, justify="right")
    for x in (0, 1):
        for y in (0, 1):
            tab.add_row(str(x), str(y), f"{int(est.counts_xyab[x, y].sum()):,}",
                        f"{est.correlators[x, y]:.5f}", f"{est.correlator_stderr[x, y]:.5f}")
    con.print(tab)
    if len(blocks) > 1:
        lo, lo_note = _clip(min(b.chsh for b in blocks))
        hi, hi_note = _clip(max(b.chsh for b in blocks))
        note = " (values clipped to the physical range [-4, 4])" if lo_note or hi_note else ""
        con.print(f"{len(blocks)} blocks of {summary.block_trials:,} trials: block S from {lo:.4f} to {hi:.4f}{note}")
    if plot is not None:
        con.print(f"plot written to {plot}")


def _clip(value: float) -> tuple[float, str]:
    """A CHSH value clipped to the physical range [-4, 4], with a label when clipped."""
    import math

    if not math.isfinite(value):
        return value, ""
    if value > 4.0:
        return 4.0, (f"CLIPPED to 4 (computed {value:.5f}, above the no-signalling maximum: "
                     "likely a wrong gamma or settings design)")
    if value < -4.0:
        return -4.0, f"clipped to -4 (computed {value:.5f}; too few test rounds to say more)"
    if value > 2.0 * math.sqrt(2.0):
        return value, "above the quantum maximum 2 sqrt 2: impossible for quantum devices; check gamma and the design"
    return value, ""


def _protocol_threshold(proto) -> tuple[float | None, str]:
    """The protocol's acceptance threshold in CHSH units, for the plot (None if it has none).

    Martingale: chsh_threshold. Entropy accumulation: the win rate omega_exp - delta on test
    rounds, i.e. S = 8 (omega_exp - delta) - 4 (CHSH game w = 1/2 + S/8, common practice).
    """
    if proto is None:
        return None, ""
    a = proto.analysis
    s_th = getattr(a, "chsh_threshold", None)
    if s_th is not None:
        return float(s_th), f"protocol threshold S = {s_th:.4f}"
    w, d = getattr(a, "expected_win_probability", None), getattr(a, "tolerance", None)
    if w is not None and d is not None:
        s = 8.0 * (w - d) - 4.0
        return s, f"protocol acceptance S = 8 (w_exp - delta) - 4 = {s:.4f}"
    return None, ""
