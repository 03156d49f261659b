"""``dicert verify``: re-check an audit record (and its inputs), or a whole beacon chain."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import (
    JsonFlag,
    emit_json,
    handle_errors,
    stdout_console,
)

HELP = (
    "Re-check an audit record: signature and internal consistency (every derived number is "
    "recomputed from the recorded counts and protocol); the bits file the record names (next "
    "to it) is checked by default, or the one given with --bits; with --log and --seed every "
    "number is re-derived from the raw inputs and the extraction re-run.\n\n"
    "Trust: a record is authenticated only when it is signed by a key you trust: --pubkey "
    "(the operator's public key) or --trusted-keys (a TOML file of keys with optional pulse "
    "or time ranges, for key rotation). Otherwise, or for an unsigned record, the result is "
    "INTEGRITY-ONLY: the record is intact, but who made it is not established.\n\n"
    "Result words: VERIFIED (authenticated, log, seed and bits all checked); "
    "VERIFIED-PARTIAL (authenticated, something not checked: listed); INTEGRITY-ONLY (not "
    "authenticated). --strict makes anything not established a failure.\n\n"
    "With --chain DIR: check a beacon chain in one pass (signatures against the trusted keys, "
    "links, gaps, reordering, forks, reuse of an extractor seed or a log, key changes the "
    "trusted keys do not allow, protocol changes without a signed declaration; with --head, "
    "truncation of the newest pulses). Each of these is a failure.\n\n"
    "Exit codes: 0 verified; 1 verification failure (the message names the first field that "
    "disagrees); 2 bad input; 4 integrity checked but authenticity NOT established (no trusted "
    "key given, or unsigned)."
)


def register(app: typer.Typer) -> None:
    app.command("verify", help=HELP)(verify_cmd)


@handle_errors
def verify_cmd(
    record: Annotated[Path | None, typer.Argument(help="Audit record (record.json) to check.")] = None,
    log: Annotated[str | None, typer.Option("--log", help="The trial log the record certifies (file, directory or glob).")] = None,
    seed: Annotated[Path | None, typer.Option("--seed", help="The extractor seed file.")] = None,
    bits: Annotated[Path | None, typer.Option("--bits", help="The output bits file [default: the file the record names, next to it].")] = None,
    pubkey: Annotated[Path | None, typer.Option("--pubkey", help="The operator's Ed25519 public key (KEYFILE.pub), trusted for every record.")] = None,
    trusted_keys: Annotated[Path | None, typer.Option("--trusted-keys", help="TOML file of trusted public keys with optional pulse/time ranges (key rotation).")] = None,
    chain: Annotated[Path | None, typer.Option("--chain", help="Check every record of this beacon chain directory.")] = None,
    head: Annotated[str | None, typer.Option("--head", metavar="SHA256", help="With --chain: the published head digest; a chain without it was truncated.")] = None,
    log_spec: Annotated[Path | None, typer.Option("--log-spec", help="The log spec the record was certified with (instead of --log); the join is re-run.")] = None,
    strict: Annotated[bool, typer.Option("--strict", help="Fail (exit 1) unless authenticated and every artifact was checked.")] = False,
    scheduler: Annotated[str | None, typer.Option("--scheduler", envvar="DICERT_SCHEDULER", help="dask.distributed scheduler address: re-run the extraction's pieces on its workers (needs dicert[cluster]).")] = None,
    as_json: JsonFlag = False,
) -> None:
    import re

    from dicert.errors import ParameterError, VerificationError

    if log_spec is not None:
        from dicert.logspec import choose_source

        log = choose_source(log, log_spec, "--log")
    if (record is None) == (chain is None):
        raise ParameterError("give either a RECORD file or --chain DIR (not both)")
    if chain is not None and (log or seed or bits):
        raise ParameterError("--log, --seed and --bits apply to a single RECORD, not to --chain")
    if head is not None:
        if chain is None:
            raise ParameterError("--head applies only with --chain")
        if not re.fullmatch(r"[0-9a-f]{64}", head):
            raise ParameterError(f"--head: expected 64 lower-case hex digits, got {head!r}")
    try:
        if chain is not None:
            code = _chain(chain, pubkey, trusted_keys, head, strict, as_json)
        else:
            code = _record(record, log, seed, bits, pubkey, trusted_keys, strict, as_json,
                           scheduler=scheduler or None)
    except VerificationError as exc:
        if as_json:
            emit_json({"verified": False, "result": "FAILED", "authenticated": False,
                       "field": exc.field, "message": " ".join(str(exc).split()),
                       "exit_code": 1})
        raise
    if code:
        raise typer.Exit(code=code)


def _record(record, log, seed, bits, pubkey, trusted_keys, strict, as_json: bool,
            scheduler=None) -> int:
    from dicert.verification import verify

    rep = verify(record, log=log, seed=seed, bits=bits, public_key=pubkey,
                 trusted_keys=trusted_keys, strict=strict, scheduler=scheduler)
    from dicert.cli._rows import Row, record_json, record_rows, render, to_json

    rec = _read_record(rep.record_file)
    rows = [Row("result", "result", rep.result),
            Row("authenticity", "authenticated", rep.authenticated, "flag",
                note="established by a trusted key" if rep.authenticated
                else "no trusted key given, or unsigned"),
            Row("verification scope", "scope", rep.scope)]
    rows += [r for r in record_rows(rec) if r.key != "key_fingerprint"]
    rows += [Row("signature", "signature", rep.signature),
             Row("key fingerprint", "key_fingerprint", rep.key_fingerprint, "digest",
                 record="signature.key_fingerprint"),
             Row("record file", "record_file", rep.record_file),
             Row("checked", None, "; ".join(rep.checked))]
    if rep.bits_file:
        rows.append(Row("bits file", "bits_file", rep.bits_file))
    if rep.not_checked:
        rows.append(Row("NOT checked", None, ", ".join(rep.not_checked)))
    for n in rep.notes:
        rows.append(Row("note", None, n))
    if as_json:
        emit_json(to_json(rows, {
            **record_json(rec, rows),
            "verified": rep.authenticated,
            "exit_code": rep.exit_code,
            "record_format": rec.get("format"),
            "checked": list(rep.checked),
            "not_checked": list(rep.not_checked),
            "notes": list(rep.notes),
            "message": rep.message,
            "bits_file": rep.bits_file,
        }))
        return rep.exit_code
    console = stdout_console()
    render(console, "dicert verify", rows)
    console.print(rep.message, highlight=False)
    return rep.exit_code


def _read_record(path) -> dict:
    """The verified record, under today's member names (records of earlier formats too)."""
    import json

    from dicert.stages.record_compat import upgrade_body

    with open(path, "rb") as fh:
        return upgrade_body(json.loads(fh.read().decode("utf-8")))


