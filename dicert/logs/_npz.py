"""The npz trial-log format: bounded, streamed reading of numpy archives.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import io
import os
import zipfile
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from dicert.errors import LogFormatError

# _open_checked is looked up on the package at call time, as it was when this was one module
# (tests patch dicert.logs._open_checked to inject I/O faults into every reader)
from dicert import logs as _logs
from dicert.logs._model import (
    ReadLimits,
    TrialArrays,
    _READ_FAILURES,
    _read_error,
    current_read_limits,
)


# --------------------------------------------------------------------------------------------
# npz format
# --------------------------------------------------------------------------------------------


# long: one generator whose open archive and member state live across its yields
def _iter_npz(path: Path, chunk_trials: int, hasher,
              limits: ReadLimits | None = None) -> Iterator[np.ndarray]:
    """Stream the trials of an npz log.

    The file is read into memory once (at most ``limits.max_npz_bytes``), so that its digest
    covers exactly the bytes analysed; every member's ``.npy`` header (dtype, shape, size) is
    checked against the archive directory before anything is decompressed, and the arrays are
    then decoded ``chunk_trials`` at a time (memory does not grow with the decompressed size).
    """
    limits = limits if limits is not None else current_read_limits()
    with _logs._open_checked(path) as fh:
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
