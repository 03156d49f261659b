"""``dicert inspect``: counts, correlators, the CHSH estimate and its CHSH lower bound."""

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
    eps_est: Annotated[Optional[float], typer.Option("--eps-est", help="eps_est: error probability of the CHSH lower bound [default: 1e-6].")] = None,
    error: Annotated[Optional[float], typer.Option("--error", hidden=True, help="Former name of --eps-est.")] = None,
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
    """Read a trial log (streaming) and report trials, test rounds, correlators, the CHSH
    estimate (weighted) and the ratio estimate, the CHSH lower bound at eps_est (valid for
    devices with memory), the p-value (local devices) and a per-block summary."""
    from dicert.estimate import block_estimates
    from dicert.errors import ParameterError
    from dicert.logspec import choose_source

    if eps_est is not None and error is not None and eps_est != error:
        raise ParameterError(f"--eps-est {eps_est:g} and --error {error:g} (its former name) "
                             "disagree; give --eps-est only")
    eps = eps_est if eps_est is not None else error if error is not None else 1e-6
    if not 0 < eps < 1:
        raise ParameterError(f"--eps-est: expected a probability in (0, 1), got {eps:g}")

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

    look = inspect_summary(summary, protocol=proto, gamma=gamma, eps=eps, source=log)
    design, source, report, est = look.design, look.design_source, look.design_report, look.estimate
    settings_ok = all(c.passed for c in report.checks
                      if c.name.startswith(("test_settings", "serial", "generation")))
    blocks = block_estimates(summary.block_counts, summary.block_trials, design, eps=block_error)
    lower_shown, lower_note = _clip(est.chsh_lower_bound)
    declared = proto is not None or gamma is not None
    p_refused = None if settings_ok or not declared else (
        "refused: the settings frequencies or sequence contradict the declared design")
    if plot is not None:
        from dicert.plotting import plot_chsh_blocks

        threshold, threshold_label = _protocol_threshold(proto)
        plot_chsh_blocks(blocks, plot, eps=block_error, overall=est.chsh_estimate,
                         overall_lower=lower_shown, threshold=threshold,
                         threshold_label=threshold_label)
    rows = _rows(summary, est, design, source, report, blocks, eps, block_error, p_refused)
    if look.charge is not None:
        rows += _charge_rows(look.charge, look.charged_estimate)
    if as_json:
        from dicert.cli._rows import to_json

        emit_json(to_json(rows, {
            "log": log,
            "files": [f.path for f in summary.files],
            "has_test_flag": summary.has_test_flag,
            "counts": {
                f"t{t}x{x}y{y}a{a}b{b}": int(summary.counts[t, x, y, a, b])
                for t in (0, 1) for x in (0, 1) for y in (0, 1) for a in (0, 1) for b in (0, 1)
            },
            "counts_layout": "counts[t][x][y][a][b]; logs without a t column count every trial as a test round (t=1)",
            "counts_array": summary.counts,
            "correlators": est.correlators,
            "correlator_stderr": est.correlator_stderr,
            "gamma_source": source,
            "chsh_lower_bound_shown": lower_shown,
            "chsh_lower_bound_note": lower_note,
            "p_value_refused": p_refused,
            "design_checks": report.to_dict(),
            "bound_method": est.bound_method,
            "wins": est.wins,
            "p_value_method": est.p_value_method,
            "blocks": [
                {"index": b.index, "first_trial": b.first_trial, "trials": b.trials,
                 "chsh_estimate": b.chsh_estimate, "chsh_lower_bound": b.chsh_lower_bound,
                 "chsh_upper_bound": b.chsh_upper_bound}
                for b in blocks
            ],
            "plot": str(plot) if plot else None,
            "log_spec": summary.log_spec,
            "join_charge": None if look.charge is None else {
                **look.charge.to_dict(),
                "charged_chsh_estimate": look.charged_estimate.chsh_estimate,
                "charged_chsh_lower_bound": look.charged_estimate.chsh_lower_bound,
                "charged_p_value_local": look.charged_estimate.p_value_local},
        }))
        return
    con = stdout_console()
    from dicert.cli._rows import Row, render

    if summary.log_spec is not None and summary.log_spec.get("join") is not None:
        j = summary.log_spec["join"]
        rows.append(Row("station join", None, f"{j['matched']:,} trials matched; missing at A "
                        f"{j['missing_at_a']:,}, at B {j['missing_at_b']:,}"
                        + (f", at both {j['missing_at_both']:,} (consecutive keys)"
                           if j.get("keys") else "") + " (tolerated: "
                        f"{j['max_missing']:,}); keys {j['first_key']} to {j['last_key']}"))
    render(con, f"Bell test summary: {log}", rows)
    from rich.table import Table

    tab = Table(title="Correlators E_xy = P(a=b) - P(a!=b) (test rounds)", title_justify="left")
    for col in ("x", "y", "trials", "E_xy", "std. error"):
        tab.add_column(col, justify="right")
    for x in (0, 1):
        for y in (0, 1):
            tab.add_row(str(x), str(y), f"{int(est.counts_xyab[x, y].sum()):,}",
                        f"{est.correlators[x, y]:.5f}", f"{est.correlator_stderr[x, y]:.5f}")
    con.print(tab)
    if plot is not None:
        con.print(f"plot written to {plot}")


