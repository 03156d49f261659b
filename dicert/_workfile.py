"""The four-step extractor's work files (:mod:`dicert._fourstep`): the N2 x N1 complex array
in memory or in a private temporary file, the packed source bits, and their transfers.

Large work files move by direct I/O where the file system allows it (see :data:`DIRECT_IO`),
through aligned buffers, each request split into a few concurrent transfers.
"""

from __future__ import annotations

import contextlib
import errno
import math
import os
import tempfile
import threading
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:
    from dicert._fourstep import FourStepPlan

#: Bytes per complex value of the working array.
_C = 16
#: Alignment (bytes) of buffers, offsets and lengths for direct I/O on the work file.
_ALIGN = 4096
#: Use direct I/O (O_DIRECT, bypassing the page cache) for the work file where the file system
#: allows it. Buffered writes of a work file of several GB fill the page cache with fresh pages,
#: and on virtual machines whose memory the host backs lazily, every fresh page costs a fault
#: in the host too (about 3 s per GB measured on the 2-core CI machine); direct transfers move
#: the same bytes between a few reused buffers and the disk with almost no CPU time.
DIRECT_IO = True
#: Concurrent transfers per request (a queue depth of about four doubles the disk's rate for
#: direct I/O on the CI machine).
_IO_THREADS = 4


# --------------------------------------------------------------------------- storage


class ArrayStore:
    """The N2 x N1 complex array in memory."""

    def __init__(self, N2: int, N1: int) -> None:
        self.a = np.zeros((N2, N1), dtype=np.complex128)

    def rows(self, r0: int, r1: int) -> np.ndarray:
        return self.a[r0:r1].copy()

    def put_rows(self, r0: int, v: np.ndarray) -> None:
        self.a[r0:r0 + v.shape[0]] = v

    def cols(self, c0: int, c1: int, nrows: int | None = None) -> np.ndarray:
        return self.a[:nrows, c0:c1].copy()

    def put_cols(self, c0: int, v: np.ndarray) -> None:
        self.a[:, c0:c0 + v.shape[1]] = v

    def close(self) -> None:
        pass


class _WorkFile:
    """A private work file: opened on first use, and sent to another process (a cluster
    worker) by its path only, which the copy opens again."""

    N2: int
    N1: int
    w: int
    path: str | None
    _fd: int | None
    _own: bool

    @property
    def fd(self) -> int:
        if self._fd is None:  # opened on first use (a copy sent to a worker opens its own)
            self._fd = os.open(self.path, os.O_RDWR)
        return self._fd

    def __getstate__(self) -> dict:
        if self.path is None:
            raise TypeError("an anonymous temporary file cannot be shared with other processes")
        return {"N2": self.N2, "N1": self.N1, "w": self.w, "path": self.path}

    def _close_fd(self) -> None:
        if self._fd is not None and self._own:
            with contextlib.suppress(OSError):
                os.close(self._fd)
        self._fd = None


