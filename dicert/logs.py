"""Trial logs: reading, validating, streaming, counting, writing and converting.

This module and :mod:`dicert.audit` are the only places that touch files; every later stage
takes arrays or counts.

Supported formats (see the README, section "Trial-log formats", for the contract):

``csv``
    Text with a header row naming the columns. Required ``x,y,a,b`` (settings and outcomes,
    each 0 or 1); optional ``t`` (1 = test round, 0 = generation round); other columns (for
    example timestamps) are allowed and ignored. Lines starting with ``#`` are comments; blank
    lines are skipped. ``.gz`` files are decompressed transparently.
``binary`` (extension ``.btl``, "binary trial log")
    Our compact format, one byte per trial, specified byte by byte in
    ``protocols/binary-trial-log.md`` and in :class:`BinaryLogWriter`.
``npz``
    NumPy archive with integer or boolean arrays ``x, y, a, b`` and optionally ``t``.

A log may be one file, a directory (its log files in sorted name order) or a glob pattern
(sorted); such a multi-file log is one run.

Every reader treats its file as hostile: :class:`ReadLimits` (line length, columns,
compression ratio, npz size) are checked before memory is spent, and every failure, including
I/O errors and a part of a directory log that cannot be read, is one
:class:`~dicert.errors.LogFormatError` naming the file.

Every trial is coded in one byte, ``code = (t<<4) | (x<<3) | (y<<2) | (a<<1) | b``. Logs without
a ``t`` column carry t = 0 in the code but *every* trial is a test round; :func:`summarize_log`
therefore files their counts under t = 1.
"""

from __future__ import annotations

import concurrent.futures
import contextlib
import contextvars
import dataclasses
import errno
import functools
import glob as _glob
import gzip
import hashlib
import io
import os
import stat
import struct
import zipfile
import zlib
from collections.abc import Callable, Iterable, Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert._display import displayed
from dicert._io import atomic_writer, output_errors
from dicert.errors import LogFormatError, ParameterError

BIT_B, BIT_A, BIT_Y, BIT_X, BIT_T = 1, 2, 4, 8, 16
FORMATS = ("csv", "binary", "npz")

#: Magic bytes opening a binary trial log (8 bytes; the high first byte and CR LF SUB LF catch
#: text-mode transfers, as in PNG).
BINARY_MAGIC = b"\x8bDTL\r\n\x1a\n"
BINARY_VERSION = 1
BINARY_HEADER = struct.Struct("<8sBB6sQ")  # magic, version, flags, reserved, trial count
BINARY_HEADER_SIZE = BINARY_HEADER.size  # 24
#: Trial count value meaning "not known when the header was written; see the trailer".
COUNT_STREAMED = 0xFFFF_FFFF_FFFF_FFFF
#: First byte of the trailer of a streamed file (reserved bits set: never a valid trial).
TRAILER_MARK = 0xFF
TRAILER = struct.Struct("<BQ")  # mark, trial count
FLAG_HAS_T = 0x01

DEFAULT_CHUNK_TRIALS = 1 << 24
DEFAULT_BLOCK_TRIALS = 1 << 20

_LOG_SUFFIXES = (".csv", ".csv.gz", ".txt", ".txt.gz", ".btl", ".npz")


# --------------------------------------------------------------------------------------------
# Resource limits of the readers
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ReadLimits:
    """Resource limits every reader checks before it spends the memory or time.

    Logs may come from other institutions, so a hostile file must end in a one-line
    :class:`~dicert.errors.LogFormatError` (exit code 2), never in a hang or an exhausted
    machine. Override them with :func:`read_limits` (library), the ``limits`` keyword of
    :func:`open_log`, or the environment variable ``DICERT_READ_LIMITS``
    (``"max_line_bytes=4194304,max_compression_ratio=1000"``; the CLI reads it).

    Attributes
    ----------
    max_line_bytes : int
        Longest line of a text log (header, comment or trial line, newline included).
        Checked while reading in bounded blocks, so a file without newlines costs at most
        this much memory.
    max_columns : int
        Most columns in the header row.
    max_compression_ratio : float
        Largest ratio of decompressed to compressed bytes (gzip-compressed text logs: checked
        as the data are decompressed; npz: from the archive directory, before reading),
        applied once more than ``ratio_grace_bytes`` have been (or would be) decompressed.
        Trial logs with random outcomes compress about 5-40 times; a deflate bomb about 1000.
    ratio_grace_bytes : int
        Decompressed size below which the ratio is not checked (small, regular test logs
        compress far better than real ones).
    max_npz_bytes : int
        Largest npz file (it is read into memory once, so that its digest covers exactly the
        bytes analysed; its arrays are then decoded in chunks). Convert larger logs to the
        binary format (``dicert convert``), which streams.
    max_npy_header_bytes : int
        Largest ``.npy`` member header (numpy's own default limit is 10000).
    """

    max_line_bytes: int = 1 << 20
    max_columns: int = 4096
    max_compression_ratio: float = 200.0
    ratio_grace_bytes: int = 64 << 20
    max_npz_bytes: int = 1 << 30
    max_npy_header_bytes: int = 10000

    def __post_init__(self) -> None:
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not v > 0:
                raise ParameterError(f"read limit {f.name} must be a positive number, got {v!r}")


_READ_LIMITS: contextvars.ContextVar[ReadLimits | None] = contextvars.ContextVar(
    "dicert_read_limits", default=None
)
LIMITS_ENV = "DICERT_READ_LIMITS"


def _limits_from_env() -> ReadLimits:
    text = os.environ.get(LIMITS_ENV, "").strip()
    if not text:
        return ReadLimits()
    names = [f.name for f in dataclasses.fields(ReadLimits)]
    values: dict[str, float | int] = {}
    for item in text.split(","):
        key, sep, val = item.partition("=")
        key = key.strip()
        if not sep or key not in names:
            raise ParameterError(f"{LIMITS_ENV}: expected NAME=VALUE items separated by commas "
                                 f"with NAME one of {', '.join(names)}; got {item.strip()!r}")
        try:
            num = float(val) if key == "max_compression_ratio" else int(float(val))
        except (ValueError, OverflowError):
            raise ParameterError(f"{LIMITS_ENV}: {key} must be a number, "
                                 f"got {val.strip()!r}") from None
        values[key] = num
    return ReadLimits(**values)


def current_read_limits() -> ReadLimits:
    """The limits in force: those of the innermost :func:`read_limits`, else the environment's
    ``DICERT_READ_LIMITS``, else the defaults of :class:`ReadLimits`."""
    lim = _READ_LIMITS.get()
    return lim if lim is not None else _limits_from_env()


@contextlib.contextmanager
def read_limits(**overrides: float) -> Iterator[ReadLimits]:
    """Raise (or lower) reader limits for the calls inside the ``with`` block.

    Example: ``with read_limits(max_line_bytes=16 << 20): certify(...)``.
    """
    lim = dataclasses.replace(current_read_limits(), **overrides)
    token = _READ_LIMITS.set(lim)
    try:
        yield lim
    finally:
        _READ_LIMITS.reset(token)


def _read_error(path, exc: BaseException, where: str = "") -> LogFormatError:
    """One-line LogFormatError for an exception raised while reading ``path``."""
    if isinstance(exc, LogFormatError):
        return exc
    text = " ".join(str(exc).split())[:200]
    if isinstance(exc, OSError) and exc.strerror:
        return LogFormatError(path, where, _os_cause(exc, "cannot read"))
    if isinstance(exc, zipfile.BadZipFile):
        return LogFormatError(path, where, f"not a valid .npz archive ({text})")
    if isinstance(exc, zlib.error):
        return LogFormatError(path, where, f"corrupt compressed data ({text})")
    if isinstance(exc, EOFError):
        return LogFormatError(path, where, "truncated compressed data")
    return LogFormatError(path, where, f"cannot read ({type(exc).__name__}: {text})")


