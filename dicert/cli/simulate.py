"""``dicert simulate``: write a simulated trial log (invented data) in any supported format."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from dicert.cli._common import (JsonFlag, emit_json, stderr_console, handle_errors, kv_table, progress_bar,
                                stdout_console, to_jsonable)
from dicert.errors import ParameterError

NOTE = "simulated devices: the data are invented"


def register(app: typer.Typer) -> None:
    app.command("simulate")(simulate_cmd)


@handle_errors
def simulate_cmd(
    trials: Annotated[str, typer.Option("--trials", "-n", help="Number of trials (e.g. 1000000, 1_000_000 or 1e6).")],
    out: Annotated[str, typer.Option("--out", "-o", help="Output log (.csv, .csv.gz, .btl, .npz).")],
    visibility: Annotated[float, typer.Option("--visibility", "-v", help="White-noise visibility of the state, in [0, 1].")] = 1.0,
    efficiency: Annotated[Optional[float], typer.Option("--efficiency", help="Detector efficiency (quantum default 1, photonic default 0.76); a no-click is outcome 0.")] = None,
    gamma: Annotated[float, typer.Option("--gamma", help="Test-round probability (spot-checking); below 1 a t column is written.")] = 1.0,
    model: Annotated[str, typer.Option("--model", help="quantum | classical | classical-random | photonic.")] = "quantum",
    fmt: Annotated[Optional[str], typer.Option("--format", help="csv | csv.gz | binary | npz; default from the extension.")] = None,
    rng_stream: Annotated[Optional[int], typer.Option("--rng-stream", help="Number of the simulator's pseudo-random stream, for reproducible runs (fresh entropy, reported, if omitted).")] = None,
    rng_old: Annotated[Optional[int], typer.Option("--rng-seed", hidden=True, help="Former name of --rng-stream.")] = None,
    generation: Annotated[str, typer.Option("--generation", help="Settings x,y of generation rounds (with --gamma < 1).")] = "0,0",
    bias_x: Annotated[Optional[float], typer.Option("--bias-x", help="P(x = 1) on test rounds (default 0.5).")] = None,
    bias_y: Annotated[Optional[float], typer.Option("--bias-y", help="P(y = 1) on test rounds (default 0.5).")] = None,
    state_ratio: Annotated[Optional[float], typer.Option("--state-ratio", help="Photonic model: r in (|HV> + r|VH>)/sqrt(1+r^2) (default 2.918).")] = None,
    pair_probability: Annotated[float, typer.Option("--pair-probability", help="Photonic model: probability that a pair is produced in a trial.")] = 1.0,
    test_column: Annotated[bool, typer.Option("--test-column", help="Always write the t column (even with --gamma 1).")] = False,
    as_json: JsonFlag = False,
) -> None:
    """Simulate Bell-test devices and write their trial log (written atomically).

    Models: honest quantum devices (maximally entangled pair, CHSH-optimal angles, white noise,
    detector efficiency), classical devices (the best deterministic strategy, or random local
    strategies drawn per trial), and a photonic CH/Eberhard-type model (outcome 1 = click).
    The data are invented; they exist to exercise and test the analysis.
    """
    from dicert import simulate as sim

    if rng_old is not None:
        if rng_stream is not None:
            raise ParameterError("--rng-seed is the former name of --rng-stream: give --rng-stream only")
        stderr_console().print("note: --rng-seed is now called --rng-stream")
        rng_stream = rng_old

    n = sim.parse_trial_count(trials)
    gen = sim.parse_setting_pair(generation, "--generation")
    bias = None
    if bias_x is not None or bias_y is not None:
        bias = (0.5 if bias_x is None else bias_x, 0.5 if bias_y is None else bias_y)
    dev = sim.device_model(
        model,
        visibility=visibility,
        efficiency=efficiency,
        r=sim.PHOTONIC_R if state_ratio is None else state_ratio,
        pair_probability=pair_probability,
    )
    with progress_bar() as bar:
        task = bar.add_task("simulating", total=n)
        summary = sim.simulate_to_file(
            out, n, dev, format=fmt, gamma=gamma, generation=gen, settings_bias=bias,
            include_t=True if test_column else None, rng_stream=rng_stream,
            progress=lambda done, total: bar.update(task, completed=done, total=total),
        )
    if as_json:
        emit_json({**to_jsonable(summary), "note": NOTE})
        return
    rows = [
        ("output", summary.path),
        ("format", summary.format),
        ("trials", f"{summary.trials:,}"),
        ("test rounds", f"{summary.test_rounds:,}" + ("" if summary.has_test_flag else " (no t column: all)")),
        ("model", summary.model + (" (local)" if summary.local else "")),
    ]
    rows += [(f"  {k}", v if isinstance(v, (str, float, int)) else str(v)) for k, v in summary.parameters.items()]
    rows += [
        ("CHSH S of the box", summary.chsh),
        ("win probability (uniform settings)", summary.win_probability),
        ("CH-Eberhard J (1 = click)", summary.ch_eberhard_j),
        ("simulator stream (--rng-stream)", str(summary.rng_stream)),
        ("sha256", summary.sha256),
    ]
    console = stdout_console()
    console.print(kv_table("simulated log", rows))
    console.print(NOTE)