def _rows(summary, est, design, source, report, blocks, eps, block_error, p_refused):
    """The estimate's numbers as rows (the table and the --json object), glossary names."""
    from dicert.cli._rows import Row

    rows = [
        Row("trials", "trials", summary.trials, "count"),
        Row("test rounds", "test_rounds", est.test_rounds, "count"),
        Row("gamma", "gamma", design.gamma, "number", note=source),
        Row("CHSH estimate", "chsh_estimate", est.chsh_estimate, "chsh",
            note="weighted, martingale" + _range_note(est.chsh_estimate)),
        Row("CHSH ratio estimate", "chsh_ratio_estimate", est.chsh_ratio_estimate, "chsh",
            note="ratio of counts" + _range_note(est.chsh_ratio_estimate)),
        Row("CHSH ratio estimate std. error", "chsh_stderr", est.chsh_stderr, "upper",
            note="i.i.d."),
        Row("CHSH lower bound", "chsh_lower_bound", est.chsh_lower_bound, "lower",
            note="at eps_est, valid with memory" + _range_note(est.chsh_lower_bound)),
        Row("eps_est", "eps_est", eps, "error"),
        Row("CHSH lower bound margin", "margin", est.margin, "upper",
            note="CHSH estimate - CHSH lower bound"),
        Row("CHSH-game win probability", "win_probability", est.win_probability, "number"),
    ]
    if p_refused:
        rows += [Row("p-value (local devices)", "p_value_local", None, "error", note=p_refused),
                 Row("log10 p-value (local devices)", "log10_p_value_local", None, "upper")]
    else:
        rows += [Row("p-value (local devices)", "p_value_local", est.p_value_local, "error",
                     note="below the smallest float" if est.p_value_local == 0 else ""),
                 Row("log10 p-value (local devices)", "log10_p_value_local",
                     est.log10_p_value_local, "upper")]
    rows.append(Row("local win bound", "local_win_bound", est.local_win_bound, "number",
                    note="at the observed settings frequencies"))
    bad = [c for c in report.checks if not c.passed]
    rows.append(Row("design checks", None,
                    f"{len(report.checks)} run at significance {report.significance:g}: "
                    + ("all passed" if not bad
                       else "FAILED: " + "; ".join(f"{c.name}: {c.detail}" for c in bad))))
    if blocks:
        rows += [
            Row("blocks", "block_count", len(blocks), "count"),
            Row("trials per block", "block_trials", summary.block_trials, "count",
                note="one block: the whole log" if summary.trials <= summary.block_trials
                else "the last block holds the rest" if summary.trials % summary.block_trials
                else ""),
            Row("block eps per side", "block_eps_per_side", block_error, "error"),
            Row("block CHSH estimate, lowest", "block_chsh_estimate_min",
                min(b.chsh_estimate for b in blocks), "chsh"),
            Row("block CHSH estimate, highest", "block_chsh_estimate_max",
                max(b.chsh_estimate for b in blocks), "chsh"),
            Row("block CHSH lower bound, lowest", "block_chsh_lower_bound_min",
                min(b.chsh_lower_bound for b in blocks), "lower"),
        ]
    return rows


def _charge_rows(ch, ce) -> list:
    """A station join that dropped trials: the estimate with every dropped trial counted as a
    lost test round (keys under join_charge in --json), and what certify subtracts."""
    from dicert.cli._rows import Row

    k = "join_charge."
    return [
        Row("charged CHSH estimate", k + "charged_chsh_estimate", ce.chsh_estimate, "chsh",
            note="dropped trials counted as lost test rounds"),
        Row("charged CHSH lower bound", k + "charged_chsh_lower_bound", ce.chsh_lower_bound,
            "lower", note="at eps_est" + _range_note(ce.chsh_lower_bound)),
        Row("charged p-value (local devices)", k + "charged_p_value_local", ce.p_value_local,
            "error"),
        Row("dropped trials", k + "dropped_trials", ch.dropped_trials, "count"),
        Row("raw bits certify subtracts", k + "raw_bits_subtracted", ch.raw_bits_subtracted,
            "count"),
        # bits taken away: rounded up, so the charge never looks smaller than it is
        Row("drop-pattern bits certify subtracts", k + "pattern_bits", ch.pattern_bits,
            "upper"),
    ]


def _range_note(value: float) -> str:
    """Words for a CHSH value outside the physical range (the value itself is shown as is)."""
    import math

    if not math.isfinite(value):
        return ""
    if value > 4.0:
        return ("; ABOVE the no-signalling maximum 4: likely a wrong gamma or settings design, "
                "not a valid value")
    if value < -4.0:
        return "; below -4: too few test rounds to say more"
    if value > 2.0 * math.sqrt(2.0):
        return ("; above the quantum maximum 2 sqrt 2: impossible for quantum devices; check "
                "gamma and the design")
    return ""


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
