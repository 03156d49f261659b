"""Toeplitz middle product by one long cyclic convolution, computed by the four-step FFT.

Used by :mod:`dicert.extract` for large inputs. The whole convolution is ONE complex FFT of
length L = N1 * N2 >= n + m - 1, so the cost grows like (n + m) log(n + m), and it is computed
through blocks of bounded size:

* The data is an N2 x N1 array (row j2 holds positions j2*N1 .. j2*N1 + N1 - 1), held in memory
  when small and otherwise in a private temporary file (mode 0600, unlinked or removed when
  done); only one block of rows or of columns is in memory at a time.
* Forward transform (Bailey, "FFTs in external or hierarchical memory", J. Supercomputing 4,
  23-35, 1990): FFTs of length N2 down each column, multiplication by the twiddle factors
  w**(j1*k2) with w = exp(-2 pi i / L), FFTs of length N1 along each row. Row k2, column k1
  then holds the spectrum at frequency k2 + N2*k1 (a permuted order, which is all a
  convolution needs).
* Both real sequences ride in one complex vector z = s' + i x (s' the seed placed so that the
  wanted outputs land at positions 0 .. m-1, see :func:`fill_rows`); with Z its transform, the
  product of the two real spectra is P(k) = (Z(k)^2 - conj(Z(-k))^2) / (4i) (common practice:
  the "two real FFTs for the price of one complex FFT" identity). Frequency -k sits in row
  (N2 - k2) mod N2, so rows are processed in pairs.
* The inverse runs the same steps backwards with conjugate twiddles.

Every piece (a block of rows or columns) is independent within its pass, which is what lets
the passes run as tasks on a cluster (:mod:`dicert.cluster`) with the array in a file all
workers see.

Exactness: the values are integers in [0, min(n, m)]; each is rounded and the largest distance
from an integer is returned, so the caller can apply its rounding guard.
"""

from __future__ import annotations

import contextlib
import dataclasses
import math
import mmap
import os
import tempfile
from typing import Any

import numpy as np

#: Bytes per complex value of the working array.
_C = 16
#: Target size in bytes of one block of rows or columns.
_PIECE = 4 << 20


@dataclasses.dataclass(frozen=True, slots=True)
class FourStepPlan:
    n: int
    m: int
    N1: int  # row length (power of two >= 8)
    N2: int  # column length (5-smooth)
    slab: int  # columns per column block (power of two >= 8 dividing N1)
    rows: int  # row pairs per row block
    fill: int  # rows per block when filling
    in_memory: bool
    packed: bool  # keep the packed input and rotated seed (L / 4 bytes) in memory

    @property
    def L(self) -> int:
        return self.N1 * self.N2


