"""Writing and converting trial logs.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import gzip
from collections.abc import Callable, Iterator
from pathlib import Path

import numpy as np

from dicert._io import atomic_writer
from dicert.errors import ParameterError

from dicert.logs._model import DEFAULT_CHUNK_TRIALS, LogChunk, TrialArrays
from dicert.logs._files import format_from_name
from dicert.logs._open import open_log
from dicert.logs._binary import BinaryLogWriter


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
