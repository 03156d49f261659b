"""``dicert bench``: performance benchmarks, reported as ratios against in-run baselines."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, stdout_console, stderr_console


def register(app: typer.Typer) -> None:
    app.command("bench")(bench_cmd)


@handle_errors
def bench_cmd(
    suite: Annotated[Optional[list[str]], typer.Option("--suite", help="Run only these suites (repeatable): logs, join, simulate, entropy, extract, finite, pef, certify.")] = None,
    quick: Annotated[bool, typer.Option("--quick", help="Smaller sizes (about 10x), for a fast look.")] = False,
    as_json: JsonFlag = False,
) -> None:
    """Measure throughput, latency and memory of each pipeline stage. Numbers are compared with
    baselines measured in the same run, because shared machines are noisy."""
    import importlib
    import importlib.util

    from dicert.benchmarks import SUITES
    from dicert.errors import ParameterError

    chosen = list(suite) if suite else list(SUITES)
    unknown = [s for s in chosen if s not in SUITES]
    if unknown:
        raise ParameterError(f"unknown benchmark suite {unknown[0]!r}; choose from {', '.join(SUITES)}")
    results = []
    err = stderr_console()
    for name in chosen:
        mod = f"dicert.benchmarks.{name}"
        if importlib.util.find_spec(mod) is None:
            continue
        if not as_json:
            err.print(f"running benchmark suite {name} ...")
        results.extend(importlib.import_module(mod).run(quick=quick))
    from dicert.benchmarks import QUICK_NOTE, checked_at

    if as_json:
        emit_json([{**{k: getattr(r, k) for k in ("suite", "name", "value", "unit", "target", "higher_is_better", "note")},
                    "meets_target": checked_at(r, quick),
                    "target_checked": r.target is not None and checked_at(r, quick) is not None}
                   for r in results])
        return
    from rich.table import Table

    # Four columns that fit 80: the measure carries its note on a second, dim line, and each
    # suite starts with a heading row (no cell wraps into a column of fragments).
    tab = Table(title="dicert benchmarks", title_justify="left",
                caption=QUICK_NOTE if quick else None, caption_justify="left")
    tab.add_column("measure", ratio=1, overflow="fold")
    tab.add_column("value", no_wrap=True, justify="right")
    tab.add_column("target", no_wrap=True)
    tab.add_column("ok", no_wrap=True)
    current = None
    for r in results:
        if r.suite != current:
            current = r.suite
            tab.add_row(f"[bold]{r.suite}[/bold]", "", "", "")
        tgt = "" if r.target is None else ("\u2265 " if r.higher_is_better else "\u2264 ") + f"{r.target:g} {r.unit}"
        verdict = checked_at(r, quick)
        ok = {True: "yes", False: "[red]NO[/red]", None: "" if r.target is None else "-"}[verdict]
        name = r.name + (f"\n[dim]{r.note}[/dim]" if r.note else "")
        tab.add_row(name, f"{r.value:.4g} {r.unit}".strip(), tgt, ok)
    stdout_console().print(tab)
