"""``dicert protocols``: list the protocols shipped with the package; copy one out for editing."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, stdout_console

HELP = (
    "List the protocols shipped with dicert (name, method, side information, summary). Any "
    "command's --protocol accepts a shipped name (e.g. --protocol chsh-spotcheck) when no file "
    "of that name exists. A protocol must be fixed BEFORE taking data: copy one with "
    "`dicert protocols copy NAME`, edit the copy, and pass its path."
)


def register(app: typer.Typer) -> None:
    sub = typer.Typer(name="protocols", help=HELP, invoke_without_command=True,
                      add_completion=False, rich_markup_mode=None)
    sub.callback()(list_cmd)
    sub.command("copy", help="Copy a shipped protocol into a directory (default: the working "
                             "directory) for editing; refuses to overwrite unless --force.")(copy_cmd)
    app.add_typer(sub)


@handle_errors
def list_cmd(ctx: typer.Context, as_json: JsonFlag = False) -> None:
    if ctx.invoked_subcommand is not None:
        return
    from dicert.catalog import list_shipped

    items = list_shipped()
    if as_json:
        emit_json([{"name": p.name, "method": p.method, "side_information": p.side_information,
                    "description": p.description, "file": p.file} for p in items])
        return
    from rich.table import Table

    tab = Table(title="shipped protocols (dicert protocols copy NAME)", title_justify="left")
    for col in ("name", "method", "side information", "description"):
        tab.add_column(col, overflow="fold")
    for p in items:
        tab.add_row(p.name, p.method, p.side_information, p.description)
    stdout_console().print(tab)


@handle_errors
def copy_cmd(
    name: Annotated[str, typer.Argument(help="Name of a shipped protocol (see `dicert protocols`).")],
    to: Annotated[Optional[Path], typer.Option("--to", help="Directory to copy into (default: the working directory).")] = None,
    force: Annotated[bool, typer.Option("--force", help="Overwrite an existing file of the same name.")] = False,
    as_json: JsonFlag = False,
) -> None:
    from dicert.catalog import copy_shipped

    dest = copy_shipped(name, to if to is not None else Path("."), force=force)
    if as_json:
        emit_json({"name": name, "copied_to": str(dest)})
        return
    typer.echo(f"copied {name} to {dest}; edit it BEFORE taking data, then pass --protocol {dest}")
