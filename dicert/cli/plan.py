"""``dicert plan``: before an experiment, how many trials and which gamma a protocol needs."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import CAUTION, JsonFlag, emit_json, handle_errors, kv_table, stdout_console

HELP = (
    "Plan an experiment under a protocol: for honest devices of the given quality, the "
    "certified output on acceptance, the seed the protocol consumes, the net expansion, the "
    "probability that honest devices abort, the smallest number of trials with a positive "
    "output and with a positive net expansion, and the test-round probability gamma that "
    "maximises the net output. The protocol's own method uses its declared thresholds; the "
    "other methods use thresholds derived for this quality (labelled 'derived').\n\n"
    "Device quality: at most one of --chsh, --win-probability, --visibility, each meaning the "
    "isotropic box (the Tsirelson box mixed with white noise) of that CHSH value. Default: the "
    "protocol's expectation; for a PEF protocol without one, the photonic model of "
    "`dicert simulate --model photonic` (r = 2.918, detector efficiency 0.76).\n\n"
    "PEF rows (probability estimation, classical side information): the run stops at the "
    "target; --trials caps the analysis trials (default: the protocol's n_max). Shown: the "
    "beta used and the beta minimising the expected trials, the expected trials, the trials "
    "for 99% success, and the latency floor. CHSH protocols get a derived PEF row.\n\n"
    "Each row also shows the extractor seed a beacon must provision (n_raw + m - 1 bits, "
    "Toeplitz hashing) and the output at the best gamma; a gamma trade-off table follows. "
    "--eps-ext, --eps-est, --eps-s, --eps-ea and --eps-pe replace the protocol's error "
    "parameters of the same names for this plan only.\n\n"
    f"CAUTION: {CAUTION}"
)


def register(app: typer.Typer) -> None:
    app.command("plan", help=HELP)(plan_cmd)


def _trials(value: Optional[str]) -> Optional[int]:
    if value is None:
        return None
    from dicert.errors import ParameterError

    try:
        x = float(value)
    except ValueError:
        raise ParameterError(f"--trials: expected a number such as 1e8, got {value!r}") from None
    if not (x >= 1 and x == int(x)) or x > 1e18:
        raise ParameterError(f"--trials must be a positive integer (at most 1e18), got {value!r}")
    return int(x)


# long: one typer option per line (error parameters included) and the table rendering.
@handle_errors
def plan_cmd(
    protocol: Annotated[Path, typer.Option("--protocol", help="Protocol file (TOML).")],
    chsh: Annotated[Optional[float], typer.Option("--chsh", help="Honest devices' CHSH value S.")] = None,
    win_probability: Annotated[Optional[float], typer.Option(
        "--win-probability", help="Honest devices' CHSH-game win probability w = 1/2 + S/8.")] = None,
    visibility: Annotated[Optional[float], typer.Option(
        "--visibility", help="Visibility v of the optimal singlet strategy (S = 2 sqrt2 v).")] = None,
    trials: Annotated[Optional[str], typer.Option(
        "--trials", help="Number of trials n (e.g. 1e8; default: the protocol's [design] trials or "
                         "n_max, else 1e7).")] = None,
    gamma: Annotated[Optional[float], typer.Option(
        "--gamma", help="Test-round probability (default: the protocol's).")] = None,
    eps_ext: Annotated[Optional[float], typer.Option(
        "--eps-ext", help="Extractor error ([extractor] eps_ext; default: the protocol's).")] = None,
    eps_est: Annotated[Optional[float], typer.Option(
        "--eps-est", help="Martingale protocols: estimation error ([analysis] eps_est).")] = None,
    eps_s: Annotated[Optional[float], typer.Option(
        "--eps-s", help="Entropy accumulation: smoothing error ([analysis] eps_s).")] = None,
    eps_ea: Annotated[Optional[float], typer.Option(
        "--eps-ea", help="Entropy accumulation: acceptance-probability floor ([analysis] eps_ea).")] = None,
    eps_pe: Annotated[Optional[float], typer.Option(
        "--eps-pe", help="PEF protocols: probability-estimation error ([analysis] eps_pe).")] = None,
    eps_comp: Annotated[Optional[float], typer.Option(
        "--eps-comp", help="Completeness target (honest abort) of the derived thresholds "
                           "(default: the protocol's eps_comp, else 1e-6).")] = None,
    gammas: Annotated[int, typer.Option(
        "--gammas", min=0, max=30, help="Rows of the gamma trade-off table taken from the sweep, besides each method's best gamma and the PEF sweep points (0: no table).")] = 6,
    plot: Annotated[Optional[Path], typer.Option(
        "--plot", help="Write a plot of certified bits vs trials and net bits vs gamma "
                       "(.png, .svg or .pdf).")] = None,
    no_cache: Annotated[bool, typer.Option(
        "--no-cache", help="Recompute even if this plan is cached (results are cached per "
                           "protocol text, options and code version; see DICERT_CACHE_DIR).")] = False,
    as_json: JsonFlag = False,
) -> None:
    from dicert.planning import plot_plan
    from dicert.protocol import load_protocol

    if plot is not None:
        from dicert.plotting import check_plot_path

        check_plot_path(plot)
    from dicert.plan_cache import cached_plan

    result = cached_plan(load_protocol(protocol), use_cache=not no_cache,
                         overrides={"eps_ext": eps_ext, "eps_est": eps_est, "eps_s": eps_s,
                                    "eps_ea": eps_ea, "eps_pe": eps_pe},
                         chsh=chsh, win_probability=win_probability, visibility=visibility,
                         trials=_trials(trials), gamma=gamma, eps_comp=eps_comp)
    if plot is not None:
        plot_plan(result, plot)
    if as_json:
        emit_json(result)
        return
    console = stdout_console()
    console.print(kv_table(f"plan for {result.protocol}", [
        ("trials", f"{result.trials:.6g} ({result.trials_source})"),
        ("gamma", result.gamma),
        ("honest devices", result.device),
        ("honest win probability", result.win_probability),
        ("honest CHSH value", result.chsh),
        ("eps_ext", result.eps_ext),
        ("eps_comp (derived thresholds)", result.eps_comp),
    ]))
    for m in result.methods:
        rows = [
            ("certified output on acceptance (bits)", m.certified_bits),
            ("smooth min-entropy (bits)", m.min_entropy_bits),
            ("output per trial" + (" consumed" if m.pef else ""), m.rate_per_trial),
            ("seed consumed (bits)", m.seed_bits),
            ("net expansion (bits)", m.net_bits),
            (f"honest abort probability ({m.abort_probability_kind})", m.abort_probability),
            ("smallest n with output > 0", _opt(m.min_trials_positive)),
            ("smallest n with net > 0", _opt(m.min_trials_net_positive)),
            ("extractor seed needed n_raw + m - 1",
             f"{m.extractor_seed_bits:,} bits = {m.extractor_seed_bytes:,} bytes "
             f"(n_raw at most {m.raw_bits:,})" if m.certified_bits > 0 else "none (no output)"),
            ("gamma maximising net output", _opt(m.best_gamma, "none in [1e-4, 1]")),
        ]
        if m.best_gamma is not None:
            rows += [
                ("  certified output there (bits)", m.best_gamma_certified_bits),
                ("  net expansion there (bits)", m.best_gamma_net_bits),
                ("  honest abort probability there", m.best_gamma_abort_probability),
                ("  extractor seed needed there (bits)", m.best_gamma_extractor_seed_bits),
            ]
        if m.pef is not None:
            rows = rows[:1] + _pef_rows(m.pef) + rows[1:]
        console.print(kv_table(f"{m.name} ({m.side_information} side information, "
                               f"{m.thresholds} {'parameters' if m.pef else 'thresholds'})",
                               rows))
    if gammas > 0:
        console.print(_gamma_table(result, gammas))
    if plot is not None:
        typer.echo(f"plot written to {plot}", err=True)


def _short(v: float) -> str:
    """A number in at most ~7 characters (2.35e6, -1.7e6, 71466) for the trade-off table."""
    if abs(v) < 1e6:
        return f"{v:.0f}"
    mant, exp = f"{v:.2e}".split("e")
    return f"{mant.rstrip('0').rstrip('.')}e{int(exp)}"


def _gamma_table(result, rows: int):
    """Net expansion (bits) against gamma for every method: the trade-off behind best gamma."""
    import math

    from rich.table import Table

    tab = Table(title=f"gamma trade-off at n = {result.trials:.6g}: net bits after the "
                      "protocol's seed ('-': no output, '*': best gamma)",
                title_justify="left")
    tab.add_column("gamma", justify="right")
    for m in result.methods:
        tab.add_column(m.name, justify="right", overflow="fold")
    grid = max((m.gamma_sweep for m in result.methods), key=len, default=())
    if not grid:
        return tab
    # Rows: a subset of the finest sweep, every point of the coarser sweeps (PEF rows) and
    # every best gamma; a cell shows a method's value only where it was computed (no
    # nearest-neighbour stand-ins), blank elsewhere.
    pick = {grid[round(i * (len(grid) - 1) / max(1, rows - 1))] for i in range(rows)}
    for m in result.methods:
        if m.gamma_sweep and len(m.gamma_sweep) < len(grid):
            pick.update(m.gamma_sweep)
        if m.best_gamma is not None:
            pick.add(m.best_gamma)
    gs: list[float] = []
    for g in sorted(pick):
        if not gs or not math.isclose(g, gs[-1], rel_tol=1e-9):
            gs.append(g)
    for g in gs:
        cells = [f"{g:.3g}"]
        for m in result.methods:
            j = next((k for k, x in enumerate(m.gamma_sweep)
                      if math.isclose(x, g, rel_tol=1e-9)), None)
            if j is None:
                cells.append("")
                continue
            cert, net = m.gamma_sweep_certified_bits[j], m.gamma_sweep_net_bits[j]
            best = m.best_gamma is not None and math.isclose(g, m.best_gamma, rel_tol=1e-9)
            cells.append(("-" if cert <= 0 else _short(float(net))) + ("*" if best else ""))
        tab.add_row(*cells)
    return tab


def _pef_rows(d) -> list[tuple[str, object]]:
    return [
        (f"target min-entropy sigma_target ({d.target_source}, bits)", d.target_bits),
        ("model / settings", f"{d.model} / {d.settings}"),
        ("beta used", d.beta),
        ("expected analysis trials to success", d.expected_trials),
        (f"analysis trials for {d.completeness:.0%} success", d.trials_for_completeness),
        ("beta chosen by the planner (log grid, least expected trials)", d.beta_chosen),
        ("  expected trials there", d.expected_trials_at_beta_chosen),
        (f"  trials for {d.completeness:.0%} success there",
         d.trials_for_completeness_at_beta_chosen),
        ("latency floor log2(1/eps_pe)/D_LR (trials)", d.latency_floor_trials),
        ("log-prob rate at beta (bits/trial)", d.rate_bits_per_trial),
        ("asymptotic rate h_inf (bits/trial)", d.asymptotic_rate_bits),
        ("calibration trials (consumed, not analysed)", d.calibration_trials),
        ("trials consumed (expected)", d.trials_consumed),
    ]


def _opt(v, none: str = "none in [1e3, 1e14]"):
    return none if v is None else v
