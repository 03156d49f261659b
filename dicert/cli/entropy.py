"""``dicert entropy``: certified single-round entropy from a CHSH value or a trial log."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, kv_table, stdout_console, to_jsonable


def register(app: typer.Typer) -> None:
    app.command("entropy")(entropy_cmd)


# long: a typer command: its option declarations, then validation, the bound, the table
@handle_errors
def entropy_cmd(
    chsh: Annotated[Optional[float], typer.Option("--chsh", help="CHSH value S (values above 2*sqrt(2) are clamped; S <= 2 gives 0).")] = None,
    from_log: Annotated[Optional[str], typer.Option("--from-log", help="Use the full correlators observed in this trial log (test rounds) instead of a CHSH value.")] = None,
    parties: Annotated[str, typer.Option("--parties", help="Whose outcomes: A (one party) or AB (the pair).")] = "A",
    measure: Annotated[str, typer.Option("--measure", help="min (min-entropy) or vn (von Neumann entropy).")] = "min",
    level: Annotated[str, typer.Option("--level", help="NPA relaxation level: 1, 1+AB or 2.")] = "1+AB",
    method: Annotated[str, typer.Option("--method", help="auto, analytic, npa (exact certified solve), table (precomputed certificates), radau (von Neumann: solve the Gauss-Radau quadrature SDPs) or radau-table (its precomputed lines).")] = "auto",
    tolerance: Annotated[float, typer.Option("--tolerance", help="Slack allowed on each observed correlator (with --from-log).")] = 0.0,
    fmt: Annotated[Optional[str], typer.Option("--format", help="Force the log format (csv, binary, npz, parquet, hdf5).")] = None,
    protocol: Annotated[Optional[str], typer.Option("--protocol", help="With --from-log: the protocol whose declared design the log is checked against (default: every round a test round, or the observed test fraction of a log with a t column).")] = None,
    log_spec: Annotated[Optional[Path], typer.Option("--log-spec", help="Log spec (TOML) describing the run: station files, join key, columns, value maps (instead of --from-log).")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Lower-bound the entropy per round of the outcomes, against an adversary holding quantum
    side information, from a CHSH value or from a log's observed correlators. SDP bounds come
    from exactly verified dual certificates."""
    from dicert.entropy import bound_entropy
    from dicert.errors import ParameterError

    if log_spec is not None:
        from dicert.logspec import choose_source

        from_log = choose_source(from_log, log_spec, "--from-log")
    if (chsh is None) == (from_log is None):
        raise ParameterError("give exactly one of --chsh or --from-log")
    if parties not in ("A", "AB"):
        raise ParameterError(f"--parties: expected A or AB, got {parties!r}")
    if measure not in ("min", "vn"):
        raise ParameterError(f"--measure: expected min or vn, got {measure!r}")
    if level not in ("1", "1+AB", "2"):
        raise ParameterError(f"--level: expected 1, 1+AB or 2, got {level!r}")
    correlators = None
    log_info = None
    if from_log is not None:
        from dicert.entropy.npa import correlators_from_counts
        from dicert.logs import summarize_log

        summary = summarize_log(from_log, digest=True, format=fmt)
        from types import SimpleNamespace

        from dicert.design import check_design
        from dicert.estimate import observed_design

        if protocol is not None:
            from dicert.protocol import load_protocol

            like = load_protocol(protocol)
        else:
            like = SimpleNamespace(design=observed_design(summary.counts), analysis=None,
                                   method=None, conformance=None)
        report = check_design(summary.counts, like, block_counts=summary.block_counts,
                              pair_counts=summary.pair_counts)
        if not report.passed:
            raise ParameterError(f"{from_log}: refusing to bound entropy from this log: "
                                 f"{report.abort_reason}")
        from dicert.logspec import charge_for_log

        # trials dropped by a station join count as lost test rounds (as in certify)
        charge, counts = charge_for_log(summary.log_spec, summary.counts,
                                        len(parties), source=from_log)
        try:
            correlators = correlators_from_counts(counts)
        except ParameterError as exc:
            raise ParameterError(f"{from_log}: {exc}") from None
        log_info = {"path": from_log, "sha256": summary.sha256, "trials": summary.trials,
                    "design_checks": report.to_dict(), "log_spec": summary.log_spec,
                    "join_charge": None if charge is None else charge.to_dict()}
    result = bound_entropy(
        chsh=chsh, correlators=correlators, parties=parties, measure=measure, level=level,
        method=method, tolerance=tolerance,
    )
    label = "min-entropy" if measure == "min" else "von Neumann entropy"
    if as_json:
        doc = to_jsonable(result)
        doc["units"] = "bits per trial"
        if log_info is not None:
            doc["log"] = log_info
            doc["correlators"] = to_jsonable(correlators)
        emit_json(doc)
        return
    from dicert._format import fmt

    rows = [
        # bits round down, probability bounds up (dicert._format): never optimistic
        (f"single-round bound, {label} (bits per trial)",
         fmt(result.single_round_bound_bits, "bits")),
        ("parties", result.parties),
        ("method", result.method),
    ]
    if result.chsh_input is not None:
        rows.append(("CHSH (as given / used)", f"{result.chsh_input:.6g} / {result.chsh_used:.6g}"))
    if result.guessing_probability is not None:
        rows.append(("guessing probability <=", fmt(result.guessing_probability, "error")))
    if result.level is not None:
        rows.append(("NPA level", result.level))
    cert = result.certificate
    if cert is not None:
        rows += [
            ("certified bound (dual)", fmt(cert.upper_bound, "error")),
            ("solver value", cert.solver_value),
            ("certificate margin", cert.margin),
            ("solver / status", f"{cert.solver} / {cert.status}"),
        ]
    if result.table is not None:
        rows.append(("table piece / grid S", f"{result.table['piece']} / {result.table['grid_chsh']:.6g}"))
    if result.quadrature is not None:
        q = result.quadrature
        rows.append(("certified line (bits)", f"{q['offset']:.6g} + {q['slope']:.6g} w (duals at w = {q['w0']:.6g})"))
        rows.append(("quadrature nodes / relaxation", f"{q['nodes']} / {q['relaxation']}"))
    if result.fallback_reason:
        rows.append(("fallback reason", result.fallback_reason))
    if log_info is not None:
        rows.append(("log trials", log_info["trials"]))
        if charge is not None:
            rows.append(("station-join charge", f"{charge.dropped_trials} dropped trials counted "
                         f"as lost test rounds; {charge.pattern_bits:.6g} drop-pattern bits"))
        dc = log_info["design_checks"]
        rows.append(("design checks", f"{len(dc['checks'])} run at significance "
                     f"{dc['significance']:g}: all passed"))
    stdout_console().print(kv_table("single-round entropy bound", rows))