#: What a reader can raise on a corrupt, truncated or unreadable file (mapped by _read_error).
_READ_FAILURES = (OSError, EOFError, zlib.error, zipfile.BadZipFile, gzip.BadGzipFile)


# --------------------------------------------------------------------------------------------
# In-memory representations
# --------------------------------------------------------------------------------------------


def _check_bits(values: Any, name: str) -> None:
    """Raise ParameterError naming the column and the first value outside {0, 1}."""
    arr = np.asarray(values)
    if arr.size == 0:
        return
    if arr.dtype == np.bool_:
        return
    if arr.dtype.kind == "u":
        bad = arr > 1
    else:
        try:
            bad = ~((arr == 0) | (arr == 1))
        except (TypeError, ValueError):
            raise ParameterError(f"TrialArrays: column {name!r} must hold 0/1 values") from None
        bad = np.asarray(bad, dtype=bool)
    if bad.any():
        i = int(np.flatnonzero(bad.ravel())[0])
        v = arr.ravel()[i]
        v = v.item() if hasattr(v, "item") else v
        raise ParameterError(f"TrialArrays: column {name!r} holds {v!r} at index "
                             f"{i}; every value must be 0 or 1")


class _Codes(np.ndarray):
    """Trial codes that can also be called: ``arrays.codes()`` (the earlier method form) works."""

    def __call__(self) -> np.ndarray:
        return self.view(np.ndarray)


_COLUMNS = ("x", "y", "a", "b", "t")


@dataclasses.dataclass(frozen=True, slots=True, eq=False)
class TrialArrays:
    """Per-trial settings and outcomes held in memory (uint8 arrays of equal length).

    ``t`` is ``None`` when the log has no test-round column (every trial is then a test round).
    Columns may be given as any 0/1 sequences (lists, bool or int arrays); values are checked
    (a ParameterError names the column and index) and non-array inputs become uint8 arrays.
    ``codes`` holds the one-byte trial codes (see :meth:`from_mapping` for dict input).
    """

    x: np.ndarray
    y: np.ndarray
    a: np.ndarray
    b: np.ndarray
    t: np.ndarray | None = None

    def __post_init__(self) -> None:
        n = len(self.x)
        for name in ("y", "a", "b") + (("t",) if self.t is not None else ()):
            if len(getattr(self, name)) != n:
                raise ParameterError(f"TrialArrays: column {name!r} has a different length")
        self.validate()
        for name in _COLUMNS:
            v = getattr(self, name)
            if v is not None and not isinstance(v, np.ndarray):
                object.__setattr__(self, name, np.asarray(v).astype(np.uint8))

    def validate(self) -> None:
        """Raise ParameterError naming the column and value if any value is outside {0, 1}."""
        for name in ("x", "y", "a", "b") + (("t",) if self.t is not None else ()):
            _check_bits(getattr(self, name), name)

    def __len__(self) -> int:
        return len(self.x)

    @property
    def has_test_flag(self) -> bool:
        return self.t is not None

    def __repr__(self) -> str:
        return f"TrialArrays(trials={len(self)}, has_test_flag={self.has_test_flag})"

    @property
    def codes(self) -> np.ndarray:
        """The one-byte trial codes ``(t<<4)|(x<<3)|(y<<2)|(a<<1)|b`` (uint8 array).

        An attribute like ``x, y, a, b, t``; calling it (``arrays.codes()``, the earlier
        method form) returns the same array.
        """
        return self._codes().view(_Codes)

    def _codes(self) -> np.ndarray:
        c = (
            (np.asarray(self.x, np.uint8) << 3)
            | (np.asarray(self.y, np.uint8) << 2)
            | (np.asarray(self.a, np.uint8) << 1)
            | np.asarray(self.b, np.uint8)
        )
        if self.t is not None:
            c |= np.asarray(self.t, np.uint8) << 4
        return c.astype(np.uint8, copy=False)

    @classmethod
    def from_mapping(cls, columns: Any, where: str = "TrialArrays") -> TrialArrays:
        """Build from a mapping of columns (a dict, or a table with ``keys()`` such as a
        DataFrame): keys ``x, y, a, b`` and optionally ``t``, each a 0/1 sequence."""
        keys = [str(k) for k in columns.keys()]
        unknown = [k for k in keys if k not in _COLUMNS]
        missing = [k for k in _COLUMNS[:4] if k not in keys]
        if unknown or missing:
            what = (f"unknown column {unknown[0]!r}" if unknown
                    else f"missing column {missing[0]!r}")
            raise ParameterError(f"{where}: {what}; expected columns x, y, a, b and optionally t")
        return cls(**{k: columns[k] for k in _COLUMNS if k in keys})

    @classmethod
    def from_codes(cls, codes: np.ndarray, has_test_flag: bool) -> TrialArrays:
        codes = np.asarray(codes, dtype=np.uint8)
        return cls(
            x=(codes >> 3) & 1,
            y=(codes >> 2) & 1,
            a=(codes >> 1) & 1,
            b=codes & 1,
            t=((codes >> 4) & 1) if has_test_flag else None,
        )


@dataclasses.dataclass(frozen=True, slots=True, eq=False)
class LogChunk:
    """A contiguous run of trials read from a log: ``codes[i]`` is trial ``start + i``."""

    codes: np.ndarray
    start: int
    has_test_flag: bool

    def __len__(self) -> int:
        return self.codes.size

    @property
    def x(self) -> np.ndarray:
        return (self.codes >> 3) & 1

    @property
    def y(self) -> np.ndarray:
        return (self.codes >> 2) & 1

    @property
    def a(self) -> np.ndarray:
        return (self.codes >> 1) & 1

    @property
    def b(self) -> np.ndarray:
        return self.codes & 1

    @property
    def t(self) -> np.ndarray:
        """Test-round flags; all ones when the log has no ``t`` column."""
        if self.has_test_flag:
            return (self.codes >> 4) & 1
        return np.ones(self.codes.size, dtype=np.uint8)

    def arrays(self) -> TrialArrays:
        return TrialArrays.from_codes(self.codes, self.has_test_flag)


