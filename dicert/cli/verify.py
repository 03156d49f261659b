"""``dicert verify``: re-check an audit record (and its inputs), or a whole beacon chain."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import (
    JsonFlag,
    emit_json,
    handle_errors,
    kv_table,
    stdout_console,
)

HELP = (
    "Re-check an audit record: signature and internal consistency (every derived number is "
    "recomputed from the recorded counts and protocol); with --log and --seed every number is "
    "re-derived from the raw inputs and the extraction re-run; with --bits the output file is "
    "compared. Without --log and --seed only the signature and internal consistency are "
    "checked, and the report says so.\n\n"
    "With --chain DIR: check a beacon chain (signatures, links, gaps, reordering, forks, reuse "
    "of an extractor seed across pulses).\n\n"
    "Exit codes: 0 verified; 1 verification failure (the message names the first field that "
    "disagrees); 2 bad input."
)


def register(app: typer.Typer) -> None:
    app.command("verify", help=HELP)(verify_cmd)


@handle_errors
def verify_cmd(
    record: Annotated[Path | None, typer.Argument(help="Audit record (record.json) to check.")] = None,
    log: Annotated[str | None, typer.Option("--log", help="The trial log the record certifies (file, directory or glob).")] = None,
    seed: Annotated[Path | None, typer.Option("--seed", help="The extractor seed file.")] = None,
    bits: Annotated[Path | None, typer.Option("--bits", help="The output bits file.")] = None,
    pubkey: Annotated[Path | None, typer.Option("--pubkey", help="The operator's Ed25519 public key (KEYFILE.pub).")] = None,
    chain: Annotated[Path | None, typer.Option("--chain", help="Check every record of this beacon chain directory.")] = None,
    scheduler: Annotated[str | None, typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: re-run the extraction's pieces on its workers (needs dicert[cluster]).")] = None,
    as_json: JsonFlag = False,
) -> None:
    from dicert.errors import ParameterError, VerificationError

    if (record is None) == (chain is None):
        raise ParameterError("give either a RECORD file or --chain DIR (not both)")
    if chain is not None and (log or seed or bits):
        raise ParameterError("--log, --seed and --bits apply to a single RECORD, not to --chain")
    try:
        if chain is not None:
            _chain(chain, pubkey, as_json)
        else:
            _record(record, log, seed, bits, pubkey, as_json, scheduler=scheduler or None)
    except VerificationError as exc:
        if as_json:
            emit_json({"verified": False, "field": exc.field, "error": " ".join(str(exc).split())})
        raise


def _record(record, log, seed, bits, pubkey, as_json: bool, scheduler=None) -> None:
    from dicert.verify import verify

    rep = verify(record, log=log, seed=seed, bits=bits, public_key=pubkey, scheduler=scheduler)
    if as_json:
        emit_json({
            "verified": True,
            "record_file": rep.record_file,
            "record_sha256": rep.record_sha256,
            "status": rep.status,
            "output_bits": rep.output_bits,
            "signature": rep.signature,
            "key_fingerprint": rep.key_fingerprint,
            "scope": rep.scope,
            "checked": list(rep.checked),
            "not_checked": list(rep.not_checked),
            "notes": list(rep.notes),
            "message": rep.message,
        })
        return
    rows = [
        ("result", "VERIFIED"),
        ("record status", rep.status),
        ("output bits", rep.output_bits),
        ("record SHA-256", rep.record_sha256),
        ("signature", rep.signature),
        ("scope", rep.scope),
        ("checked", "; ".join(rep.checked)),
    ]
    if rep.not_checked:
        rows.append(("NOT checked", ", ".join(rep.not_checked)))
    for n in rep.notes:
        rows.append(("note", n))
    console = stdout_console()
    console.print(kv_table("dicert verify", rows))
    console.print(rep.message)


def _chain(chain, pubkey, as_json: bool) -> None:
    from dicert.cli._common import to_jsonable
    from dicert.verify import verify_chain

    rep = verify_chain(chain, public_key=pubkey)
    data = to_jsonable(rep)
    if as_json:
        emit_json({"verified": True, "chain": str(chain), "report": data})
        return
    rows = [("result", "CHAIN VERIFIED"), ("chain", str(chain))]
    findings = []
    if isinstance(data, dict):
        findings = data.get("findings") or []
        for k in ("pulses", "first_index", "last_index", "head_sha256", "signed_pulses",
                  "signer_trusted"):
            if k in data:
                rows.append((k.replace("_", " "), str(data[k])))
        for fp in data.get("key_fingerprints") or []:
            rows.append(("signing key", str(fp)))
    for f in findings:
        rows.append((f"{f.get('severity', '')}: {f.get('kind', '')}",
                     f"{f.get('file') or ''} {f.get('message', '')}".strip()))
    console = stdout_console()
    console.print(kv_table("dicert verify --chain", rows))
    if not (isinstance(data, dict) and data.get("signer_trusted")):
        console.print("Signatures were checked against the keys embedded in the records; pass "
                      "--pubkey to check that they are the operator's.")