def _chain(chain, pubkey, trusted_keys, head, strict, as_json: bool) -> int:
    from dicert.cli._common import to_jsonable
    from dicert.verification import EXIT_NOT_AUTHENTICATED, verify_chain

    rep = verify_chain(chain, public_key=pubkey, trusted_keys=trusted_keys, head=head,
                       strict=strict)
    code = 0 if rep.authenticated else EXIT_NOT_AUTHENTICATED
    data = to_jsonable(rep)
    if as_json:
        emit_json({"verified": rep.authenticated, "result": rep.result,
                   "authenticated": rep.authenticated, "exit_code": code, "chain": str(chain),
                   "head_sha256": rep.head_sha256, "report": data})
        return code
    from dicert.cli._rows import Row, render

    rows = [Row("result", "result", rep.result), Row("chain", "chain", str(chain)),
            Row("pulses", "report.pulses", data["pulses"], "count"),
            Row("first index", "report.first_index", data["first_index"], "count"),
            Row("last index", "report.last_index", data["last_index"], "count"),
            Row("head SHA-256", "head_sha256", data["head_sha256"], "digest"),
            Row("signed pulses", "report.signed_pulses", data["signed_pulses"], "count"),
            Row("signer trusted", "report.signer_trusted", data["signer_trusted"], "flag")]
    if head is not None:
        rows.append(Row("published head", None, f"pulse {rep.head_pulse}"))
    for i, fp in enumerate(data.get("key_fingerprints") or []):
        rows.append(Row("key fingerprint", f"report.key_fingerprints.{i}", fp, "digest"))
    for f in data.get("findings") or []:
        rows.append(Row(f"{f.get('severity', '')}: {f.get('kind', '')}", None,
                        f"{f.get('file') or ''} {f.get('message', '')}".strip()))
    console = stdout_console()
    render(console, "dicert verify --chain", rows)
    if not rep.authenticated:
        console.print("Integrity checked, authenticity NOT established: signatures were "
                      "checked against the keys embedded in the records; pass --pubkey or "
                      "--trusted-keys to check that they are the operator's.")
    if head is None:
        console.print("No --head given: removal of the newest pulses cannot be detected.")
    return code