class FileStore(_WorkFile):
    """The N2 x N1 complex array in a file, stored as N1 / w column blocks ("slabs") of w
    columns, each an N2 x w row-major array. A slab is one contiguous read or write; a block
    of rows is one contiguous piece per slab. Only explicit reads and writes (no mapping), so
    the file's pages never count as this process's memory.

    When a row's piece of a slab is a multiple of :data:`_ALIGN` bytes and the file system
    accepts it, every transfer is direct (O_DIRECT, see :data:`DIRECT_IO`) through buffers
    aligned to :data:`_ALIGN` (an unaligned array is copied into one first), so the work file
    does not pass through the page cache; each request is split into up to
    :data:`_IO_THREADS` concurrent transfers."""

    def __init__(self, N2: int, N1: int, w: int, *, path: str | None = None,
                 fd: int | None = None, create: bool = False) -> None:
        self.N2, self.N1, self.w, self.path = N2, N1, w, path
        self.size = _C * N1 * N2
        self._own = fd is None
        self._fd = fd
        self._dfd: int | None | bool = None  # None: not tried yet; False: not available
        self._refused = False  # direct transfers refused: buffered from then on
        if create:
            # Reserve the space now: a full disk is then an error before any work is done.
            os.posix_fallocate(self.fd, 0, self.size)

    @property
    def direct(self) -> bool:
        """True when the transfers bypass the page cache (decided on first use)."""
        return self._io_fd() != self.fd

    def _io_fd(self) -> int:
        """The descriptor every transfer uses: a direct one where possible, else :attr:`fd`.
        All transfers of one store use the same one (no mixing of cached and direct I/O)."""
        if self._dfd is None:
            with _open_lock:  # (two transfer threads may ask first at once)
                if self._dfd is None:
                    self._dfd = self._open_direct()
        return self._dfd if self._dfd is not False and not self._refused else self.fd

    def _open_direct(self) -> int | bool:
        """A second descriptor of the file opened for direct I/O, or False where the layout is
        not aligned or the file system refuses (e.g. tmpfs)."""
        flag = getattr(os, "O_DIRECT", 0)
        if not (DIRECT_IO and flag and (self.w * _C) % _ALIGN == 0):
            return False
        where = self.path if self.path is not None else f"/proc/self/fd/{self.fd}"
        try:
            return os.open(where, os.O_RDWR | flag)
        except OSError:
            return False

    def __setstate__(self, st: dict) -> None:
        self.N2, self.N1, self.w, self.path = st["N2"], st["N1"], st["w"], st["path"]
        self.size = _C * self.N1 * self.N2
        self._own, self._fd, self._dfd, self._refused = True, None, None, False

    def _slab_offset(self, q: int) -> int:
        return q * self.N2 * self.w * _C

    def _empty(self, shape: tuple[int, ...]) -> np.ndarray:
        return aligned_empty(shape, np.complex128)

    def _staged(self, v: np.ndarray) -> np.ndarray:
        """``v`` itself if a transfer can use it as it is, else an aligned contiguous copy."""
        if v.flags.c_contiguous and (not self.direct or v.ctypes.data % _ALIGN == 0):
            return v
        out = self._empty(v.shape)
        out[...] = v
        return out

    def _contiguous(self, fn: Any, buf: np.ndarray, off: int) -> None:
        """Move one contiguous buffer at ``off``, in up to _IO_THREADS aligned parts at once."""
        raw = memoryview(buf).cast("B")
        n = len(raw)
        part = max(_ALIGN, -(-n // _IO_THREADS // _ALIGN) * _ALIGN)
        self._transfer(lambda fd, a: fn(fd, np.frombuffer(raw[a:a + part], dtype=np.uint8),
                                        off + a, self.fd), range(0, n, part))

    def _by_slab(self, fn: Any, v: np.ndarray, r0: int) -> None:
        """Rows r0 .. r0 + len(v) - 1: one vectored transfer per slab (each row's piece of a
        slab is contiguous in the file and in ``v``), slabs moved concurrently."""
        w = self.w
        self._transfer(lambda fd, q: fn(fd, [v[i, q * w:(q + 1) * w] for i in range(v.shape[0])],
                                        self._slab_offset(q) + r0 * w * _C, self.fd),
                       range(self.N1 // w))

    def _transfer(self, each: Any, items: Any) -> None:
        """each(fd, item) for every item, concurrently. A file system that accepts a direct
        descriptor but refuses its transfers (EINVAL, e.g. for a stricter alignment) loses it:
        the request is redone buffered (the same bytes at the same offsets), and so is every
        later one."""
        items = list(items)
        fd = self._io_fd()
        try:
            _io_map(lambda it: each(fd, it), items)
        except OSError as exc:
            if fd == self.fd or exc.errno != errno.EINVAL:
                raise
            self._refused = True
            _io_map(lambda it: each(self.fd, it), items)

    def rows(self, r0: int, r1: int) -> np.ndarray:
        out = self._empty((r1 - r0, self.N1))
        self._by_slab(_preadv_all, out, r0)
        return out

    def put_rows(self, r0: int, v: np.ndarray) -> None:
        self._by_slab(_pwritev_all, self._staged(v), r0)

    def cols(self, c0: int, c1: int, nrows: int | None = None) -> np.ndarray:
        """Columns [c0, c1) (one whole slab), rows 0 .. nrows - 1 (default all)."""
        if c0 % self.w or c1 - c0 != self.w:
            raise ValueError("column blocks must be whole slabs")
        out = self._empty((self.N2 if nrows is None else nrows, self.w))
        self._contiguous(_pread_all, out, self._slab_offset(c0 // self.w))
        return out

    def cols_into(self, c0: int, out: np.ndarray) -> None:
        """Rows 0 .. len(out) - 1 of the slab starting at column c0, read into ``out``."""
        buf = self._staged(out) if out.flags.c_contiguous else self._empty(out.shape)
        self._contiguous(_pread_all, buf, self._slab_offset(c0 // self.w))
        if buf is not out:
            out[...] = buf

    def put_cols(self, c0: int, v: np.ndarray) -> None:
        self._contiguous(_pwrite_all, self._staged(v), self._slab_offset(c0 // self.w))

    def close(self) -> None:
        if self._dfd is not None and self._dfd is not False:
            with contextlib.suppress(OSError):
                os.close(self._dfd)
        self._dfd = None
        self._close_fd()


def aligned_empty(shape: tuple[int, ...], dtype: Any) -> np.ndarray:
    """An uninitialised C-contiguous array whose data starts on an :data:`_ALIGN` boundary."""
    dtype = np.dtype(dtype)
    nbytes = math.prod(shape) * dtype.itemsize
    raw = np.empty(nbytes + _ALIGN, dtype=np.uint8)
    off = (-raw.ctypes.data) % _ALIGN
    return raw[off: off + nbytes].view(dtype).reshape(shape)


_io_pool: Any = None
_open_lock = threading.Lock()


def _io_map(fn: Any, items: Any) -> None:
    """fn(item) for every item, up to :data:`_IO_THREADS` at once (the transfers release the
    GIL); the first exception is raised once all have ended."""
    global _io_pool
    items = list(items)
    if len(items) <= 1:
        for it in items:
            fn(it)
        return
    if _io_pool is None or _io_pool[0] != os.getpid():  # (a forked child has no threads)
        from concurrent.futures import ThreadPoolExecutor

        _io_pool = (os.getpid(),
                    ThreadPoolExecutor(max_workers=_IO_THREADS, thread_name_prefix="dicert-io"))
    from concurrent.futures import wait

    futures = [_io_pool[1].submit(fn, it) for it in items]
    wait(futures)
    for f in futures:
        f.result()


def _anonymous_fd(temp_dir: Any) -> int:
    """An open private temporary file with no name (nothing is left behind, even if the
    process dies)."""
    fh = tempfile.TemporaryFile(prefix=".dicert-extract-", dir=temp_dir)
    try:
        fd = os.dup(fh.fileno())
    finally:
        fh.close()
    os.fchmod(fd, 0o600)
    return fd


def open_store(plan: FourStepPlan, rows: int, temp_dir: Any = None) -> ArrayStore | FileStore:
    """A fresh zeroed store of ``rows`` x N1: in memory if the whole array fits a quarter of
    the budget, else an anonymous temporary file."""
    if plan.in_memory:
        return ArrayStore(rows, plan.N1)
    store = FileStore(rows, plan.N1, plan.slab, fd=_anonymous_fd(temp_dir), create=True)
    store._own = True
    return store


def named_store(plan: FourStepPlan, rows: int, temp_dir: Any) -> FileStore:
    """A fresh zeroed store in a named private file (for workers that open it by path)."""
    fd, path = tempfile.mkstemp(prefix=".dicert-extract-", suffix=".part", dir=temp_dir)
    os.close(fd)
    return FileStore(rows, plan.N1, plan.slab, path=path, create=True)


class PackedStore(_WorkFile):
    """s' and x packed 8 positions per byte, in the slab layout of :class:`FileStore`
    (slab q, row j2: w / 8 bytes), so a column block is one contiguous read: L / 4 bytes in
    all, in memory or in a private file."""

    def __init__(self, plan: FourStepPlan, *, path: str | None = None, fd: int | None = None,
                 memory: bool = False) -> None:
        self.N2, self.N1, self.w, self.path = plan.N2, plan.N1, plan.slab, path
        self.S = self.N1 // self.w
        self.part = self.N2 * self.w // 8  # bytes of one slab of one source
        self.mem = np.zeros(2 * self.S * self.part, dtype=np.uint8) if memory else None
        self._fd = fd
        self._own = True

    def __setstate__(self, st: dict) -> None:
        self.N2, self.N1, self.w, self.path = st["N2"], st["N1"], st["w"], st["path"]
        self.S, self.part = self.N1 // self.w, self.N2 * self.w // 8
        self.mem, self._fd, self._own = None, None, True

    def put_rows(self, r0: int, sp: np.ndarray, xp: np.ndarray) -> None:
        """Rows r0 .. r0 + len - 1, each given as N1 / 8 packed bytes per source."""
        wb = self.w // 8
        for k, rows in enumerate((sp, xp)):
            for q in range(self.S):
                off = (k * self.S + q) * self.part + r0 * wb
                chunk = np.ascontiguousarray(rows[:, q * wb:(q + 1) * wb]).reshape(-1)
                if self.mem is not None:
                    self.mem[off: off + chunk.size] = chunk
                else:
                    _pwrite_all(self.fd, chunk, off)

    def slab(self, q: int) -> tuple[np.ndarray, np.ndarray]:
        """The packed s' and x of slab q, each N2 x w / 8 bytes."""
        out = []
        for k in (0, 1):
            off = (k * self.S + q) * self.part
            if self.mem is not None:
                a = self.mem[off: off + self.part]
            else:
                a = np.empty(self.part, dtype=np.uint8)
                _pread_all(self.fd, a, off)
            out.append(a.reshape(self.N2, self.w // 8))
        return out[0], out[1]

    def close(self) -> None:
        self._close_fd()


# A transfer may move fewer bytes than asked (POSIX allows it); the rest then goes through
# ``rest`` (the store's buffered descriptor), since on a direct descriptor the remainder's offset
# and length need not be aligned. Linux keeps the two coherent: a direct read first writes back
# cached pages of its range, and a direct write drops them.


def _pread_all(fd: int, buf: np.ndarray, off: int, rest: int | None = None) -> None:
    view = memoryview(buf).cast("B")
    pos = 0
    while pos < len(view):
        got = os.preadv(fd if pos == 0 or rest is None else rest, [view[pos:]], off + pos)
        if got <= 0:
            raise OSError("short read from the extractor's work file")
        pos += got


def _iov_chunks(parts: list[np.ndarray]) -> list[list[memoryview]]:
    views = [memoryview(p).cast("B") for p in parts]
    step = max(1, min(512, os.sysconf("SC_IOV_MAX") if hasattr(os, "sysconf") else 512))
    return [views[i:i + step] for i in range(0, len(views), step)]


def _vectored_all(vectored, single, fd: int, parts: list[np.ndarray], off: int,
                  rest: int | None = None) -> None:
    """Move consecutive bytes at ``off`` to or from the (contiguous) arrays ``parts`` in turn
    with ``vectored`` (os.preadv / os.pwritev); a short transfer is finished piece by piece
    with ``single`` (_pread_all / _pwrite_all) on ``rest`` (default ``fd``)."""
    rest = fd if rest is None else rest
    for group in _iov_chunks(parts):
        want = sum(len(v) for v in group)
        got = vectored(fd, group, off)
        if got != want:
            pos = 0
            for v in group:
                if pos + len(v) > got:
                    start = max(0, got - pos)
                    single(rest, np.frombuffer(v, dtype=np.uint8)[start:], off + pos + start)
                pos += len(v)
        off += want


def _preadv_all(fd: int, parts: list[np.ndarray], off: int, rest: int | None = None) -> None:
    """Read consecutive bytes at ``off`` into the (contiguous) arrays ``parts`` in turn."""
    _vectored_all(os.preadv, _pread_all, fd, parts, off, rest)


def _pwritev_all(fd: int, parts: list[np.ndarray], off: int, rest: int | None = None) -> None:
    """Write the (contiguous) arrays ``parts`` one after the other from ``off``."""
    _vectored_all(os.pwritev, _pwrite_all, fd, parts, off, rest)


def _pwrite_all(fd: int, buf: np.ndarray, off: int, rest: int | None = None) -> None:
    view = memoryview(np.ascontiguousarray(buf)).cast("B")
    pos = 0
    while pos < len(view):
        pos += os.pwrite(fd if pos == 0 or rest is None else rest, view[pos:], off + pos)


def open_packed(plan: FourStepPlan, temp_dir: Any = None, *, named: bool = False) -> PackedStore:
    if plan.in_memory and not named:
        return PackedStore(plan, memory=True)
    if named:
        fd, path = tempfile.mkstemp(prefix=".dicert-extract-", suffix=".part", dir=temp_dir)
        os.posix_fallocate(fd, 0, plan.L // 4)
        os.close(fd)
        return PackedStore(plan, path=path)
    fd = _anonymous_fd(temp_dir)
    os.posix_fallocate(fd, 0, plan.L // 4)
    return PackedStore(plan, fd=fd)
