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


@handle_errors
def plan_cmd(
    protocol: Annotated[Path, typer.Option("--protocol", help="Protocol file (TOML).")],
    chsh: Annotated[Optional[float], typer.Option("--chsh", help="Honest devices' CHSH value S.")] = None,
    win_probability: Annotated[Optional[float], typer.Option(
        "--win-probability", help="Honest devices' CHSH-game win probability w = 1/2 + S/8.")] = None,
    visibility: Annotated[Optional[float], typer.Option(
        "--visibility", help="Visibility v of the optimal singlet strategy (S = 2 sqrt2 v).")] = None,
    trials: Annotated[Optional[str], typer.Option(
        "--trials", help="Number of trials n (e.g. 1e8; default: the protocol's rounds or "
                         "n_max, else 1e7).")] = None,
    gamma: Annotated[Optional[float], typer.Option(
        "--gamma", help="Test-round probability (default: the protocol's).")] = None,
    plot: Annotated[Optional[Path], typer.Option(
        "--plot", help="Write a plot of certified bits vs trials (PNG/SVG/PDF by extension).")] = None,
    as_json: JsonFlag = False,
) -> None:
    from dicert.planning import plan, plot_plan
    from dicert.protocol import load_protocol

    proto = load_protocol(protocol)
    result = plan(proto, chsh=chsh, win_probability=win_probability, visibility=visibility,
                  trials=_trials(trials), gamma=gamma)
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
            ("gamma maximising net output", _opt(m.best_gamma, "none in [1e-4, 1]")),
        ]
        if m.pef is not None:
            rows = rows[:1] + _pef_rows(m.pef) + rows[1:]
        console.print(kv_table(f"{m.name} ({m.side_information} side information, "
                               f"{m.thresholds} {'parameters' if m.pef else 'thresholds'})",
                               rows))
    if plot is not None:
        typer.echo(f"plot written to {plot}", err=True)


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
