"""``dicert convert``: convert a trial log between formats (streaming)."""

from __future__ import annotations

from typing import Annotated, Optional

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, progress_bar, stdout_console


def register(app: typer.Typer) -> None:
    app.command("convert")(convert_cmd)


@handle_errors
def convert_cmd(
    src: Annotated[Optional[str], typer.Argument(help="Input log: file, directory, glob pattern or log spec (TOML). Omit it with --log-spec.")] = None,
    dest: Annotated[Optional[str], typer.Argument(help="Output file (.csv, .csv.gz, .btl, .npz).")] = None,
    fmt: Annotated[Optional[str], typer.Option("--format", help="Output format (csv, csv.gz, binary, npz); default from the extension.")] = None,
    in_fmt: Annotated[Optional[str], typer.Option("--in-format", help="Force the input format (csv, binary, npz, parquet, hdf5).")] = None,
    log_spec: Annotated[Optional[str], typer.Option("--log-spec", help="Log spec (TOML) describing the run (station files joined by trial key, columns, value maps); the joined log is written to DEST.")] = None,
    as_json: JsonFlag = False,
) -> None:
    """Convert a trial log between CSV, the binary format and npz. The output is written to a
    temporary file and renamed, so a failure leaves nothing behind."""
    from dicert.errors import ParameterError
    from dicert.logs import convert_log, format_from_name
    from dicert.logspec import choose_source

    if log_spec is not None and dest is None:
        src, dest = None, src
    if dest is None:
        raise ParameterError("give the input log and the output file (SRC DEST), or "
                             "--log-spec FILE DEST")
    src = choose_source(src, log_spec, "SRC")

    out_fmt = format_from_name(dest, fmt)
    with progress_bar() as bar:
        task = bar.add_task("converting", total=None)
        n = convert_log(src, dest, format=fmt, in_format=in_fmt,
                        progress=lambda d, t: bar.update(task, completed=d, total=t))
    if as_json:
        emit_json({"source": src, "output": dest, "format": out_fmt, "trials": n})
    else:
        stdout_console().print(f"wrote {n:,} trials to {dest} ({out_fmt})")
