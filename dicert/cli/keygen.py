"""``dicert keygen``: make an Ed25519 key pair for signing audit records."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, kv_table, stdout_console


@handle_errors
def keygen(
    out: Annotated[
        Path,
        typer.Option("--out", help="Private key file to write; the public key goes to OUT.pub."),
    ],
    force: Annotated[
        bool, typer.Option("--force", help="Overwrite existing key files.")
    ] = False,
    json_out: JsonFlag = False,
) -> None:
    """Make an Ed25519 key pair for signing audit records.

    The private key (PEM, PKCS#8, unencrypted) is written with mode 0600; keep it secret and
    give verifiers the public key (OUT.pub). The fingerprint is the SHA-256 of the raw public
    key, as recorded in every signed record.
    """
    from dicert.audit.signing import write_keypair

    files = write_keypair(out, force=force)
    if json_out:
        emit_json(
            {
                "private_key_file": files.private_key_file,
                "public_key_file": files.public_key_file,
                "key_fingerprint": files.fingerprint,
            }
        )
        return
    console = stdout_console()
    console.print(
        kv_table(
            "Ed25519 key pair",
            [
                ("private key", files.private_key_file),
                ("public key", files.public_key_file),
                ("key fingerprint", files.fingerprint),
            ],
        )
    )
    console.print("Keep the private key secret; share the .pub file with verifiers.")


def register(app: typer.Typer) -> None:
    """Add the ``keygen`` command to the dicert app."""
    app.command("keygen")(keygen)
