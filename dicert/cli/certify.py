"""``dicert certify``: trial log + protocol + seed -> certified bits and a signed audit record."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import (
    CAUTION,
    JsonFlag,
    emit_json,
    handle_errors,
    progress_bar,
    stdout_console,
)

HELP = (
    "Certify the randomness of a trial log under a protocol fixed in advance, extract it with "
    "Toeplitz hashing, and write the bits (DIR/random.bits) and a signed audit record "
    "(DIR/record.json).\n\n"
    "The log is read once (streaming). Raw bits are the outcomes of the harvested trials in "
    "log order (a, or a then b), packed big-endian. An abort (the acceptance test failed, or "
    "too little entropy) is a normal outcome: 0 bits, the record is still written.\n\n"
    "Method pef on a single binary (.btl) log: reading stops at the trial where the outcome is "
    "decided (target reached, n_max, or a trial outside the settings model); the record then "
    "covers exactly the bytes read (log.coverage = prefix) and the stopping trial is reported. "
    "With --follow the command waits for a growing binary log (written with a streamed "
    "writer) until the target is reached, n_max, the log's trailer arrives (then it decides "
    "with what there is), or no new trial arrives for --idle-timeout seconds (then it aborts "
    "and still writes a record).\n\n"
    "Before any finite-size method the log is checked against the protocol's declared design "
    "(test-round fraction, settings distribution, serial independence of the settings, "
    "physical range of the CHSH estimate, declared trial count); a failed check aborts. "
    "After extraction, NIST screens run on the output; a gross failure withholds the bits.\n\n"
    "Outputs: DIR must be new or empty (--force replaces an earlier certification's folder, "
    "only once the new one is complete). The files are built in a folder next to DIR and "
    "renamed into place together; published files get mode 0644. With --chain the whole "
    "chain is first verified against your keys (--key's public half, plus --trusted-keys for "
    "earlier keys); a chain with foreign-signed or unsigned pulses, gaps, swapped pulses, "
    "reuse or undeclared protocol changes is refused, as is a log or seed that already fed a "
    "pulse; a changed protocol needs --protocol-change REASON. Runs on one chain or one DIR "
    "wait for each other (a lock).\n\n"
    "Exit codes: 0 certified; 3 aborted (record written); 5 output withheld (record "
    "written, no bits file); 2 bad input (nothing written); 1 verification failure (e.g. "
    "the chain does not verify).\n\n"
    "Assumptions stated in every record: no communication between the stations during a "
    "trial; settings independent of the devices and of any adversary; trusted classical "
    "processing; the side-information model of the method (classical for martingale and "
    "pef, quantum for eat).\n\n"
    f"CAUTION: {CAUTION}"
)


def register(app: typer.Typer) -> None:
    app.command("certify", help=HELP)(certify_cmd)


# long: one typer option per line (about 25) and the table rendering; no numerics here.
@handle_errors
def certify_cmd(
    protocol: Annotated[Path, typer.Option("--protocol", help="Protocol file (TOML), fixed before the run.")],
    seed: Annotated[Path, typer.Option("--seed", help="Extractor seed file (uniformly random raw bytes; n + m - 1 bits are used).")],
    out: Annotated[Path, typer.Option("--out", help="Output directory for random.bits and record.json.")],
    log: Annotated[str | None, typer.Argument(help="Trial log: a file, a directory of files, a glob pattern, or a log spec (TOML).")] = None,
    key: Annotated[Path | None, typer.Option("--key", help="Ed25519 private key (from `dicert keygen`) that signs the record.")] = None,
    chain: Annotated[Path | None, typer.Option("--chain", help="Beacon chain directory: verify it, link the record to the previous pulse and append it (needs --key).")] = None,
    trusted_keys: Annotated[Path | None, typer.Option("--trusted-keys", help="With --chain: TOML file of further keys trusted for earlier pulses (key rotation).")] = None,
    protocol_change: Annotated[str | None, typer.Option("--protocol-change", metavar="REASON", help="With --chain: declare (in the signed record) a deliberate change of protocol from the chain's previous pulse.")] = None,
    force: Annotated[bool, typer.Option("--force", help="Replace an earlier certification's --out folder (only after the new outputs are complete).")] = False,
    follow: Annotated[bool, typer.Option("--follow", help="Method pef, binary log: follow a growing log until the outcome is decided, its trailer arrives, or the idle timeout.")] = False,
    poll: Annotated[float | None, typer.Option("--poll", metavar="SECONDS", help="With --follow: pause between looks for new trials [default: 0.5].")] = None,
    scheduler: Annotated[str | None, typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: run the extraction's pieces on its workers (needs dicert[cluster]).")] = None,
    idle_timeout: Annotated[float | None, typer.Option("--idle-timeout", metavar="SECONDS", help="With --follow: abort after this long without new trials; 0 waits for ever [default: 300].")] = None,
    allow_mixed_inputs: Annotated[bool, typer.Option("--allow-mixed-inputs", help="Accept a multi-file log with files of equal content, a file next to its .gz copy, or mixed formats (refused otherwise; recorded).")] = False,
    allow_seed_reuse: Annotated[bool, typer.Option("--allow-seed-reuse", help="Accept a seed whose SHA-256 equals the log's (refused otherwise; recorded). A constant or periodic seed, and a seed already named by a pulse of the --chain, are always refused.")] = False,
    log_spec: Annotated[Path | None, typer.Option("--log-spec", help="Log spec (TOML) describing the run: station files joined by trial key, columns, value maps (instead of LOG); recorded in the record.")] = None,
    as_json: JsonFlag = False,
) -> None:
    from dicert.certification import certify
    from dicert.errors import ParameterError
    from dicert.logspec import choose_source

    log = choose_source(log, log_spec)

    if not follow and (poll is not None or idle_timeout is not None):
        raise ParameterError("--poll and --idle-timeout apply only with --follow")
    if idle_timeout is not None and idle_timeout < 0:
        raise ParameterError(f"--idle-timeout: expected seconds >= 0, got {idle_timeout:g}")
    extra = {}
    if follow:
        extra = {"follow": True, "poll_s": 0.5 if poll is None else poll,
                 "idle_timeout_s": 300.0 if idle_timeout is None else (idle_timeout or None)}
    with progress_bar() as bar:
        task = bar.add_task("following log" if follow else "reading log", total=None)
        result = certify(
            log, protocol, seed, out, key=key, chain=chain, force=force, scheduler=scheduler or None,
            trusted_keys=trusted_keys, protocol_change=protocol_change,
            allow_mixed_inputs=allow_mixed_inputs, allow_seed_reuse=allow_seed_reuse,
            progress=lambda stage, done, total: bar.update(task, completed=done, total=total),
            **extra,
        )
    rec = result.record
    lg = rec["log"]
    from dicert.cli._rows import Row, record_json, record_rows, render, to_json

    rows = record_rows(_upgraded(rec))
    extra: list[Row] = []
    if result.success_trial_index is not None:
        extra.append(Row("success at trial", "success_trial_index", result.success_trial_index,
                         "count"))
    extra += [Row("log read", None, _read_text(lg)),
              Row("bits file", "bits_file", str(result.bits_file) if result.bits_file else None),
              Row("record", "record_file", str(result.record_file)),
              Row("signed", "signed", rec.get("signature") is not None, "flag",
                  note="" if rec.get("signature") else "pass --key to sign")]
    if result.chain_file:
        extra.append(Row("chain pulse", "chain_file", str(result.chain_file)))
    if rec.get("protocol_change"):
        extra.append(Row("protocol change", None, rec["protocol_change"]["reason"]))
    des = rec.get("design") or {}
    if des:
        bad = [c["name"] for c in des.get("checks", []) if not c.get("passed")]
        extra.append(Row("design checks", None, f"{len(des.get('checks', []))} run, "
                         + (f"FAILED: {', '.join(bad)}" if bad else "all passed")
                         + f" (significance {des.get('significance')})"))
        extra.append(Row("trial count n", None, des.get("trials", {}).get("note", "")))
    scr = rec.get("output_screens")
    if scr:
        extra.append(Row("output screens", None, "passed" if scr.get("passed")
                         else f"FAILED: {scr.get('failure')}"))
    if result.abort_reason:
        extra.append(Row("abort reason", "abort_reason", result.abort_reason))
    rows += extra
    if as_json:
        emit_json(to_json(rows, {
            **record_json(rec, rows),
            "status": result.status,
            "log_coverage": lg.get("coverage"),
            "bytes_read": lg.get("bytes_read"),
            "stopped_early": result.stopped_early,
            "stop_trial_index": result.stop_trial_index,
            "success_trial_index": result.success_trial_index,
            "ended_by": result.ended_by,
            "method": rec["entropy"]["finite_size"]["method"],
            "side_information": rec["entropy"]["finite_size"]["side_information"],
            "abort_reason": result.abort_reason,
            "design_checks": (rec.get("design") or {}).get("checks"),
            "trial_count_source": ((rec.get("design") or {}).get("trials") or {}).get("source"),
            "output_screens": rec.get("output_screens"),
            "pulse_index": rec.get("pulse_index"),
            "protocol_change": rec.get("protocol_change"),
            "chain_file": str(result.chain_file) if result.chain_file else None,
            "exit_code": result.exit_code,
        }))
    else:
        console = stdout_console()
        render(console, "dicert certify", rows)
        console.print(f"CAUTION: {CAUTION}", style="dim", highlight=False)
    if result.exit_code:
        raise typer.Exit(code=result.exit_code)


def _upgraded(rec: dict) -> dict:
    """The record under today's member names (a no-op for a record just written)."""
    from dicert.stages.record_compat import upgrade_body

    return upgrade_body(rec)


def _read_text(lg: dict) -> str:
    """One line on how much of the log the record covers."""
    n, b = lg.get("trials_read"), lg.get("bytes_read")
    if lg.get("coverage") != "prefix":
        return f"whole log ({b} bytes)"
    if lg.get("stopped_early"):
        return (f"prefix: {n} trials, {b} bytes (stopped early at trial "
                f"{lg.get('stop_trial_index')}; later bytes not read)")
    return f"prefix: {n} trials, {b} bytes ({lg.get('ended_by')})"
