"""Certification reports: one self-contained document per audit record (HTML or Markdown).

A report restates what a record certifies, for a paper or a beacon operator's publication:
the job, the data and its digests, the design checks, the CHSH estimate, the acceptance test,
the entropy bounds with their references (and BibTeX entries built from them), the error
budget term by term, the output and seed use, the assumptions verbatim, and figures. Every
number comes from the record; each one is tagged with the record key it came from (a
``data-key`` attribute in HTML, a column in Markdown), so that a reader or a test can trace
it. Bounds are written in the safe direction: lower bounds and certified bits rounded down,
error parameters and p-values in full or rounded up.

Rendering is pure (:func:`render_html`, :func:`render_markdown` take the parsed record and
return text and figures); :func:`write_report` reads the record and writes atomically. The
figures reuse the beacon site's SVG plot (:func:`dicert.beacon.pages.svg_block_plot`) and its
style sheet; the HTML embeds everything (no external resources; a Content-Security-Policy
meta forbids loading any).
"""

from __future__ import annotations

import dataclasses
import json
import os
from pathlib import Path
from typing import Any

from dicert._display import displayed
from dicert._docview import _get, _num, _str
from dicert.reporting.content import EPS_MEANING, FORMATS, Fact, ReportError, bibtex_entries
from dicert.reporting.render import render_html, render_markdown

__all__ = ["EPS_MEANING", "FORMATS", "Fact", "ReportError", "ReportResult", "bibtex_entries",
           "render_html", "render_markdown", "report_format", "write_report"]


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ReportResult:
    """What :func:`write_report` wrote, and the headline numbers."""

    record: str
    out: str
    format: str
    files: tuple[str, ...]
    figures: tuple[str, ...]
    status: str | None
    trials: int | None
    chsh_lower_bound: float | None
    certified_min_entropy_bits: float | None
    output_bits: int | None
    soundness_error: float | None
    record_sha256: str | None

    # Deprecated names of earlier versions (read-only).
    chsh_lower = property(lambda self: self.chsh_lower_bound)
    min_entropy_bits = property(lambda self: self.certified_min_entropy_bits)
    eps_total = property(lambda self: self.soundness_error)

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows: list[tuple[str, object]] = [("out", self.out), ("format", self.format),
                                          ("status", self.status),
                                          ("output_bits", self.output_bits)]
        if full:
            rows += [("figures", len(self.figures)), ("trials", self.trials),
                     ("chsh_lower_bound", self.chsh_lower_bound),
                     ("certified_min_entropy_bits", self.certified_min_entropy_bits),
                     ("soundness_error", self.soundness_error),
                     ("record_sha256", self.record_sha256)]
        return rows



# --------------------------------------------------------------------------- I/O


def report_format(out: str | os.PathLike[str], fmt: str | None) -> str:
    """The output format from ``--format`` and the file extension (checked before any work)."""
    suffix = Path(out).suffix.lower()
    by_ext = next((k for k, exts in FORMATS.items() if suffix in exts), None)
    if fmt is not None:
        if fmt not in FORMATS:
            raise ReportError(f"--format: unsupported format {fmt!r}; use one of "
                              + ", ".join(FORMATS))
        if by_ext is not None and by_ext != fmt:
            raise ReportError(f"{out}: extension {suffix!r} does not match --format {fmt}")
        if by_ext is None:
            raise ReportError(f"{out}: unsupported extension {suffix or '(none)'!r} for --format "
                              f"{fmt}; use " + ", ".join(FORMATS[fmt]))
        return fmt
    if by_ext is None:
        raise ReportError(f"{out}: unsupported extension {suffix or '(none)'!r}; use .html or "
                          ".md (or --format html|md)")
    return by_ext


def _load_record(path: str | os.PathLike[str]) -> dict[str, Any]:
    from dicert._io import read_user_file

    data = read_user_file(path, "record file", ReportError, max_bytes=1 << 30)
    try:
        record = json.loads(data.decode("utf-8"))
    except UnicodeDecodeError:
        raise ReportError(f"{path}: not UTF-8 text; expected a dicert record (JSON)") from None
    except json.JSONDecodeError as exc:
        raise ReportError(f"{path}, line {exc.lineno} column {exc.colno}: not valid JSON "
                          f"({exc.msg}); expected a dicert record") from None
    if not isinstance(record, dict):
        raise ReportError(f"{path}: top level is not a JSON object; expected a dicert record")
    fmt = record.get("format")
    if not (isinstance(fmt, str) and fmt.startswith("dicert-record/")):
        raise ReportError(f"{path}: key 'format' is {fmt!r}, expected 'dicert-record/N'; not a "
                          "dicert record")
    if record.get("kind", "certification") != "certification":
        raise ReportError(f"{path}: key 'kind' is {record.get('kind')!r}; only certification "
                          "records have a report")
    from dicert.stages.record_compat import CURRENT_FORMAT, upgrade_body

    budget = "error_budget" if fmt == CURRENT_FORMAT else "eps"  # its name in that format
    for key in ("status", "log", budget):
        if key not in record:
            raise ReportError(f"{path}: key {key!r} missing; not a certification record")
    return upgrade_body(record)  # records /1 and /2: today's member names


def write_report(record: str | os.PathLike[str], out: str | os.PathLike[str], *,
                 fmt: str | None = None, with_plan: bool = True) -> ReportResult:
    """Render the report of a record file into ``out`` (HTML or Markdown; Markdown figures
    as SVG files next to it, ``<stem>-<figure>.svg``), written as one unit (temporary
    siblings, then renames).

    Raises :class:`ReportError` (exit code 2) for an unsupported format or extension (before
    the record is read) and for a file that is not a certification record.
    """
    import contextlib

    from dicert._io import make_parent, output_errors, write_temp_sibling

    kind = report_format(out, fmt)
    rec = _load_record(record)
    out_path = Path(out)
    figures: list[str] = []
    outputs: list[tuple[Path, bytes]] = []
    if kind == "html":
        outputs.append((out_path, render_html(rec, with_plan=with_plan).encode("utf-8")))
    else:
        text, files = render_markdown(rec, figure_prefix=out_path.stem, with_plan=with_plan)
        for name, svg in files.items():
            outputs.append((out_path.with_name(name), svg.encode("utf-8")))
            figures.append(str(out_path.with_name(name)))
        outputs.append((out_path, text.encode("utf-8")))
    # The files appear together: every temporary sibling first, then the renames (the report
    # last), so a full disk leaves earlier files as they were and no temporary file behind.
    make_parent(out_path)
    temps: list[tuple[Path, Path]] = []
    try:
        for target, data in outputs:
            temps.append((write_temp_sibling(target, data), target))
        for tmp, target in temps:
            with output_errors(target, tmp):
                os.replace(tmp, target)
    except BaseException:
        for tmp, _ in temps:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(tmp)
        raise
    written = [str(t) for t, _ in outputs]
    out_bits = _get(rec, "extractor.output_bits")
    trials = _get(rec, "log.trials")
    return ReportResult(
        record=str(record), out=str(out_path), format=kind, files=tuple(written),
        figures=tuple(figures), status=_str(rec.get("status")),
        trials=trials if isinstance(trials, int) else None,
        chsh_lower_bound=_num(_get(rec, "estimate.chsh_lower_bound")),
        certified_min_entropy_bits=_num(rec.get("certified_min_entropy_bits")),
        output_bits=out_bits if isinstance(out_bits, int) else None,
        soundness_error=_num(rec.get("soundness_error")),
        record_sha256=_str(rec.get("record_sha256")))
