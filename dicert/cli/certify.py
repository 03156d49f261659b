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
    kv_table,
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
    "Exit codes: 0 certified; 3 aborted (record written); 2 bad input (nothing written); "
    "1 verification failure.\n\n"
    "Assumptions stated in every record: no communication between the stations during a "
    "trial; settings independent of the devices and of any adversary; trusted classical "
    "processing; the side-information model of the method (classical for martingale and "
    "pef, quantum for eat).\n\n"
    f"CAUTION: {CAUTION}"
)


def register(app: typer.Typer) -> None:
    app.command("certify", help=HELP)(certify_cmd)


@handle_errors
def certify_cmd(
    log: Annotated[str, typer.Argument(help="Trial log: a file, a directory of files, or a glob pattern.")],
    protocol: Annotated[Path, typer.Option("--protocol", help="Protocol file (TOML), fixed before the run.")],
    seed: Annotated[Path, typer.Option("--seed", help="Extractor seed file (uniformly random raw bytes; n + m - 1 bits are used).")],
    out: Annotated[Path, typer.Option("--out", help="Output directory for random.bits and record.json.")],
    key: Annotated[Path | None, typer.Option("--key", help="Ed25519 private key (from `dicert keygen`) that signs the record.")] = None,
    chain: Annotated[Path | None, typer.Option("--chain", help="Beacon chain directory: link the record to the previous pulse and append it.")] = None,
    as_json: JsonFlag = False,
) -> None:
    from dicert.certify import certify

    with progress_bar() as bar:
        task = bar.add_task("reading log", total=None)
        result = certify(
            log, protocol, seed, out, key=key, chain=chain,
            progress=lambda stage, done, total: bar.update(task, completed=done, total=total),
        )
    rec = result.record
    if as_json:
        emit_json({
            "status": result.status,
            "output_bits": result.output_bits,
            "bits_file": str(result.bits_file) if result.bits_file else None,
            "record_file": str(result.record_file),
            "record_sha256": result.record_sha256,
            "chain_file": str(result.chain_file) if result.chain_file else None,
            "min_entropy_bits": result.min_entropy_bits,
            "error": result.error,
            "trials": result.trials,
            "raw_bits": result.raw_bits,
            "method": rec["entropy"]["finite_size"]["method"],
            "side_information": rec["entropy"]["finite_size"]["side_information"],
            "abort_reason": result.abort_reason,
            "signed": rec.get("signature") is not None,
            "exit_code": result.exit_code,
        })
    else:
        fin = rec["entropy"]["finite_size"]
        rows = [
            ("status", result.status.upper()),
            ("trials", result.trials),
            ("CHSH estimate", rec["estimate"].get("chsh")),
            ("method", f"{fin['method']} ({fin['side_information']} side information)"),
            ("certified min-entropy (bits)", result.min_entropy_bits),
            ("raw bits", result.raw_bits),
            ("output bits", result.output_bits),
            ("total soundness error", result.error),
            ("bits file", str(result.bits_file) if result.bits_file else "-"),
            ("record", str(result.record_file)),
            ("record SHA-256", result.record_sha256),
            ("signed", "yes" if rec.get("signature") else "no (pass --key to sign)"),
        ]
        if result.chain_file:
            rows.append(("chain pulse", str(result.chain_file)))
        if result.abort_reason:
            rows.append(("abort reason", result.abort_reason))
        console = stdout_console()
        console.print(kv_table("dicert certify", rows))
        console.print(f"CAUTION: {CAUTION}", style="dim")
    if result.exit_code:
        raise typer.Exit(code=result.exit_code)
