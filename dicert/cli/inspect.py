"""``dicert inspect``: counts, correlators, CHSH value and its finite-statistics bound."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, kv_table, progress_bar, stdout_console


def register(app: typer.Typer) -> None:
    app.command("inspect")(inspect_cmd)


@handle_errors
def inspect_cmd(
    log: Annotated[str, typer.Argument(help="Trial log: a file, a directory of files, or a glob pattern.")],
    error: Annotated[float, typer.Option("--error", help="Error probability eps of the lower bound on S.")] = 1e-6,
    gamma: Annotated[float, typer.Option("--gamma", help="Test-round probability of the design (1 = uniform settings every round).")] = 1.0,
    block_trials: Annotated[int, typer.Option("--block-trials", help="Trials per block for drift diagnostics.")] = 1 << 20,
    block_error: Annotated[float, typer.Option("--block-error", help="Error per side of each block's interval.")] = 1e-3,
    plot: Annotated[Optional[Path], typer.Option("--plot", help="Write a plot of S per block to this file (PNG/PDF/SVG).")] = None,
    fmt: Annotated[Optional[str], typer.Option("--format", help="Force the input format (csv, binary, npz).")] = None,
    scheduler: Annotated[Optional[str], typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: count and hash the log's files on its workers (needs dicert[cluster]).")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Read a trial log (streaming) and report counts, correlators, the CHSH value, its lower
    confidence bound valid for devices with memory, and the p-value of local realism."""
    from dicert.estimate import SettingsDesign, block_estimates, estimate_chsh
    from dicert.logs import summarize_log

    design = SettingsDesign(gamma=gamma)
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
    est = estimate_chsh(summary.counts, design, eps=error)
    blocks = block_estimates(summary.block_counts, summary.block_trials, design, eps=block_error)
    if plot is not None:
        from dicert.plotting import plot_chsh_blocks

        plot_chsh_blocks(blocks, plot, eps=block_error)
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
                "gamma": gamma,
                "bound_method": est.bound_method,
                "win_probability": est.win_probability,
                "wins": est.wins,
                "p_value_local": est.p_value_local,
                "log10_p_value_local": est.log10_p_value_local,
                "p_value_method": est.p_value_method,
                "blocks": [
                    {"index": b.index, "first_trial": b.first_trial, "trials": b.trials,
                     "chsh": b.chsh, "chsh_lower": b.chsh_lower, "chsh_upper": b.chsh_upper}
                    for b in blocks
                ],
                "plot": str(plot) if plot else None,
            }
        )
        return
    con = stdout_console()
    rows = [
        ("trials", f"{summary.trials:,}"),
        ("test rounds", f"{est.test_trials:,}"),
        ("CHSH S (ratio estimator)", f"{est.chsh:.5f} \u00b1 {est.chsh_stderr:.5f} (i.i.d. std. error)"),
        ("CHSH S (martingale estimator)", f"{est.chsh_martingale:.5f}"),
        (f"lower bound on S at eps={error:g}", f"{est.chsh_lower:.5f}  (margin {est.margin:.5f}; valid with memory)"),
        ("CHSH-game win probability", f"{est.win_probability:.6f}"),
        ("p-value of local realism", f"{est.p_value_local:.3e}" if est.p_value_local > 0 else f"10^{est.log10_p_value_local:.1f}"),
    ]
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
        lo = min(b.chsh for b in blocks)
        hi = max(b.chsh for b in blocks)
        con.print(f"{len(blocks)} blocks of {summary.block_trials:,} trials: block S from {lo:.4f} to {hi:.4f}")
    if plot is not None:
        con.print(f"plot written to {plot}")