@dataclasses.dataclass(frozen=True, slots=True)
class FileInfo:
    """One file of a log: path, format, size in bytes, SHA-256 of its bytes, trials in it."""

    path: str
    format: str
    size_bytes: int
    sha256: str | None
    trials: int


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class LogSummary:
    """Everything one streaming pass over a log yields.

    Attributes
    ----------
    trials : int
        Number of trials.
    counts : ndarray, shape (2, 2, 2, 2, 2), int64
        ``counts[t, x, y, a, b]``; logs without a ``t`` column have every trial under t = 1.
    block_trials : int
        Trials per block of ``block_counts`` (the last block may be shorter).
    block_counts : ndarray, shape (nblocks, 2, 2, 2, 2, 2), int64
        The same counts per block of trials, to see drift.
    has_test_flag : bool
        Whether the log has a ``t`` column.
    sha256 : str or None
        Digest of the log: a single file's SHA-256; for several files the SHA-256 of the
        RFC 8785 canonical JSON of their list (:func:`files_digest`).
    size_bytes : int
        Total size of the log's files.
    files : tuple of FileInfo
    pair_counts : ndarray, shape (8, 8), int64
        Counts of consecutive settings symbols s = 4 t + 2 x + y (previous, current), across
        chunk and file boundaries (for the serial-independence check of :mod:`dicert.design`).
    trials_in_log : int
        Trials present in the log; more than ``trials`` when ``max_trials`` limited the
        analysed prefix.
    """

    trials: int
    counts: np.ndarray
    block_trials: int
    block_counts: np.ndarray
    has_test_flag: bool
    sha256: str | None
    size_bytes: int
    files: tuple[FileInfo, ...]
    pair_counts: np.ndarray | None = None  # (8, 8) consecutive settings symbols (4t+2x+y)
    trials_in_log: int | None = None  # trials present (>= trials when max_trials cut the scan)
    log_spec: dict | None = None  # a log read through a log spec: dicert.logspec.SpecLog.audit

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("trials", self.trials), ("has_test_flag", self.has_test_flag),
                ("files", len(self.files)), ("size_bytes", self.size_bytes),
                ("sha256", None if self.sha256 is None else self.sha256[:16] + "...")]
        if full:
            rows[-1] = ("sha256", self.sha256)
            rows += [("trials_in_log", self.trials_in_log), ("block_trials", self.block_trials),
                     ("test_rounds", int(self.counts[1].sum()))]
        return rows


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


def _os_cause(exc: OSError, what: str) -> str:
    name = errno.errorcode.get(exc.errno or 0, "")
    return f"{what}: {exc.strerror or exc}" + (f" ({name})" if name else "")


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


class _HashingReader(io.RawIOBase):
    """A raw reader that feeds every byte it returns into a SHA-256 object."""

    def __init__(self, fh, hasher) -> None:
        self._fh = fh
        self._h = hasher
        self.bytes_read = 0

    def readable(self) -> bool:
        return True

    def readinto(self, b) -> int:
        n = self._fh.readinto(b)
        if n:
            self._h.update(memoryview(b)[:n])
            self.bytes_read += n
        return n


class TrialLog:
    """A (possibly multi-file) trial log opened for streaming.

    Parameters
    ----------
    source : path, directory or glob pattern (or a list of paths)
    format : {"csv", "binary", "npz"}, optional
        Force the format of every file instead of detecting it.
    limits : ReadLimits, optional
        Resource limits (default: :func:`current_read_limits`).
    """

    def __init__(self, source, format: str | None = None, *,
                 limits: ReadLimits | None = None) -> None:
        self.limits = limits if limits is not None else current_read_limits()
        self.files = resolve_sources(source)
        self.formats = [format_from_name(f, format) if format else detect_format(f) for f in self.files]
        flags = {self._peek_test_flag(f, fmt, self.limits)
                 for f, fmt in zip(self.files, self.formats)}
        if len(flags) > 1:
            raise LogFormatError(
                self.files[0], "", "the files of this log disagree on whether a t column is present"
            )
        self.has_test_flag = flags.pop()
        self.file_infos: list[FileInfo] = []
        self._hasher = None

    # -- header inspection ------------------------------------------------------------------
    @staticmethod
    def _peek_test_flag(path: Path, fmt: str, limits: ReadLimits | None = None) -> bool:
        limits = limits if limits is not None else current_read_limits()
        try:
            if fmt == "binary":
                with _open_checked(path) as fh:
                    return bool(read_binary_header(fh, path)[0] & FLAG_HAS_T)
            if fmt == "npz":
                with zipfile.ZipFile(path) as zf:
                    names = {n.removesuffix(".npy") for n in zf.namelist()}
                return "t" in names
            with _open_checked(path) as raw:
                fh = _maybe_gunzip(raw, path)
                cols, _ = _read_csv_header(fh, path, limits)
            return "t" in cols
        except LogFormatError:
            raise
        except (*_READ_FAILURES, ValueError, NotImplementedError, RuntimeError) as exc:
            raise _read_error(path, exc) from None

    # -- streaming ----------------------------------------------------------------------------
    def iter_chunks(
        self, chunk_trials: int = DEFAULT_CHUNK_TRIALS, *, hasher=None, hash_files: bool = True,
        reuse_buffers: bool = False,
    ) -> Iterator[LogChunk]:
        """Yield the trials in order, ``chunk_trials`` at a time (memory stays flat).

        If ``hasher`` (a hashlib object) is given, every byte of every file is fed into it.
        ``file_infos`` is filled as files are completed (with each file's SHA-256 unless
        ``hash_files`` is false). With ``reuse_buffers`` a binary file is read into two
        alternating buffers: each chunk's ``codes`` are then valid only until the next chunk is
        requested (for consumers that do not keep them, such as counting).
        """
        if chunk_trials <= 0:
            raise ParameterError("chunk_trials must be positive")
        start = 0
        self.file_infos = []
        for path, fmt in zip(self.files, self.formats):
            file_hasher = hashlib.sha256() if hash_files else None
            hashers = [h for h in (file_hasher, hasher) if h is not None]
            multi = _MultiHash(hashers)
            if fmt == "binary":
                chunks = _iter_binary(path, chunk_trials, multi if hashers else None, reuse_buffers)
            else:
                chunks = {"csv": _iter_csv, "npz": _iter_npz}[fmt](path, chunk_trials, multi,
                                                                  self.limits)
            trials_here = 0
            try:
                for codes in chunks:
                    if codes.size == 0:
                        continue
                    yield LogChunk(codes=codes, start=start, has_test_flag=self.has_test_flag)
                    start += codes.size
                    trials_here += codes.size
                size_bytes = path.stat().st_size
            except LogFormatError:
                raise
            except _READ_FAILURES as exc:  # I/O error, corrupt compressed data: one line
                raise _read_error(path, exc) from None
            if trials_here == 0:
                raise LogFormatError(path, "", "contains no trials")
            self.file_infos.append(
                FileInfo(
                    path=str(path),
                    format=fmt,
                    size_bytes=size_bytes,
                    sha256=file_hasher.hexdigest() if file_hasher is not None else None,
                    trials=trials_here,
                )
            )


class _MultiHash:
    """Feeds the same bytes to several hashlib objects (in a worker thread when large)."""

    def __init__(self, hashers) -> None:
        self._hashers = hashers

    def update(self, data) -> None:
        for h in self._hashers:
            h.update(data)


def open_log(source, format: str | None = None, *, limits: ReadLimits | None = None) -> TrialLog:
    """Open a log (file, directory or glob) for streaming; see :class:`TrialLog`.

    A log spec (:mod:`dicert.logspec`, recognised by its ``format`` key) or a single Parquet
    or HDF5 file opens as a :class:`dicert.logspec.SpecLog`, which streams the same way.
    """
    if _spec_like(source, format):
        from dicert.logspec import open_spec_log

        return open_spec_log(source, limits=limits,  # type: ignore[return-value]
                             format=format if format and format.lower() != "logspec" else None)
    return TrialLog(source, format=format, limits=limits)


def _spec_like(source, format: str | None) -> bool:
    if not isinstance(source, (str, os.PathLike)):
        return False
    name = str(source).lower()
    if format is None and name.endswith((".parquet", ".pq", ".h5", ".hdf5")):
        return True
    if format is not None and format.lower() not in ("logspec", "parquet", "hdf5"):
        return False
    from dicert.logspec import is_spec_file

    return is_spec_file(source) or (format is not None and Path(source).is_file())


