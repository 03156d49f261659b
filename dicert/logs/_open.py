"""Opening a log for streaming (:class:`TrialLog`) and reading it whole.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import hashlib
import os
import zipfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from dicert.errors import LogFormatError, ParameterError

# _open_checked is looked up on the package at call time, as it was when this was one module
# (tests patch dicert.logs._open_checked to inject I/O faults into every reader)
from dicert import logs as _logs
from dicert.logs._model import (
    DEFAULT_CHUNK_TRIALS,
    FLAG_HAS_T,
    FileInfo,
    LogChunk,
    ReadLimits,
    TrialArrays,
    _READ_FAILURES,
    _read_error,
    current_read_limits,
)
from dicert.logs._files import detect_format, format_from_name, resolve_sources
from dicert.logs._binary import _iter_binary, read_binary_header
from dicert.logs._csv import _iter_csv, _maybe_gunzip, _read_csv_header
from dicert.logs._npz import _iter_npz


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
                with _logs._open_checked(path) as fh:
                    return bool(read_binary_header(fh, path)[0] & FLAG_HAS_T)
            if fmt == "npz":
                with zipfile.ZipFile(path) as zf:
                    names = {n.removesuffix(".npy") for n in zf.namelist()}
                return "t" in names
            with _logs._open_checked(path) as raw:
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


def read_trials(source, format: str | None = None) -> TrialArrays:
    """Read a whole log into memory (for small logs and tests)."""
    log = open_log(source, format=format)
    parts = [c.codes for c in log.iter_chunks()]
    codes = np.concatenate(parts) if parts else np.zeros(0, np.uint8)
    return TrialArrays.from_codes(codes, log.has_test_flag)