def plan_four_step(n: int, m: int, budget: int, row_length: int | None = None) -> FourStepPlan:
    """Shape of the computation for input n, output m and a memory budget in bytes."""
    from dicert.extract import _fast_length

    total = n + m - 1
    if row_length is None:
        N1 = 1 << max(9, min(17, math.ceil(math.log2(math.sqrt(8 * total)))))
    else:
        N1 = int(row_length)
        if N1 < 8 or N1 & (N1 - 1):
            raise ValueError("row_length must be a power of two >= 8")
    N2 = _fast_length(-(-total // N1))
    # Blocks of a few MB (cache-friendly; measured faster than larger ones), within the budget.
    piece = min(_PIECE, budget // 8)
    slab = 1 << max(3, min(N1.bit_length() - 1, (piece // (_C * N2)).bit_length() - 1))
    rows = max(1, piece // (_C * N1))
    fill = max(1, budget // (6 * 8 * N1))
    L = N1 * N2
    in_memory = _C * L <= budget // 4
    # The packed input and rotated seed in memory save one write and one read of the work
    # array; kept to an eighth of the budget so memory stays flat as the input grows.
    packed = L // 4 <= budget // 8
    return FourStepPlan(n=n, m=m, N1=N1, N2=N2, slab=slab, rows=rows, fill=fill,
                        in_memory=in_memory, packed=packed)


# --------------------------------------------------------------------------- storage


class ArrayStore:
    """The N2 x N1 complex array in memory."""

    def __init__(self, N2: int, N1: int) -> None:
        self.a = np.zeros((N2, N1), dtype=np.complex128)

    def rows(self, r0: int, r1: int) -> np.ndarray:
        return self.a[r0:r1].copy()

    def put_rows(self, r0: int, v: np.ndarray) -> None:
        self.a[r0:r0 + v.shape[0]] = v

    def cols(self, c0: int, c1: int) -> np.ndarray:
        return self.a[:, c0:c1].copy()

    def put_cols(self, c0: int, v: np.ndarray) -> None:
        self.a[:, c0:c0 + v.shape[1]] = v

    def close(self) -> None:
        pass


class FileStore:
    """The N2 x N1 complex array in a file, stored as N1 / w column blocks ("slabs") of w
    columns, each an N2 x w row-major array. A slab is one contiguous read or write; a block
    of rows is one contiguous piece per slab. Only explicit reads and writes (no mapping), so
    the file's pages never count as this process's memory."""

    def __init__(self, N2: int, N1: int, w: int, *, path: str | None = None,
                 fd: int | None = None, create: bool = False) -> None:
        self.N2, self.N1, self.w, self.path = N2, N1, w, path
        self.size = _C * N1 * N2
        self._own = fd is None
        self._fd = fd
        if create:
            # Reserve the space now: a full disk is then an error before any work is done.
            os.posix_fallocate(self.fd, 0, self.size)

    @property
    def fd(self) -> int:
        if self._fd is None:  # opened on first use (a copy sent to a worker opens its own)
            self._fd = os.open(self.path, os.O_RDWR)
        return self._fd

    def __getstate__(self) -> dict:
        if self.path is None:
            raise TypeError("an anonymous temporary file cannot be shared with other processes")
        return {"N2": self.N2, "N1": self.N1, "w": self.w, "path": self.path}

    def __setstate__(self, st: dict) -> None:
        self.N2, self.N1, self.w, self.path = st["N2"], st["N1"], st["w"], st["path"]
        self.size = _C * self.N1 * self.N2
        self._own, self._fd = True, None

    def _read(self, buf: np.ndarray, off: int) -> None:
        view = memoryview(buf).cast("B")
        pos = 0
        while pos < len(view):
            got = os.preadv(self.fd, [view[pos:]], off + pos)
            if got <= 0:
                raise OSError("short read from the extractor's work file")
            pos += got

    def _write(self, buf: np.ndarray, off: int) -> None:
        view = memoryview(np.ascontiguousarray(buf)).cast("B")
        pos = 0
        while pos < len(view):
            pos += os.pwrite(self.fd, view[pos:], off + pos)

    def _slab_offset(self, q: int) -> int:
        return q * self.N2 * self.w * _C

    def rows(self, r0: int, r1: int) -> np.ndarray:
        S, w = self.N1 // self.w, self.w
        buf = np.empty((S, r1 - r0, w), dtype=np.complex128)
        for q in range(S):
            self._read(buf[q], self._slab_offset(q) + r0 * w * _C)
        return np.ascontiguousarray(buf.transpose(1, 0, 2)).reshape(r1 - r0, self.N1)

    def put_rows(self, r0: int, v: np.ndarray) -> None:
        w = self.w
        for q in range(self.N1 // w):
            self._write(v[:, q * w:(q + 1) * w], self._slab_offset(q) + r0 * w * _C)

    def cols(self, c0: int, c1: int) -> np.ndarray:
        if c0 % self.w or c1 - c0 != self.w:
            raise ValueError("column blocks must be whole slabs")
        out = np.empty((self.N2, self.w), dtype=np.complex128)
        self._read(out, self._slab_offset(c0 // self.w))
        return out

    def put_cols(self, c0: int, v: np.ndarray) -> None:
        self._write(v, self._slab_offset(c0 // self.w))

    def close(self) -> None:
        if self._fd is not None and self._own:
            with contextlib.suppress(OSError):
                os.close(self._fd)
        self._fd = None


def open_store(plan: FourStepPlan, temp_dir: Any = None) -> ArrayStore | FileStore:
    """A fresh zeroed store: in memory if it fits a quarter of the budget, else an anonymous
    temporary file (no name on disk, so nothing is left behind even if the process dies)."""
    if plan.in_memory:
        return ArrayStore(plan.N2, plan.N1)
    fh = tempfile.TemporaryFile(prefix=".dicert-extract-", dir=temp_dir)
    try:
        fd = os.dup(fh.fileno())
    finally:
        fh.close()
    os.fchmod(fd, 0o600)
    store = FileStore(plan.N2, plan.N1, plan.slab, fd=fd, create=True)
    store._own = True
    return store


def named_store(plan: FourStepPlan, temp_dir: Any) -> FileStore:
    """A fresh zeroed store in a named private file (for workers that open it by path)."""
    fd, path = tempfile.mkstemp(prefix=".dicert-extract-", suffix=".part", dir=temp_dir)
    os.close(fd)
    return FileStore(plan.N2, plan.N1, plan.slab, path=path, create=True)


# --------------------------------------------------------------------------- twiddles


def _twiddle(t: np.ndarray, c0: int, L: int, sign: int) -> None:
    """t[k2, j1 - c0] *= exp(sign * 2 pi i * (j1 * k2 mod L) / L), in place.

    With k2 = h * S + l the factor is the product of exp(.. (j1 * h * S mod L) ..) and
    exp(.. (j1 * l mod L) ..), each from an exactly reduced integer angle (error ~2 ulp).
    """
    N2, w = t.shape
    S = min(64, N2 & -N2)  # a power of two dividing N2
    j = np.arange(c0, c0 + w, dtype=np.int64)[None, :]
    hi = np.arange(N2 // S, dtype=np.int64)[:, None] * S
    lo = np.arange(S, dtype=np.int64)[:, None]
    v = t.reshape(N2 // S, S, w)
    v *= np.exp((sign * 2j * np.pi / L) * ((j * hi) % L))[:, None, :]
    v *= np.exp((sign * 2j * np.pi / L) * ((j * lo) % L))[None, :, :]


# --------------------------------------------------------------------------- passes


def _window(plan: FourStepPlan, x: Any, s: Any, P0: int, cnt: int) -> tuple[np.ndarray, np.ndarray]:
    """Positions [P0, P0 + cnt) of s' and of x as 0/1 uint8 arrays.

    x[p] for p < n; the seed is rotated by n - 1 places so that position p holds
    s[(p + n - 1) mod L] where that index is below n + m - 1 (else 0). Then the cyclic
    convolution c'(p) = sum_j x[j] s'((p - j) mod L) equals sum_j s[p - j + n - 1] x[j] for
    0 <= p < m with no wrap-around, i.e. the wanted output y[p].
    """
    n, m, L = plan.n, plan.m, plan.L
    re = np.zeros(cnt, dtype=np.uint8)
    im = np.zeros(cnt, dtype=np.uint8)
    # (source, destination, first position, last position + 1, source index minus position)
    for src, part, lo, hi, shift in ((s, re, 0, m, n - 1), (s, re, L - n + 1, L, n - 1 - L),
                                     (x, im, 0, n, 0)):
        a, b = max(lo, P0), min(hi, P0 + cnt)
        if a < b:
            i0, i1 = a + shift, b + shift
            raw = src.read_bytes(i0 // 8, -(-i1 // 8))
            part[a - P0: b - P0] = np.unpackbits(raw)[i0 % 8: i0 % 8 + (b - a)]
    return re, im


def fill_rows(plan: FourStepPlan, x: Any, s: Any, store: Any, r0: int, r1: int) -> None:
    """Rows [r0, r1) of z = s' + i x (see :func:`_window`)."""
    N1 = plan.N1
    re, im = _window(plan, x, s, r0 * N1, (r1 - r0) * N1)
    z = np.empty(re.size, dtype=np.complex128)
    z.real = re
    z.imag = im
    store.put_rows(r0, z.reshape(r1 - r0, N1))


def packed_sources(plan: FourStepPlan, x: Any, s: Any) -> tuple[np.ndarray, np.ndarray]:
    """s' and x over all L positions, packed 8 per byte (L / 4 bytes in all)."""
    L = plan.L
    sp = np.empty(L // 8, dtype=np.uint8)
    xp = np.empty(L // 8, dtype=np.uint8)
    step = 1 << 24
    for P0 in range(0, L, step):
        re, im = _window(plan, x, s, P0, min(step, L - P0))
        sp[P0 // 8: (P0 + re.size) // 8] = np.packbits(re)
        xp[P0 // 8: (P0 + im.size) // 8] = np.packbits(im)
    return sp, xp


def columns_first(plan: FourStepPlan, packed: tuple[np.ndarray, np.ndarray], dst: Any,
                  c0: int, c1: int, workers: int = 1) -> None:
    """Like :func:`columns_forward`, reading columns [c0, c1) of z from the packed bits."""
    import scipy.fft as sfft

    sp, xp = packed
    N2, N1 = plan.N2, plan.N1
    t = np.empty((N2, c1 - c0), dtype=np.complex128)
    t.real = np.unpackbits(sp.reshape(N2, N1 // 8)[:, c0 // 8: c1 // 8], axis=1)
    t.imag = np.unpackbits(xp.reshape(N2, N1 // 8)[:, c0 // 8: c1 // 8], axis=1)
    t = sfft.fft(t, axis=0, overwrite_x=True, workers=workers)
    _twiddle(t, c0, plan.L, -1)
    dst.put_cols(c0, t)


def columns_forward(plan: FourStepPlan, src: Any, dst: Any, c0: int, c1: int,
                    workers: int = 1) -> None:
    """Length-N2 FFTs of columns [c0, c1), times the twiddles w**(j1*k2)."""
    import scipy.fft as sfft

    t = sfft.fft(src.cols(c0, c1), axis=0, overwrite_x=True, workers=workers)
    _twiddle(t, c0, plan.L, -1)
    dst.put_cols(c0, t)


def _product(Z: np.ndarray, partner: np.ndarray) -> np.ndarray:
    """Z^2 - conj(partner)^2: 4i times the spectrum of s' * x from that of s' + i x (the
    factor is removed at the end, where the output is 0.25 * the imaginary part)."""
    out = np.conj(partner)
    d = Z - out
    out += Z
    out *= d
    return out


def rows_middle(plan: FourStepPlan, src: Any, dst: Any, r0: int, r1: int,
                workers: int = 1) -> None:
    """Row FFTs, spectrum product, inverse row FFTs, for lead rows [r0, r1).

    Lead rows are 0 .. N2 // 2; row r pairs with row (N2 - r) mod N2, which holds the
    frequencies -k of row r (reversed; row 0 and, for even N2, row N2/2 pair with themselves).
    """
    import scipy.fft as sfft

    N2 = plan.N2
    for r in ((0, N2 // 2) if N2 % 2 == 0 and N2 > 1 else (0,)):
        if r0 <= r < r1:
            Z = sfft.fft(src.rows(r, r + 1)[0], workers=workers)
            partner = np.roll(Z[::-1], 1) if r == 0 else Z[::-1]
            dst.put_rows(r, sfft.ifft(_product(Z, partner), workers=workers)[None, :])
    lo = max(r0, 1)
    hi = min(r1, (N2 + 1) // 2)  # lead rows with a distinct partner: 1 .. ceil(N2/2) - 1
    if hi <= lo:
        return
    X = sfft.fft(src.rows(lo, hi), axis=1, overwrite_x=True, workers=workers)
    Y = sfft.fft(src.rows(N2 - hi + 1, N2 - lo + 1)[::-1], axis=1, overwrite_x=True,
                 workers=workers)
    PX = _product(X, Y[:, ::-1])
    PY = _product(Y, X[:, ::-1])
    del X, Y
    dst.put_rows(lo, sfft.ifft(PX, axis=1, overwrite_x=True, workers=workers))
    del PX
    dst.put_rows(N2 - hi + 1, sfft.ifft(PY, axis=1, overwrite_x=True, workers=workers)[::-1])


def columns_inverse(plan: FourStepPlan, src: Any, c0: int, c1: int,
                    workers: int = 1) -> tuple[np.ndarray, float]:
    """Conjugate twiddles and inverse column FFTs of columns [c0, c1); returns the packed
    output bits of those columns for rows 0 .. J-1 (J = ceil(m / N1)), shape (J, (c1-c0)/8),
    and the largest distance of a wanted value from an integer."""
    import scipy.fft as sfft

    N1, m = plan.N1, plan.m
    J = -(-m // N1)
    t = src.cols(c0, c1)
    _twiddle(t, c0, plan.L, +1)
    t = sfft.ifft(t, axis=0, overwrite_x=True, workers=workers)
    vals = 0.25 * t.imag[:J]  # (J, w): position j2*N1 + c0 + col
    del t
    pos = (np.arange(J, dtype=np.int64) * N1)[:, None] + np.arange(c0, c1)[None, :]
    wanted = pos < m
    r = np.rint(vals)
    dev = np.abs(vals - r)
    dev = float(dev[wanted].max()) if wanted.any() else 0.0
    if not math.isfinite(dev):
        dev = math.inf
    bits = (r.astype(np.int64) & 1).astype(np.uint8)
    bits[~wanted] = 0
    return np.packbits(bits, axis=1), dev


# --------------------------------------------------------------------------- local driver


def run_local(plan: FourStepPlan, x: Any, s: Any, *, workers: int = 1, temp_dir: Any = None,
              progress: Any = None) -> tuple[bytes, float, int]:
    """The whole computation in this process; returns (output bytes, max deviation, pieces)."""
    N1, N2, m = plan.N1, plan.N2, plan.m
    fills = [(r, min(r + plan.fill, N2)) for r in range(0, N2, plan.fill)]
    slabs = [(c, min(c + plan.slab, N1)) for c in range(0, N1, plan.slab)]
    leads = N2 // 2 + 1
    rowblocks = [(r, min(r + plan.rows, leads)) for r in range(0, leads, plan.rows)]
    total = len(fills) + 2 * len(slabs) + len(rowblocks)
    done = 0

    def tick() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)

    packed = packed_sources(plan, x, s) if plan.packed else None
    if packed is not None:
        total -= len(fills)
    # Two work files: a pass never overwrites the pages it just wrote, which the kernel may be
    # writing back to disk (overwriting those can stall); in memory one array is enough.
    stores: list[Any] = []
    try:
        stores.append(open_store(plan, temp_dir))
        stores.append(stores[0] if plan.in_memory else open_store(plan, temp_dir))
        a, b = stores
        if packed is None:
            for r0, r1 in fills:
                fill_rows(plan, x, s, b, r0, r1)
                tick()
        for c0, c1 in slabs:
            if packed is None:
                columns_forward(plan, b, a, c0, c1, workers)
            else:
                columns_first(plan, packed, a, c0, c1, workers)
            tick()
        del packed
        for r0, r1 in rowblocks:
            rows_middle(plan, a, b, r0, r1, workers)
            tick()
        out, dev = assemble(plan, (columns_inverse(plan, b, c0, c1, workers)
                                   for c0, c1 in slabs), slabs, tick)
    finally:
        for st in stores:
            st.close()
    return out, dev, total


def assemble(plan: FourStepPlan, pieces: Any, slabs: list[tuple[int, int]],
             tick: Any = None) -> tuple[bytes, float]:
    J = -(-plan.m // plan.N1)
    out = np.zeros((J, plan.N1 // 8), dtype=np.uint8)
    dev = 0.0
    for (c0, c1), (packed, d) in zip(slabs, pieces, strict=True):
        out[:, c0 // 8: c1 // 8] = packed
        dev = max(dev, d)
        if tick is not None:
            tick()
    return out.reshape(-1)[: -(-plan.m // 8)].tobytes(), dev
