"""``dicert report``: a certification report (HTML or Markdown with figures) from a record."""

from __future__ import annotations

from pathlib import Path
from typing import Annotated

import typer

from dicert.cli._common import JsonFlag, emit_json, handle_errors, stdout_console


@handle_errors
def report(
    record: Annotated[Path, typer.Argument(help="The audit record (record.json or a chain "
                                                "pulse-NNNNNN.json).")],
    out: Annotated[Path, typer.Option("--out", help="Report file to write: .html (one "
                                      "self-contained page) or .md (figures as .svg files "
                                      "next to it).")],
    fmt: Annotated[
        str | None,
        typer.Option("--format", help="html or md (default: from the extension of --out)."),
    ] = None,
    no_plan: Annotated[
        bool, typer.Option("--no-plan", help="Leave out the planner figure (skips the planner "
                           "run, which takes a second or more).")
    ] = False,
    json_out: JsonFlag = False,
) -> None:
    """Write a report of a certification record that a paper can cite or a beacon operator
    can publish: the job, the data and digests, the design checks, the CHSH estimate, the
    acceptance test, the entropy bounds with references (BibTeX), the error budget term by
    term, the output and seed use, the assumptions verbatim, and figures.

    Every number comes from the record (bounds rounded in the safe direction). The report
    does not verify the record: run `dicert verify` with a trusted key for that.
    """
    from dicert.reporting import report_format, write_report

    report_format(out, fmt)  # an unsupported format or extension fails before any work
    result = write_report(record, out, fmt=fmt, with_plan=not no_plan)
    if json_out:
        emit_json(result)
        return
    from rich.table import Table

    from dicert._docview import _down

    table = Table(title="certification report", show_header=False, title_justify="left")
    table.add_column("quantity", style="bold", no_wrap=True)
    table.add_column("value", overflow="fold")
    rows = [
        ("report", result.out),
        ("format", result.format),
        ("figures", ", ".join(result.figures) or ("embedded" if result.format == "html"
                                                   else "none")),
        ("status", result.status or "-"),
        ("trials", str(result.trials) if result.trials is not None else "-"),
        ("CHSH lower bound (rounded down)", _down(result.chsh_lower_bound, 6)),
        ("certified min-entropy, bits (rounded down)",
         _down(result.certified_min_entropy_bits, 3)),
        ("output bits", str(result.output_bits) if result.output_bits is not None else "-"),
        ("soundness error", repr(result.soundness_error)
         if result.soundness_error is not None else "-"),
        ("record", result.record_sha256 or "-"),
    ]
    for row in rows:
        table.add_row(*row)
    stdout_console().print(table)


def register(app: typer.Typer) -> None:
    """Add the ``report`` command to the dicert app."""
    app.command("report")(report)
