"""Trial-log basics: format constants, read limits, read errors and the result types.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import contextlib
import contextvars
import dataclasses
import errno
import gzip
import io
import os
import struct
import zipfile
import zlib
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np

from dicert._display import displayed
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
                ("sha256", self.sha256)]
        if full:
            rows[-1] = ("sha256", self.sha256)
            rows += [("trials_in_log", self.trials_in_log), ("block_trials", self.block_trials),
                     ("test_rounds", int(self.counts[1].sum()))]
        return rows


def _os_cause(exc: OSError, what: str) -> str:
    name = errno.errorcode.get(exc.errno or 0, "")
    return f"{what}: {exc.strerror or exc}" + (f" ({name})" if name else "")


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
