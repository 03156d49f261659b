"""Log sources: format detection, multi-file resolution (directories, globs) and input identity.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import errno
import glob as _glob
import hashlib
import os
import stat
from collections.abc import Iterable, Mapping
from pathlib import Path
from typing import Any

from dicert.errors import LogFormatError, ParameterError

from dicert.logs._model import BINARY_MAGIC, _LOG_SUFFIXES, _os_cause, _read_error


# --------------------------------------------------------------------------------------------
# Locating and opening logs
# --------------------------------------------------------------------------------------------


def detect_format(path: str | os.PathLike[str]) -> str:
    """Format of a log file from its extension, or from its first bytes if the extension is unknown."""
    name = str(path).lower()
    if name.endswith(".btl"):
        return "binary"
    if name.endswith(".npz"):
        return "npz"
    if name.endswith((".csv", ".csv.gz", ".txt", ".txt.gz", ".tsv")):
        return "csv"
    try:
        with open(path, "rb") as fh:
            head = fh.read(8)
    except FileNotFoundError:
        raise LogFormatError(path, "", "no such file") from None
    except IsADirectoryError:
        raise LogFormatError(path, "", "is a directory, not a log file") from None
    except OSError as exc:
        raise _read_error(path, exc) from None
    if head == BINARY_MAGIC:
        return "binary"
    if head[:4] == b"PK\x03\x04":
        return "npz"
    return "csv"


def format_from_name(path: str | os.PathLike[str], explicit: str | None = None) -> str:
    """Output format from an explicit choice or the file extension (for writers)."""
    if explicit is not None:
        fmt = {"csv": "csv", "csv.gz": "csv", "binary": "binary", "btl": "binary", "npz": "npz"}.get(
            explicit.lower()
        )
        if fmt is None:
            raise ParameterError(f"unknown log format {explicit!r}; choose csv, binary or npz")
        return fmt
    name = str(path).lower()
    if name.endswith(".btl"):
        return "binary"
    if name.endswith(".npz"):
        return "npz"
    if name.endswith((".csv", ".csv.gz", ".txt", ".txt.gz")):
        return "csv"
    raise ParameterError(
        f"{path}: cannot tell the log format from the extension; use .csv, .csv.gz, .btl or .npz, "
        "or pass --format"
    )


def resolve_sources(source: str | os.PathLike[str] | Iterable[str | os.PathLike[str]]) -> list[Path]:
    """The files of a log: a file, a directory (sorted log files) or a glob pattern (sorted)."""
    if not isinstance(source, (str, os.PathLike)):
        paths = [Path(p) for p in source]
        if not paths:
            raise ParameterError("no log files given")
        return paths
    p = Path(source)
    try:
        if p.is_dir():
            files = sorted(
                q for q in p.iterdir() if q.name.lower().endswith(_LOG_SUFFIXES) and _is_member(q)
            )
            if not files:
                raise LogFormatError(p, "", "directory holds no log files (.csv, .csv.gz, .btl, .npz)")
            return files
        if p.exists():
            return [p]
        if any(ch in str(source) for ch in "*?["):
            files = sorted(Path(q) for q in _glob.glob(str(source)) if _is_member(Path(q)))
            if not files:
                _check_glob_base(str(source))
                raise LogFormatError(source, "", "no file matches this pattern")
            return files
    except OSError as exc:
        raise LogFormatError(exc.filename or source, "", _os_cause(exc, "cannot access")) from None
    raise LogFormatError(p, "", "no such file")


def _is_member(q: Path) -> bool:
    """Whether a directory entry or glob match is a part of the log. A part that cannot be
    read (broken symbolic link, link loop, no permission) is an error, never skipped: the rest
    of the log must not be certified as if it were the whole."""
    try:
        st = os.stat(q)
    except FileNotFoundError:
        if os.path.islink(q):
            raise LogFormatError(q, "", "broken symbolic link (its target does not exist); a "
                                 "part of the log cannot be read") from None
        raise LogFormatError(q, "", "disappeared while the log was being listed") from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise LogFormatError(q, "", "symbolic link loop; a part of the log cannot be "
                                 "read") from None
        raise LogFormatError(q, "", _os_cause(exc, "cannot access")) from None
    return not stat.S_ISDIR(st.st_mode)


def _check_glob_base(pattern: str) -> None:
    """A glob whose fixed leading directory cannot be listed matches nothing silently; say why."""
    parts = Path(pattern).parts
    fixed = [part for part in parts[: next(i for i, q in enumerate(parts) if _glob.has_magic(q))]]
    base = Path(*fixed) if fixed else Path(".")
    try:
        os.listdir(base)
    except FileNotFoundError:
        return
    except OSError as exc:
        raise LogFormatError(base, "", _os_cause(exc, "cannot list the directory of the "
                                                 "pattern")) from None


def input_identity_problems(files: Iterable[Any], formats: Iterable[str] | None = None,
                            digests: Iterable[str | None] | None = None) -> list[str]:
    """Reasons why a multi-file log looks like it holds the same data twice or mixes sources.

    Flags a file next to its own ``.gz`` copy (``run.csv`` and ``run.csv.gz``), files of
    different formats in one log, and (given the per-file ``digests``) files of equal content.
    Returns an empty list for a clean log; callers refuse the log unless the user explicitly
    allows it.
    """
    paths = [Path(f) for f in files]
    out: list[str] = []
    names = {(p.parent, p.name.lower()) for p in paths}
    for p in paths:
        low = p.name.lower()
        if low.endswith(".gz") and (p.parent, low[:-3]) in names:
            out.append(f"{p} is a compressed copy of {p.with_name(p.name[:-3])}, which is also "
                       "part of the log")
    if formats is not None:
        fm = list(formats)
        if len(set(fm)) > 1:
            kinds = ", ".join(f"{q.name} ({f})" for q, f in zip(paths, fm))
            out.append(f"the log mixes file formats: {kinds}")
    if digests is not None:
        seen: dict[str, Path] = {}
        for p, d in zip(paths, digests):
            if d is None:
                continue
            if d in seen:
                out.append(f"{p} has the same content (SHA-256 {d}) as {seen[d]}")
            else:
                seen[d] = p
    return out


def files_digest(entries: Iterable[Mapping[str, Any]]) -> str:
    """Digest of a multi-file log: SHA-256 of the RFC 8785 canonical JSON of its files list.

    ``entries`` are ``{"name": file name, "bytes": size, "sha256": hex SHA-256 of the file}``
    in read order; the list is canonicalised (RFC 8785: keys sorted, no whitespace) and
    hashed. Each file's digest can be computed independently (in parallel), then combined
    here. A single-file log uses the file's own SHA-256 instead.
    """
    from dicert.audit.canonical import canonicalize

    items = [{"name": str(e["name"]), "bytes": int(e["bytes"]), "sha256": str(e["sha256"])}
             for e in entries]
    return hashlib.sha256(canonicalize(items)).hexdigest()
