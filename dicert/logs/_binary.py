"""The binary trial-log format: header, reader, writer.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import concurrent.futures
import struct
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from dicert._io import atomic_writer, output_errors
from dicert.errors import LogFormatError, ParameterError

# _open_checked is looked up on the package at call time, as it was when this was one module
# (tests patch dicert.logs._open_checked to inject I/O faults into every reader)
from dicert import logs as _logs
from dicert.logs._model import (
    BINARY_HEADER,
    BINARY_HEADER_SIZE,
    BINARY_MAGIC,
    BINARY_VERSION,
    COUNT_STREAMED,
    FLAG_HAS_T,
    TRAILER,
    TRAILER_MARK,
)


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
    with _logs._open_checked(path) as fh:
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