def _open_checked(path: Path):
    try:
        return open(path, "rb")
    except FileNotFoundError:
        raise LogFormatError(path, "", "no such file") from None
    except IsADirectoryError:
        raise LogFormatError(path, "", "is a directory, not a log file") from None
    except PermissionError:
        raise LogFormatError(path, "", "permission denied") from None
    except OSError as exc:
        if exc.errno == errno.ELOOP:
            raise LogFormatError(path, "", "symbolic link loop") from None
        raise _read_error(path, exc) from None


# --------------------------------------------------------------------------------------------
# Binary format
# --------------------------------------------------------------------------------------------


def read_binary_header(fh, path) -> tuple[int, int, bytes]:
    """Read and validate the 24-byte header of a binary trial log from ``fh``.

    Returns ``(flags, count, header_bytes)``; ``count`` is :data:`COUNT_STREAMED` for a
    streamed file. Raises :class:`LogFormatError` naming ``path`` and the byte offset.
    """
    head = fh.read(BINARY_HEADER_SIZE)
    if len(head) < 8 or head[:8] != BINARY_MAGIC:
        raise LogFormatError(path, "byte offset 0", "wrong magic bytes: not a dicert binary trial log")
    if len(head) < BINARY_HEADER_SIZE:
        raise LogFormatError(path, f"byte offset {len(head)}", "truncated header (24 bytes expected)")
    _, version, flags, reserved, count = BINARY_HEADER.unpack(head)
    if version != BINARY_VERSION:
        raise LogFormatError(
            path, "byte offset 8", f"unsupported format version {version} (this reader knows {BINARY_VERSION})"
        )
    if flags & ~FLAG_HAS_T:
        raise LogFormatError(path, "byte offset 9", f"reserved header flag bits set (0x{flags:02x})")
    if any(reserved):
        raise LogFormatError(path, "byte offset 10", "reserved header bytes are not zero")
    return flags, count, head


def _iter_binary(path: Path, chunk_trials: int, hasher, reuse: bool = False) -> Iterator[np.ndarray]:
    size = path.stat().st_size
    with _open_checked(path) as fh:
        flags, count, head = read_binary_header(fh, path)
        if hasher is not None:
            hasher.update(head)
        body = size - BINARY_HEADER_SIZE
        if count == COUNT_STREAMED:
            if body < TRAILER.size or _read_at(path, size - TRAILER.size, 1)[0] != TRAILER_MARK:
                raise LogFormatError(
                    path, f"byte offset {size}", "truncated: a streamed log must end with its trailer"
                )
            mark, count = TRAILER.unpack(_read_at(path, size - TRAILER.size, TRAILER.size))
            if count != body - TRAILER.size:
                raise LogFormatError(
                    path,
                    f"byte offset {size - TRAILER.size}",
                    f"trailer says {count} trials but the file holds {body - TRAILER.size}",
                )
            tail = TRAILER.size
        else:
            tail = 0
            if body < count:
                raise LogFormatError(
                    path,
                    f"byte offset {size}",
                    f"truncated: header promises {count} trials, file holds {max(body, 0)}",
                )
            if body > count:
                raise LogFormatError(
                    path,
                    f"byte offset {BINARY_HEADER_SIZE + count}",
                    f"{body - count} unexpected bytes after the last trial",
                )
        valid_mask = 0x1F if flags & FLAG_HAS_T else 0x0F
        remaining = count
        offset = BINARY_HEADER_SIZE
        pool = concurrent.futures.ThreadPoolExecutor(max_workers=1) if hasher is not None else None
        pending = None
        # With reuse, two buffers alternate (no fresh allocation, hence no page faults, per
        # chunk). Buffer k % 2 is refilled only after the hash of chunk k - 2, which used it,
        # has completed: that wait happens before chunk k - 1's hash is submitted below.
        bufs = [np.empty(min(chunk_trials, remaining), np.uint8) for _ in range(2)] if reuse else None
        k = 0
        try:
            while remaining > 0:
                want = min(chunk_trials, remaining)
                if bufs is not None:
                    view = memoryview(bufs[k % 2])[:want]
                    got = fh.readinto(view)
                    data = view[:got]
                else:
                    data = fh.read(want)
                    got = len(data)
                k += 1
                if got < want:
                    raise LogFormatError(path, f"byte offset {offset + got}", "truncated")
                if pending is not None:
                    pending.result()
                if pool is not None:
                    pending = pool.submit(hasher.update, data)  # hashing overlaps counting
                codes = np.frombuffer(data, dtype=np.uint8)
                _check_reserved(codes, valid_mask, path, offset)
                yield codes
                offset += want
                remaining -= want
            if pending is not None:
                pending.result()
            if tail and hasher is not None:
                hasher.update(fh.read(tail))
        finally:
            if pool is not None:
                pool.shutdown(wait=True)


def _read_at(path: Path, offset: int, n: int) -> bytes:
    with open(path, "rb") as fh:
        fh.seek(offset)
        return fh.read(n)


def _check_reserved(codes: np.ndarray, valid_mask: int, path, offset: int) -> None:
    """Cheap check that no code has bits outside ``valid_mask`` (exact offset on failure)."""
    if codes.size and int(codes.max()) > valid_mask:
        bad = np.flatnonzero(codes & (~valid_mask & 0xFF))
        if bad.size:
            i = int(bad[0])
            what = "test-round bit set but the header declares no t column" if (
                codes[i] & 0xE0
            ) == 0 else "reserved bits set"
            raise LogFormatError(
                path, f"byte offset {offset + i}", f"{what} (byte 0x{int(codes[i]):02x}, trial {i})"
            )


class BinaryLogWriter:
    """Writer of the binary trial-log format, for acquisition code.

    Layout (all integers little-endian):

    ========  =====  ==============================================================
    offset    size   content
    ========  =====  ==============================================================
    0         8      magic ``8B 44 54 4C 0D 0A 1A 0A`` (``\\x8bDTL\\r\\n\\x1a\\n``)
    8         1      format version, 1
    9         1      flags: bit 0 = a t (test-round) column is present; bits 1-7 zero
    10        6      reserved, zero
    16        8      trial count N, or ``FF..FF`` if not known when the header was written
    24        N      one byte per trial: bit 0 b, bit 1 a, bit 2 y, bit 3 x, bit 4 t
                     (zero if no t column), bits 5-7 zero
    24+N      9      only when the count field is ``FF..FF``: trailer byte ``FF`` and the
                     trial count as a 64-bit integer (marks a complete file)
    ========  =====  ==============================================================

    With ``streamed=False`` (default) the count is patched into the header on close and the
    file is written to a temporary name and renamed (nothing half-written). With
    ``streamed=True`` bytes go straight to ``path`` so that a follower can read a growing log;
    :meth:`close` appends the trailer.
    """

    def __init__(self, path, *, has_test_flag: bool, streamed: bool = False) -> None:
        self.path = Path(path)
        self.has_test_flag = has_test_flag
        self.streamed = streamed
        self.count = 0
        self._mask = 0x1F if has_test_flag else 0x0F
        flags = FLAG_HAS_T if has_test_flag else 0
        header = BINARY_HEADER.pack(BINARY_MAGIC, BINARY_VERSION, flags, bytes(6), COUNT_STREAMED)
        if streamed:
            self._ctx = None
            with output_errors(self.path):
                self._fh = open(self.path, "wb")
        else:
            self._ctx = atomic_writer(self.path, "wb")
            self._fh = self._ctx.__enter__()
        try:
            with output_errors(self.path):
                self._fh.write(header)
        except BaseException:
            self.abort()
            raise

    def append(self, codes: np.ndarray) -> None:
        codes = np.ascontiguousarray(codes, dtype=np.uint8)
        if codes.size and int(codes.max()) > self._mask:
            raise ParameterError("trial codes have bits outside the declared columns")
        with output_errors(self.path):  # disk full: name the log being written
            self._fh.write(codes.tobytes())
            if self.streamed:
                self._fh.flush()
        self.count += codes.size

    def close(self) -> None:
        with output_errors(self.path):
            if self.streamed:
                self._fh.write(TRAILER.pack(TRAILER_MARK, self.count))
                self._fh.close()
                return
            try:
                self._fh.seek(16)
                self._fh.write(struct.pack("<Q", self.count))
                self._fh.seek(0, 2)
            except BaseException:
                self.abort()  # remove the temporary file; path stays untouched
                raise
            self._ctx.__exit__(None, None, None)

    def abort(self) -> None:
        if self.streamed:
            self._fh.close()
        else:
            try:
                raise RuntimeError("aborted")
            except RuntimeError as exc:
                self._ctx.__exit__(type(exc), exc, exc.__traceback__)

    def __enter__(self) -> BinaryLogWriter:
        return self

    def __exit__(self, et, ev, tb) -> None:
        if et is None:
            self.close()
        else:
            self.abort()


