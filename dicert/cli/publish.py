"""``dicert publish``: turn a beacon chain folder into a static web site with in-browser checks."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, stdout_console


@handle_errors
def publish(
    chain_dir: Annotated[Path, typer.Argument(help="The beacon chain folder (pulse-NNNNNN.json).")],
    out: Annotated[
        Path,
        typer.Option("--out", help="Site folder to write: new, empty, or an earlier site built by "
                     "this command (replaced as a whole)."),
    ],
    pubkey: Annotated[
        Path | None,
        typer.Option("--pubkey", help="The operator's Ed25519 public key (PEM or 64 hex digits): "
                     "every pulse must verify under it; it is published so the pages can check "
                     "the signatures."),
    ] = None,
    title: Annotated[
        str | None, typer.Option("--title", help="Heading of the pages.")
    ] = None,
    json_out: JsonFlag = False,
) -> None:
    """Build a static beacon site from a chain: an index of pulses, one page per pulse, the
    records as published JSON, a manifest, the operator's public key, and a script that checks
    the hash chain and the Ed25519 signatures in the visitor's browser.

    The chain is verified first (against --pubkey when given); a chain that does not verify is
    not published (exit 1). Serve the folder from any web server. The browser checks are a
    convenience; `dicert verify --chain SITE/chain --pubkey KEY` with a trusted key is the
    authoritative check.
    """
    from dicert.beacon.build import build_site

    result = build_site(chain_dir, out, public_key=pubkey, title=title)
    if json_out:
        emit_json(result)
        return
    from rich.table import Table

    console = stdout_console()
    table = Table(title="beacon site", show_header=False, title_justify="left")
    table.add_column("quantity", style="bold", no_wrap=True)
    table.add_column("value", overflow="fold")
    for row in ([
        ("site folder", result.site_dir),
        ("pulses", str(result.pulses)),
        ("head", f"pulse {result.head_index}: {result.head_sha256}"),
        ("operator key", result.key_fingerprint or "none published (signatures not checkable)"),
        ("files", str(result.files)),
        ("replaced an earlier site", "yes" if result.replaced else "no"),
    ]):
        table.add_row(*row)
    console.print(table)
    for w in result.warnings:
        console.print(f"warning: {w}", highlight=False, markup=False)
    console.print(f"Open {result.index_file} through a web server (browsers do not run the "
                  "checks on file:// pages), e.g. python3 -m http.server --bind 127.0.0.1 "
                  f"--directory {result.site_dir}", highlight=False, markup=False, soft_wrap=True)


def register(app: typer.Typer) -> None:
    """Add the ``publish`` command to the dicert app."""
    app.command("publish")(publish)
