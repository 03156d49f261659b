"""``dicert convert``: convert a trial log between formats (streaming)."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, progress_bar, stdout_console


def register(app: typer.Typer) -> None:
    app.command("convert")(convert_cmd)


@handle_errors
def convert_cmd(
    src: Annotated[str, typer.Argument(help="Input log: file, directory or glob pattern.")],
    dest: Annotated[str, typer.Argument(help="Output file (.csv, .csv.gz, .btl, .npz).")],
    fmt: Annotated[Optional[str], typer.Option("--format", help="Output format (csv, csv.gz, binary, npz); default from the extension.")] = None,
    in_fmt: Annotated[Optional[str], typer.Option("--in-format", help="Force the input format.")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Convert a trial log between CSV, the binary format and npz. The output is written to a
    temporary file and renamed, so a failure leaves nothing behind."""
    from dicert.logs import convert_log, format_from_name

    out_fmt = format_from_name(dest, fmt)
    with progress_bar() as bar:
        task = bar.add_task("converting", total=None)
        n = convert_log(src, dest, format=fmt, in_format=in_fmt,
                        progress=lambda d, t: bar.update(task, completed=d, total=t))
    if as_json:
        emit_json({"source": src, "output": dest, "format": out_fmt, "trials": n})
    else:
        stdout_console().print(f"wrote {n:,} trials to {dest} ({out_fmt})")