# --------------------------------------------------------------------------------------------
# CSV format
# --------------------------------------------------------------------------------------------

_CSV_BLOCK_BYTES = 1 << 24


def _maybe_gunzip(raw, path):
    head = raw.peek(2)[:2] if hasattr(raw, "peek") else b""
    if head == b"\x1f\x8b":
        return io.BufferedReader(gzip.GzipFile(fileobj=raw, mode="rb"), buffer_size=1 << 20)
    return raw


def _line_too_long(path, lineno: int, limits: ReadLimits) -> LogFormatError:
    return LogFormatError(
        path, f"line {lineno}",
        f"line longer than {limits.max_line_bytes} bytes (limit max_line_bytes; raise it with "
        f"{LIMITS_ENV}=max_line_bytes=N if the log really has such lines)",
    )


def _read_csv_header(fh, path, limits: ReadLimits | None = None) -> tuple[list[str], int]:
    """Return (column names, line number of the header) and leave fh after the header line.

    Every line is read with a bounded ``readline`` (at most ``limits.max_line_bytes``), the
    column count is checked before the header is split, and duplicates are found with a set.
    """
    limits = limits if limits is not None else current_read_limits()
    lineno = 0
    while True:
        try:
            line = fh.readline(limits.max_line_bytes + 1)
        except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
            raise LogFormatError(path, f"line {lineno + 1}", f"cannot decompress: {exc}") from None
        lineno += 1
        if not line:
            raise LogFormatError(path, "", "empty file: no header row")
        if len(line) > limits.max_line_bytes:
            raise _line_too_long(path, lineno, limits)
        text = line.strip()
        if not text or text.startswith(b"#"):
            continue
        ncol = text.count(b",") + 1
        if ncol > limits.max_columns:
            raise LogFormatError(path, f"line {lineno}", f"header has {ncol} columns, more than "
                                 f"the limit max_columns = {limits.max_columns}")
        try:
            names = [c.strip().lower() for c in text.decode("utf-8-sig").split(",")]
        except UnicodeDecodeError:
            raise LogFormatError(path, f"line {lineno}", "header row is not UTF-8 text") from None
        present = set(names)
        for req in ("x", "y", "a", "b"):
            if req not in present:
                raise LogFormatError(
                    path, f"line {lineno}", f"header has no column {req!r} (required: x,y,a,b; "
                    f"optional t){_header_hint(names)}"
                )
        seen: set[str] = set()
        for c in names:  # linear: a set, not names.count per column
            if c in seen and c in ("x", "y", "a", "b", "t"):
                raise LogFormatError(path, f"line {lineno}", f"column {c!r} appears twice")
            seen.add(c)
        return names, lineno


def _header_hint(names: list[str]) -> str:
    """Why a header lacks the required columns, when the reason is guessable."""
    if len(names) == 1:
        for d, word in (("\t", "tab"), (";", "semicolon"), ("|", "pipe")):
            if d in names[0]:
                return (f"; the header looks {word}-separated, but a plain log is comma-"
                        f"separated: describe the file in a log spec with delimiter = "
                        f"\"{word}\" (README, section Log specs)")
    return ("; a log with other column names can be read through a log spec naming its "
            "columns (README, section Log specs)")


def _value_hint(name: str, val: bytes) -> str:
    if val in (b"-1", b"+1") or (name in ("x", "y") and val == b"2"):
        what = "+1/-1 outcomes" if val in (b"-1", b"+1") else "1/2 settings"
        return (f"; for {what} describe the log in a log spec with a value map, e.g. "
                + ('{"+1" = 0, "-1" = 1}' if what.startswith("+") else '{"1" = 0, "2" = 1}')
                + " (README, section Log specs)")
    return "; other codings can be mapped to 0/1 by a log spec (README, section Log specs)"


def _iter_csv(path: Path, chunk_trials: int, hasher,
              limits: ReadLimits | None = None) -> Iterator[np.ndarray]:
    limits = limits if limits is not None else current_read_limits()
    max_line = limits.max_line_bytes
    with _open_checked(path) as raw0:
        counted = _HashingReader(raw0, hasher)
        raw = io.BufferedReader(counted, buffer_size=1 << 20)
        fh = _maybe_gunzip(raw, path)
        gz = fh is not raw
        names, lineno = _read_csv_header(fh, path, limits)
        ncol = len(names)
        want = [names.index(c) for c in ("x", "y", "a", "b")]
        tcol = names.index("t") if "t" in names else None
        carry = b""
        pending: list[np.ndarray] = []
        pending_n = 0
        inflated = 0
        # Blocks no larger than needed for long lines; carry never exceeds max_line bytes, so
        # each block costs O(block + max_line) whatever the input (no quadratic re-copying).
        block_bytes = max(_CSV_BLOCK_BYTES, min(max_line, 1 << 26))
        while True:
            try:
                block = fh.read(block_bytes)
            except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
                raise LogFormatError(path, f"after line {lineno}", f"cannot decompress: {exc}") from None
            if gz and block:
                inflated += len(block)
                if (inflated > limits.ratio_grace_bytes
                        and inflated > limits.max_compression_ratio * max(counted.bytes_read, 1)):
                    raise LogFormatError(
                        path, f"after line {lineno}",
                        f"decompresses to more than {limits.max_compression_ratio:g} times its "
                        f"compressed size (limit max_compression_ratio; a decompression bomb?)")
            if not block:
                if carry.strip():
                    block = b"\n"  # a last line without newline
                else:
                    break
            data = carry + block if carry else block
            cut = data.rfind(b"\n")
            if cut < 0:
                if len(data) > max_line:
                    raise _line_too_long(path, lineno + 1, limits)
                carry = data
                continue
            carry = data[cut + 1 :]
            codes, nlines = _parse_csv_block(data[: cut + 1], ncol, want, tcol, path, lineno + 1,
                                             max_line)
            lineno += nlines
            if len(carry) > max_line:
                raise _line_too_long(path, lineno + 1, limits)
            if codes.size:
                pending.append(codes)
                pending_n += codes.size
            while pending_n >= chunk_trials:
                allc = np.concatenate(pending) if len(pending) > 1 else pending[0]
                yield allc[:chunk_trials]
                rest = allc[chunk_trials:]
                pending = [rest] if rest.size else []
                pending_n = rest.size
        if pending_n:
            yield np.concatenate(pending) if len(pending) > 1 else pending[0]
        # drain so the hash covers every byte of the file
        while raw.read(1 << 20):
            pass


