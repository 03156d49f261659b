"""``dicert plan``: before an experiment, how many trials and which gamma a protocol needs."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import CAUTION, JsonFlag, emit_json, handle_errors, stdout_console

HELP = (
    "Plan an experiment under a protocol: for honest devices of the given quality, the "
    "output bits on acceptance, the settings randomness the protocol spends, the net bits, the "
    "probability that honest devices abort, the smallest number of trials with a positive "
    "output and with positive net bits, and the test-round probability gamma that "
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
    "Each row also shows the extractor seed a beacon must provision (seed bits = raw bits + "
    "output bits - 1, "
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
    groups = plan_rows(result)
    if as_json:
        from dicert.cli._rows import to_json

        emit_json(to_json([r for _, rows in groups for r in rows], plan_json(result)))
        return
    from dicert.cli._rows import render

    console = stdout_console()
    for title, rows in groups:
        render(console, title, rows)
    if gammas > 0:
        console.print(_gamma_table(result, gammas))
    if plot is not None:
        typer.echo(f"plot written to {plot}", err=True)


#: Method fields in ``plan --json``, in this order (the field names are the glossary's).
_METHOD_KEYS = (
    "name", "side_information", "thresholds", "parameters", "certified_min_entropy_bits",
    "output_bits", "output_bits_per_trial", "settings_randomness_bits", "net_bits",
    "abort_probability", "abort_probability_kind", "min_trials_positive",
    "min_trials_net_positive", "raw_bits", "seed_bits", "seed_bytes", "best_gamma",
    "best_gamma_output_bits", "best_gamma_net_bits", "best_gamma_abort_probability",
    "best_gamma_seed_bits", "curve_trials", "curve_output_bits", "gamma_sweep",
    "gamma_sweep_output_bits", "gamma_sweep_net_bits", "gamma_sweep_abort_probability", "pef",
)


def plan_json(result) -> dict:
    """``plan --json``: the plan under the README glossary's names ("seed" is the extractor
    seed only; the settings' random bits are ``settings_randomness_bits``)."""
    from dicert.cli._common import to_jsonable

    methods = []
    for m in result.methods:
        d = to_jsonable(m)
        methods.append({k: d.get(k) for k in _METHOD_KEYS})
    return {
        "protocol": result.protocol, "trials": result.trials,
        "trials_source": result.trials_source, "gamma": result.gamma, "device": result.device,
        "honest_win_probability": result.win_probability, "honest_chsh": result.chsh,
        "eps_ext": result.eps_ext, "eps_comp": result.eps_comp, "methods": methods,
        "min_trials_positive": dict(result.min_trials_positive),
        "min_trials_net_positive": dict(result.min_trials_net_positive),
        "best_gamma": dict(result.best_gamma), "notes": list(result.notes),
    }