def _parse_csv_block(data: bytes, ncol, want, tcol, path, first_line,
                     max_line: int | None = None) -> tuple[np.ndarray, int]:
    """Parse complete lines; fast vectorised path, exact per-line path on any irregularity.

    Lines longer than ``max_line`` bytes (newline included) are an error; the fixed-width path
    needs no check (its lines are 2 * ncol bytes, and ncol is bounded by max_columns).
    """
    buf = np.frombuffer(data, dtype=np.uint8)
    fixed = _parse_csv_fixed(buf, ncol, want, tcol)
    if fixed is not None:
        return fixed, fixed.size
    nl = np.flatnonzero(buf == 10)
    nlines = nl.size
    if max_line is not None and nlines and max_line < len(data):
        lengths = np.diff(nl, prepend=-1)
        if int(lengths.max()) > max_line:
            k = int(np.argmax(lengths > max_line))
            raise LogFormatError(path, f"line {first_line + k}",
                                 f"line longer than {max_line} bytes (limit max_line_bytes; raise "
                                 f"it with {LIMITS_ENV}=max_line_bytes=N if the log really has "
                                 "such lines)")
    codes = _parse_csv_fast(buf, nl, ncol, want, tcol)
    if codes is None:
        codes = _parse_csv_slow(data, ncol, want, tcol, path, first_line)
    return codes, nlines