def plan_rows(result) -> list:
    """The plan's numbers as (table title, rows) groups: the same rows make the tables and
    the ``--json`` object, keys as in :func:`plan_json`."""
    from dicert.cli._rows import Row

    groups = []
    groups.append((f"plan for {result.protocol}", [
        Row("trials", "trials", result.trials, "count", note=result.trials_source),
        Row("gamma", "gamma", result.gamma, "number"),
        Row("honest devices", "device", result.device),
        Row("honest win probability", "honest_win_probability", result.win_probability,
            "number"),
        Row("honest CHSH", "honest_chsh", result.chsh, "chsh"),
        Row("eps_ext", "eps_ext", result.eps_ext, "error"),
        Row("eps_comp", "eps_comp", result.eps_comp, "error", note="derived thresholds"),
    ]))
    for i, m in enumerate(result.methods):
        k = f"methods.{i}."
        out = m.output_bits > 0
        mr = [
            Row("output bits", k + "output_bits", m.output_bits, "count",
                note="on acceptance"),
            Row("certified min-entropy (bits)", k + "certified_min_entropy_bits",
                m.certified_min_entropy_bits, "bits"),
            Row("output bits per trial" + (" consumed" if m.pef else ""),
                k + "output_bits_per_trial", m.output_bits_per_trial, "bits"),
            Row("settings randomness (bits)", k + "settings_randomness_bits", m.settings_randomness_bits,
                "bits", note="random bits spent on choosing settings"),
            Row("net bits", k + "net_bits", m.net_bits, "bits",
                note="output bits - settings randomness"),
            Row("honest abort probability", k + "abort_probability", m.abort_probability,
                "error", note=m.abort_probability_kind),
            Row("smallest n with output > 0", k + "min_trials_positive", m.min_trials_positive,
                "count", note="" if m.min_trials_positive is not None
                else "none in [1e3, 1e14]"),
            Row("smallest n with net bits > 0", k + "min_trials_net_positive",
                m.min_trials_net_positive, "count",
                note="" if m.min_trials_net_positive is not None else "none in [1e3, 1e14]"),
            Row("raw bits", k + "raw_bits", m.raw_bits, "count", note="at most"),
            Row("seed bits to provision", k + "seed_bits", m.seed_bits, "count",
                note="raw bits + output bits - 1" if out else "none: no output"),
            Row("seed bytes", k + "seed_bytes", m.seed_bytes, "count"),
            Row("gamma maximising net bits", k + "best_gamma", m.best_gamma, "number",
                note="" if m.best_gamma is not None else "none in [1e-4, 1]"),
        ]
        if m.best_gamma is not None:
            mr += [
                Row("  output bits there", k + "best_gamma_output_bits",
                    m.best_gamma_output_bits, "count"),
                Row("  net bits there", k + "best_gamma_net_bits", m.best_gamma_net_bits,
                    "bits"),
                Row("  honest abort probability there", k + "best_gamma_abort_probability",
                    m.best_gamma_abort_probability, "error"),
                Row("  seed bits there", k + "best_gamma_seed_bits",
                    m.best_gamma_seed_bits, "count"),
            ]
        if m.pef is not None:
            mr = mr[:1] + _pef_rows(m.pef, k + "pef.") + mr[1:]
        groups.append((f"{m.name} ({m.side_information} side information, "
                       f"{m.thresholds} {'parameters' if m.pef else 'thresholds'})", mr))
    return groups


def _short(v: float) -> str:
    """Net bits in at most ~7 characters (2.34e6, -1.71e6, 71466) for the trade-off table,
    rounded DOWN like every bit count (dicert._format)."""
    from dicert._format import fmt

    return fmt(v, "bits_short")


def _gamma_table(result, rows: int):
    """Net expansion (bits) against gamma for every method: the trade-off behind best gamma."""
    import math

    from rich.table import Table

    tab = Table(title=f"gamma trade-off at n = {result.trials:.6g}: net bits after the "
                      "settings randomness ('-': no output, '*': best gamma)",
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
            cert, net = m.gamma_sweep_output_bits[j], m.gamma_sweep_net_bits[j]
            best = m.best_gamma is not None and math.isclose(g, m.best_gamma, rel_tol=1e-9)
            cells.append(("-" if cert <= 0 else _short(float(net))) + ("*" if best else ""))
        tab.add_row(*cells)
    return tab


def _pef_rows(d, k: str) -> list:
    from dicert.cli._rows import Row

    pct = f"{d.completeness:.0%}"
    return [
        Row("target min-entropy sigma_target (bits)", k + "target_bits", d.target_bits, "bits",
            note=d.target_source),
        Row("model / settings", None, f"{d.model} / {d.settings}"),
        Row("beta used", k + "beta", d.beta, "number"),
        Row("expected analysis trials to success", k + "expected_trials", d.expected_trials,
            "number"),
        Row(f"analysis trials for {pct} success", k + "trials_for_completeness",
            d.trials_for_completeness, "number"),
        Row("beta chosen by the planner", k + "beta_chosen", d.beta_chosen, "number",
            note="log grid, least expected trials"),
        Row("  expected trials there", k + "expected_trials_at_beta_chosen",
            d.expected_trials_at_beta_chosen, "number"),
        Row(f"  trials for {pct} success there", k + "trials_for_completeness_at_beta_chosen",
            d.trials_for_completeness_at_beta_chosen, "number"),
        Row("latency floor (trials)", k + "latency_floor_trials", d.latency_floor_trials,
            "number", note="log2(1/eps_pe)/D_LR"),
        Row("log-prob rate at beta (bits per trial)", k + "rate_bits_per_trial",
            d.rate_bits_per_trial, "bits"),
        Row("asymptotic rate h_inf (bits per trial)", k + "asymptotic_rate_bits",
            d.asymptotic_rate_bits, "bits"),
        Row("calibration trials", k + "calibration_trials", d.calibration_trials, "count",
            note="consumed, not analysed"),
        Row("trials consumed (expected)", k + "trials_consumed", d.trials_consumed, "number"),
    ]