def _parse_csv_fixed(buf: np.ndarray, ncol, want, tcol) -> np.ndarray | None:
    """Fastest path: every line is exactly ``d,d,...,d\n`` (one digit per column)."""
    width = 2 * ncol
    if buf.size == 0 or buf.size % width:
        return None
    rows = buf.reshape(buf.size // width, width)
    if not (rows[:, 1:-1:2] == 44).all() or not (rows[:, -1] == 10).all():
        return None
    digits = rows[:, 0::2] - 48
    if (digits > 1).any():
        return None
    code = (digits[:, want[0]] << 3) | (digits[:, want[1]] << 2) | (digits[:, want[2]] << 1) | digits[:, want[3]]
    if tcol is not None:
        code |= digits[:, tcol] << 4
    return code.astype(np.uint8, copy=False)


def _parse_csv_fast(buf: np.ndarray, nl: np.ndarray, ncol, want, tcol) -> np.ndarray | None:
    if nl.size == 0:
        return np.zeros(0, np.uint8)
    if (buf == 13).any():
        return None
    starts = np.empty(nl.size, dtype=np.int64)
    starts[0] = 0
    starts[1:] = nl[:-1] + 1
    first = buf[starts]
    if ((first == 35) | (first == 10)).any():  # comment or blank line
        return None
    seps = np.flatnonzero((buf == 44) | (buf == 10))
    if seps.size != nl.size * ncol:
        return None
    seps = seps.reshape(nl.size, ncol)
    if not np.array_equal(seps[:, -1], nl):
        return None
    code = np.zeros(nl.size, dtype=np.uint8)
    cols = list(zip(want, (3, 2, 1, 0)))
    if tcol is not None:
        cols.append((tcol, 4))
    for col, shift in cols:
        beg = starts if col == 0 else seps[:, col - 1] + 1
        if not np.array_equal(seps[:, col] - beg, np.ones_like(beg)):
            return None
        v = buf[beg] - 48
        if (v > 1).any():
            return None
        code |= v << shift
    return code


def _parse_csv_slow(data: bytes, ncol, want, tcol, path, first_line) -> np.ndarray:
    out = []
    cols = list(zip(("x", "y", "a", "b"), want))
    if tcol is not None:
        cols.append(("t", tcol))
    shifts = {"x": 3, "y": 2, "a": 1, "b": 0, "t": 4}
    for k, raw_line in enumerate(data.split(b"\n")[:-1]):
        lineno = first_line + k
        line = raw_line.rstrip(b"\r")
        stripped = line.strip()
        if not stripped or stripped.startswith(b"#"):
            continue
        fields = line.split(b",")
        if len(fields) != ncol:
            raise LogFormatError(
                path, f"line {lineno}", f"expected {ncol} fields as in the header, found {len(fields)}"
            )
        code = 0
        for name, idx in cols:
            val = fields[idx].strip()
            if val not in (b"0", b"1"):
                shown = val.decode("utf-8", "replace")[:20]
                raise LogFormatError(
                    path, f"line {lineno}", f"column {name!r} has value {shown!r}; expected 0 or "
                    f"1{_value_hint(name, val)}"
                )
            code |= (val[0] - 48) << shifts[name]
        out.append(code)
    return np.array(out, dtype=np.uint8)


# --------------------------------------------------------------------------------------------
# npz format
# --------------------------------------------------------------------------------------------


def _iter_npz(path: Path, chunk_trials: int, hasher,
              limits: ReadLimits | None = None) -> Iterator[np.ndarray]:
    """Stream the trials of an npz log.

    The file is read into memory once (at most ``limits.max_npz_bytes``), so that its digest
    covers exactly the bytes analysed; every member's ``.npy`` header (dtype, shape, size) is
    checked against the archive directory before anything is decompressed, and the arrays are
    then decoded ``chunk_trials`` at a time (memory does not grow with the decompressed size).
    """
    limits = limits if limits is not None else current_read_limits()
    with _open_checked(path) as fh:
        size = os.fstat(fh.fileno()).st_size
        if size > limits.max_npz_bytes:
            raise LogFormatError(path, "", f"npz file of {size} bytes exceeds the limit "
                                 f"max_npz_bytes = {limits.max_npz_bytes}; convert it to the "
                                 "binary format (dicert convert), which streams")
        data = fh.read(limits.max_npz_bytes + 1)
    if len(data) > limits.max_npz_bytes:
        raise LogFormatError(path, "", "npz file exceeds the limit max_npz_bytes = "
                             f"{limits.max_npz_bytes}")
    hasher.update(data)
    try:
        zf = zipfile.ZipFile(io.BytesIO(data))
    except (zipfile.BadZipFile, OSError, EOFError, ValueError, NotImplementedError) as exc:
        raise LogFormatError(path, "", f"not a valid .npz archive ({type(exc).__name__})") from None
    with zf:
        members = {}
        for info in zf.infolist():
            key = info.filename.removesuffix(".npy")
            if key in ("x", "y", "a", "b", "t"):
                if key in members:
                    raise LogFormatError(path, f"array {key!r}", "appears twice in the archive")
                members[key] = info
        missing = [k for k in ("x", "y", "a", "b") if k not in members]
        if missing:
            raise LogFormatError(path, "", f"array {missing[0]!r} missing (required: x, y, a, b; optional t)")
        names = ["x", "y", "a", "b"] + (["t"] if "t" in members else [])
        total = sum(members[k].file_size for k in names)
        packed = sum(members[k].compress_size for k in names)
        if (total > limits.ratio_grace_bytes
                and total > limits.max_compression_ratio * max(packed, 1)):
            raise LogFormatError(path, "", f"arrays decompress to more than "
                                 f"{limits.max_compression_ratio:g} times their compressed size "
                                 "(limit max_compression_ratio; a decompression bomb?)")
        streams = {}
        n = None
        try:
            for k in names:
                m = zf.open(members[k])
                streams[k] = m
                dtype, count = _read_npy_header(m, members[k], path, k, limits)
                if n is None:
                    n = count
                elif count != n:
                    raise LogFormatError(path, f"array {k!r}",
                                         f"has {count} entries, array 'x' has {n}")
                streams[k] = (m, dtype)
            offset = 0
            while offset < n:
                want = min(chunk_trials, n - offset)
                cols = {}
                for k in names:
                    m, dtype = streams[k]
                    arr = _read_npy_chunk(m, dtype, want, path, k, offset)
                    bad = np.flatnonzero(~((arr == 0) | (arr == 1)))
                    if bad.size:
                        i = int(bad[0])
                        raise LogFormatError(path, f"array {k!r}, index {offset + i}",
                                             f"value {arr[i]!r}; expected 0 or 1")
                    cols[k] = arr.astype(np.uint8)
                yield TrialArrays(**cols)._codes()
                offset += want
            for k in names:  # reach each member's end: zipfile checks its CRC-32 there
                m, _ = streams[k]
                if m.read(1):
                    raise LogFormatError(path, f"array {k!r}",
                                         "member holds more bytes than its header declares")
        except LogFormatError:
            raise
        except (*_READ_FAILURES, ValueError, NotImplementedError, RuntimeError) as exc:
            raise _read_error(path, exc) from None
        finally:
            for v in streams.values():
                (v[0] if isinstance(v, tuple) else v).close()


def _read_npy_header(m, info: zipfile.ZipInfo, path, key: str, limits: ReadLimits):
    """(dtype, length) of a 1-D numeric ``.npy`` member, checked before any data is read."""
    from numpy.lib import format as npf

    where = f"array {key!r}"
    try:
        version = npf.read_magic(m)
        cap = int(limits.max_npy_header_bytes)
        if version == (1, 0):
            shape, _, dtype = npf.read_array_header_1_0(m, max_header_size=cap)
        elif version in ((2, 0), (3, 0)):
            shape, _, dtype = npf.read_array_header_2_0(m, max_header_size=cap)
        else:  # pragma: no cover - read_magic accepts only the versions above
            raise ValueError(f"unsupported .npy version {version}")
    except LogFormatError:
        raise
    except _READ_FAILURES as exc:
        raise _read_error(path, exc, where) from None
    except Exception as exc:  # numpy parses the (bounded) header with tokenize/ast: any error
        raise LogFormatError(path, where, f"member {info.filename!r} is not a valid .npy array "
                             f"({' '.join(str(exc).split())[:120]})") from None
    if dtype.hasobject:
        raise LogFormatError(path, where, "is an object (pickled) array; refused (expected "
                             "integers 0/1)")
    if dtype.kind not in "biuf" or dtype.itemsize > 16:
        raise LogFormatError(path, where, f"has dtype {dtype}; expected integers 0/1")
    if len(shape) != 1:
        raise LogFormatError(path, where, f"must be one-dimensional, has shape {shape}")
    count = int(shape[0])
    header_len = m.tell() if hasattr(m, "tell") else None
    data_bytes = count * dtype.itemsize
    if header_len is not None and header_len + data_bytes != info.file_size:
        held = max(info.file_size - header_len, 0)
        raise LogFormatError(path, where, f"header declares shape {shape} ({data_bytes} bytes) "
                             f"but the member holds {held} bytes of data")
    return dtype, count


def _read_npy_chunk(m, dtype: np.dtype, count: int, path, key: str, offset: int) -> np.ndarray:
    need = count * dtype.itemsize
    parts = []
    got = 0
    while got < need:
        b = m.read(need - got)
        if not b:
            raise LogFormatError(path, f"array {key!r}, index {offset + got // dtype.itemsize}",
                                 "truncated member")
        parts.append(b)
        got += len(b)
    return np.frombuffer(b"".join(parts) if len(parts) > 1 else parts[0], dtype=dtype)


# --------------------------------------------------------------------------------------------
# One streaming pass: counts, block counts, digest
# --------------------------------------------------------------------------------------------



class BlockTally:
    """Counts per block of ``block_trials`` consecutive trials over a stream of trial codes.

    ``offset`` is the global index of the first trial fed, so a stream that starts inside a
    block (one file of a multi-file log) fills that block's remainder first. :meth:`result`
    gives the raw counts (t as coded) of every block touched, the last one possibly partial,
    shape (nblocks, 2, 2, 2, 2, 2).
    """

    def __init__(self, block_trials: int, offset: int = 0) -> None:
        self.block_trials = int(block_trials)
        self.first_block = int(offset) // self.block_trials
        self._blocks: list[np.ndarray] = []
        self._partial = np.zeros(32, dtype=np.int64)  # counts of the block being filled
        self._fill = int(offset) % self.block_trials

    def add(self, codes: np.ndarray) -> None:
        from dicert._kernels import count_blocks

        bt, pos = self.block_trials, 0
        if self._fill:
            take = min(bt - self._fill, codes.size)
            c, _ = count_blocks(codes[:take], max(take, 1))
            self._partial += c.sum(axis=0)
            self._fill += take
            pos = take
            if self._fill == bt:
                self._blocks.append(self._partial.copy())
                self._partial[:] = 0
                self._fill = 0
        rest = codes[pos:]
        if rest.size:
            c, _ = count_blocks(rest, bt)
            full = rest.size // bt
            if full:
                self._blocks.extend(c[:full])
            if rest.size % bt:
                self._partial += c[-1]
                self._fill = rest.size % bt

    def result(self) -> np.ndarray:
        blocks = self._blocks + ([self._partial.copy()] if self._fill else [])
        return np.array(blocks, dtype=np.int64).reshape(-1, 2, 2, 2, 2, 2)

def summarize_log(
    source,
    *,
    block_trials: int = DEFAULT_BLOCK_TRIALS,
    chunk_trials: int = DEFAULT_CHUNK_TRIALS,
    digest: bool = True,
    format: str | None = None,
    on_chunk: Callable[[LogChunk], object] | None = None,
    progress: Callable[[int, int], object] | None = None,
    max_trials: int | None = None,
) -> LogSummary:
    """Read a log once, streaming, and return its counts (total and per block) and digest.

    Parameters
    ----------
    source : path, directory or glob
    block_trials : int
        Block size for per-block counts (drift diagnostics).
    digest : bool
        Compute the SHA-256 of the log's bytes (overlapped with counting).
    on_chunk : callable, optional
        Called with every :class:`LogChunk` in order (e.g. to harvest outcome bits in the same
        pass).
    progress : callable, optional
        Called as ``progress(bytes_done, bytes_total)``.
    max_trials : int, optional
        Count (and pass to ``on_chunk``) only the first ``max_trials`` trials; the rest of
        the log is still read, validated and hashed, and counted in ``trials_in_log``.
    """
    from dicert._kernels import count_pairs

    if block_trials <= 0:
        raise ParameterError("block_trials must be positive")
    log = open_log(source, format=format)
    total_bytes = sum(f.stat().st_size for f in log.files)
    tally = BlockTally(block_trials)
    trials = 0
    in_log = 0
    pairs = np.zeros(64, dtype=np.int64)
    prev = -1  # settings symbol of the last trial counted (carried across chunks and files)
    # Without a consumer of the chunks the buffers can be reused (nothing keeps the codes).
    # The digest is built from the per-file digests (see files_digest), so no second hasher.
    for chunk in log.iter_chunks(chunk_trials, hash_files=digest,
                                 reuse_buffers=on_chunk is None):
        codes = chunk.codes
        in_log += codes.size
        if max_trials is not None:
            room = max_trials - trials
            if room <= 0:
                if progress is not None:
                    progress(min(total_bytes, _bytes_done(log, in_log, total_bytes)), total_bytes)
                continue
            if codes.size > room:
                codes = codes[:room]
                chunk = LogChunk(codes=codes, start=chunk.start, has_test_flag=chunk.has_test_flag)
        # Pair counting runs in a worker thread while this one counts the blocks (both C
        # kernels release the GIL); it finishes before the next chunk reuses the buffer.
        big = codes.size >= _PAIR_THREAD_MIN
        fut = _pair_pool().submit(count_pairs, codes, prev) if big else None
        if fut is None:
            pc, prev = count_pairs(codes, prev)
            pairs += pc
        tally.add(codes)
        if fut is not None:
            pc, prev = fut.result()
            pairs += pc
        trials += codes.size
        if on_chunk is not None:
            on_chunk(chunk)
        if progress is not None:
            progress(min(total_bytes, _bytes_done(log, trials, total_bytes)), total_bytes)
    block_counts = tally.result()
    if not log.has_test_flag:
        block_counts = np.stack([np.zeros_like(block_counts[:, 0]), block_counts.sum(axis=1)], axis=1)
    counts = block_counts.sum(axis=0) if block_counts.size else np.zeros((2,) * 5, dtype=np.int64)
    sha = None
    if digest:
        infos = log.file_infos
        sha = infos[0].sha256 if len(infos) == 1 else files_digest(
            {"name": Path(f.path).name, "bytes": f.size_bytes, "sha256": f.sha256} for f in infos)
    spec_audit = getattr(log, "audit", None)
    return LogSummary(
        trials=trials,
        counts=counts,
        block_trials=block_trials,
        block_counts=block_counts,
        has_test_flag=log.has_test_flag,
        sha256=sha,
        size_bytes=total_bytes,
        files=tuple(log.file_infos),
        pair_counts=pairs.reshape(8, 8),
        trials_in_log=in_log,
        log_spec=spec_audit,
    )


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
                out.append(f"{p} has the same content (SHA-256 {d[:16]}...) as {seen[d]}")
            else:
                seen[d] = p
    return out


_PAIR_THREAD_MIN = 1 << 20


@functools.cache
def _pair_pool():
    from concurrent.futures import ThreadPoolExecutor

    return ThreadPoolExecutor(max_workers=1, thread_name_prefix="dicert-pairs")


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


def _bytes_done(log: TrialLog, trials: int, total_bytes: int) -> int:
    # Progress in trials scaled to bytes (exact for binary logs, an estimate for text).
    done_files = sum(fi.size_bytes for fi in log.file_infos)
    return max(done_files, min(total_bytes, trials))


def read_trials(source, format: str | None = None) -> TrialArrays:
    """Read a whole log into memory (for small logs and tests)."""
    log = open_log(source, format=format)
    parts = [c.codes for c in log.iter_chunks()]
    codes = np.concatenate(parts) if parts else np.zeros(0, np.uint8)
    return TrialArrays.from_codes(codes, log.has_test_flag)


# --------------------------------------------------------------------------------------------
# Writing and converting
# --------------------------------------------------------------------------------------------


def _as_code_chunks(trials) -> tuple[bool, Iterator[np.ndarray]]:
    """(has_test_flag, iterator of code arrays) from TrialArrays, LogChunks or an iterable of them."""
    if not isinstance(trials, (TrialArrays, LogChunk)) and hasattr(trials, "keys"):
        trials = TrialArrays.from_mapping(trials, "write_log")
    if isinstance(trials, (TrialArrays, LogChunk)):
        trials = [trials]
    it = iter(trials)
    try:
        first = next(it)
    except StopIteration:
        raise ParameterError("no trials to write") from None

    def codes_of(item) -> np.ndarray:
        if isinstance(item, LogChunk):
            if item.codes.size and int(item.codes.max()) > 0x1F:
                raise ParameterError("write_log: a chunk holds trial codes with reserved bits set")
            return item.codes
        item.validate()  # the arrays may have been changed since construction
        return item._codes()

    flag = first.has_test_flag

    def gen():
        yield codes_of(first)
        for item in it:
            if item.has_test_flag != flag:
                raise ParameterError("chunks disagree on whether a t column is present")
            yield codes_of(item)

    return flag, gen()


_DIGITS = np.array([48, 49], dtype=np.uint8)


def _csv_bytes(codes: np.ndarray, has_t: bool) -> bytes:
    ncol = 5 if has_t else 4
    rows = np.empty((codes.size, 2 * ncol), dtype=np.uint8)
    shifts = (3, 2, 1, 0, 4)[:ncol]
    for j, s in enumerate(shifts):
        rows[:, 2 * j] = _DIGITS[(codes >> s) & 1]
        rows[:, 2 * j + 1] = 44
    rows[:, -1] = 10
    return rows.tobytes()


def write_log(path, trials, format: str | None = None, *, compress_level: int = 6) -> int:
    """Write trials to ``path`` atomically; return the number of trials written.

    ``trials`` is a :class:`TrialArrays`, a mapping of columns (``{"x": ..., "y": ..., "a": ...,
    "b": ..., "t": ...}``, t optional), a :class:`LogChunk`, or an iterable of TrialArrays or
    LogChunks (for streaming large logs with bounded memory; npz needs everything in memory). The format is
    taken from ``format`` or the extension (.csv, .csv.gz, .btl, .npz).
    """
    fmt = format_from_name(path, format)
    has_t, chunks = _as_code_chunks(trials)
    path = Path(path)
    if fmt == "binary":
        with BinaryLogWriter(path, has_test_flag=has_t) as w:
            for codes in chunks:
                w.append(codes)
            return w.count
    if fmt == "npz":
        codes = np.concatenate(list(chunks))
        arr = TrialArrays.from_codes(codes, has_t)
        cols = {k: getattr(arr, k) for k in ("x", "y", "a", "b")}
        if has_t:
            cols["t"] = arr.t
        with atomic_writer(path, "wb") as fh:
            np.savez_compressed(fh, **cols)
        return codes.size
    header = b"x,y,a,b,t\n" if has_t else b"x,y,a,b\n"
    n = 0
    gz = str(path).lower().endswith(".gz") or (format or "").lower() == "csv.gz"
    with atomic_writer(path, "wb") as raw:
        out = gzip.GzipFile(fileobj=raw, mode="wb", compresslevel=compress_level, mtime=0) if gz else raw
        out.write(header)
        for codes in chunks:
            out.write(_csv_bytes(codes, has_t))
            n += codes.size
        if gz:
            out.close()
    return n


def convert_log(source, dest, *, format: str | None = None, in_format: str | None = None,
                chunk_trials: int = DEFAULT_CHUNK_TRIALS,
                progress: Callable[[int, int], object] | None = None) -> int:
    """Convert a log between formats, streaming; return the number of trials."""
    log = open_log(source, format=in_format)
    total = sum(f.stat().st_size for f in log.files)
    done = [0]

    def chunks():
        for ch in log.iter_chunks(chunk_trials):
            done[0] += ch.codes.size
            if progress is not None:
                progress(min(done[0], total), total)
            yield ch

    return write_log(dest, chunks(), format=format)


__all__ = [
    "BINARY_MAGIC",
    "BinaryLogWriter",
    "BlockTally",
    "FileInfo",
    "LogChunk",
    "LogSummary",
    "TrialArrays",
    "TrialLog",
    "ReadLimits",
    "convert_log",
    "current_read_limits",
    "detect_format",
    "files_digest",
    "input_identity_problems",
    "open_log",
    "read_binary_header",
    "read_limits",
    "read_trials",
    "resolve_sources",
    "summarize_log",
    "write_log",
]
