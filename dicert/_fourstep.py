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
  wanted outputs land at positions 0 .. m-1, see :func:`_window`); with Z its transform, the
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

import dataclasses
import math
from typing import Any

import numpy as np

from dicert._workfile import (  # noqa: F401  (named_store: re-exported for dicert.cluster)
    _C,
    PackedStore,
    aligned_empty,
    named_store,
    open_packed,
    open_store,
)

#: Target size in bytes of one block of rows (the middle pass holds up to six at once: three
#: pieces in flight, each with its lead rows, replaced by the result, and their partners).
_PIECE = 32 << 20
#: Target size in bytes of one block of columns, a slab (the column passes hold up to three).
#: Wide slabs make the middle pass's transfers large: a block of rows is one piece of
#: rows x slab values per slab (256 KB for the 2e8-trial certify at the default budget), and
#: direct transfers of a few hundred KB or more are needed to reach the disk's rate.
_SLAB_PIECE = 64 << 20
#: Columns per cache-sized tile of the column FFTs (a multiple of 8).
_TILE = 16


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

    @property
    def H(self) -> int:
        """Rows 0 .. H of the product are stored; the others follow by symmetry."""
        return self.N2 // 2

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
    # Blocks of a fixed size (not growing with n, so memory stays flat), within the budget:
    # three slabs or six blocks of rows at once (see _PIECE and _SLAB_PIECE).
    piece = max(1, min(_PIECE, budget // 12))
    slab_piece = max(1, min(_SLAB_PIECE, budget // 4))
    slab = 1 << max(3, min(N1.bit_length() - 1, (slab_piece // (_C * N2)).bit_length() - 1))
    rows = max(1, piece // (_C * N1))
    fill = max(1, min(N2, piece // (4 * N1)))
    in_memory = _C * N1 * N2 <= budget // 4
    return FourStepPlan(n=n, m=m, N1=N1, N2=N2, slab=slab, rows=rows, fill=fill,
                        in_memory=in_memory)


def pack_sources(plan: FourStepPlan, x: Any, s: Any, dst: PackedStore, r0: int,
                 r1: int) -> None:
    """Rows [r0, r1) of s' and x (see :func:`_window`) into the packed store."""
    N1 = plan.N1
    re, im = _window(plan, x, s, r0 * N1, (r1 - r0) * N1)
    dst.put_rows(r0, np.packbits(re).reshape(r1 - r0, N1 // 8),
                 np.packbits(im).reshape(r1 - r0, N1 // 8))


# --------------------------------------------------------------------------- twiddles


def _roots(r: np.ndarray, L: int, sign: int) -> np.ndarray:
    """exp(sign * 2 pi i r / L) for integers 0 <= r < L (L a multiple of 8), accurate to
    about one unit in the last place.

    The angle is never formed as a float multiple of 2 pi / L up to 2 pi (whose rounding
    error grows with the angle): r is split exactly into a quadrant and an angle in
    [0, pi/4] (common practice: octant reduction by the symmetries of sine and cosine), whose
    cosine and sine are exact to an ulp, and the quadrant is applied by exact swaps.
    """
    r = np.asarray(r, dtype=np.int64)
    Q = L // 4
    k = r // Q  # quadrant 0 .. 3
    rr = r - k * Q  # in [0, L/4)
    far = 2 * rr > Q  # beyond the octant: use the complementary angle
    a = (2 * np.pi / L) * np.where(far, Q - rr, rr)  # in [0, pi/4]
    c, s = np.cos(a), np.sin(a)
    c, s = np.where(far, s, c), np.where(far, c, s)  # cos, sin of 2 pi rr / L
    # times i**k: (c + i s) -> (-s + i c) -> (-c - i s) -> (s - i c)
    re = np.choose(k, (c, -s, -c, s))
    im = np.choose(k, (s, c, -s, -c))
    return re + (1j * sign) * im


def _near_root_divisor(N: int) -> int:
    """The divisor of N closest to sqrt(N) (from below), so that the two twiddle tables of
    :class:`_Twiddles` have about sqrt(N) rows each. (A power-of-two split fails for the
    5-smooth column lengths with few factors of 2, e.g. 3645 = 5 * 3**6, where one table held
    every factor and cost one cosine and sine per element.)"""
    best = 1
    for d in range(1, math.isqrt(N) + 1):
        if N % d == 0:
            best = d
    return best


class _Twiddles:
    """The twiddle factors exp(sign * 2 pi i * (j1 * k2 mod L) / L) of the columns
    j1 in [c0, c0 + w), all rows k2, as two small tables: with k2 = h * S + l (S a divisor of
    N2 near its square root, see :func:`_near_root_divisor`) the factor is
    the product of exp(.. (j1 * h * S mod L) ..) and exp(.. (j1 * l mod L) ..), each from an
    exactly reduced integer (see :func:`_roots`; error ~1 ulp each, ~2 ulp for the product).
    Computed once per slab, applied tile by tile."""

    def __init__(self, N2: int, c0: int, w: int, L: int, sign: int) -> None:
        self.S = S = _near_root_divisor(N2)
        self.c0 = c0
        j = np.arange(c0, c0 + w, dtype=np.int64)[None, :]
        hi = np.arange(N2 // S, dtype=np.int64)[:, None] * S
        lo = np.arange(S, dtype=np.int64)[:, None]
        self.hi = _roots((j * hi) % L, L, sign)
        self.lo = _roots((j * lo) % L, L, sign)

    def apply(self, t: np.ndarray, c: int) -> None:
        """t (all rows, columns [c, c + t.shape[1]) of the slab's) *= the factors, in place."""
        N2, w = t.shape
        a, b = c - self.c0, c - self.c0 + w
        v = t.reshape(N2 // self.S, self.S, w)
        v *= self.hi[:, None, a:b]
        v *= self.lo[None, :, a:b]


def _twiddle(t: np.ndarray, c0: int, L: int, sign: int) -> None:
    """t[k2, j1 - c0] *= exp(sign * 2 pi i * (j1 * k2 mod L) / L), in place (see
    :class:`_Twiddles`)."""
    _Twiddles(t.shape[0], c0, t.shape[1], L, sign).apply(t, c0)


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


def columns_first(plan: FourStepPlan, packed: PackedStore, dst: Any, c0: int, c1: int,
                  workers: int = 1) -> None:
    """Columns [c0, c1) (one slab) of the forward pass, computed (:func:`first_compute`) and
    stored in ``dst``."""
    dst.put_cols(c0, first_compute(plan, packed, c0, c1, workers))


def first_compute(plan: FourStepPlan, packed: PackedStore, c0: int, c1: int,
                  workers: int = 1) -> np.ndarray:
    """Columns [c0, c1) (one slab) of z = s' + i x from the packed bits: length-N2 FFTs down
    each column, times the twiddles w**(j1*k2).

    The slab is worked through in tiles of :data:`_TILE` columns: each tile (N2 x _TILE
    values, a few hundred KB) stays in the cache through its unpacking, FFT and twiddles,
    where FFTs down the whole slab at once would stream it through memory several times.
    Each column's FFT is the same computation either way (the bits do not depend on it)."""
    import scipy.fft as sfft

    sp, xp = packed.slab(c0 // plan.slab)
    t = aligned_empty((plan.N2, c1 - c0), np.complex128)
    tw = _Twiddles(plan.N2, c0, c1 - c0, plan.L, -1)
    tb = _TILE // 8
    for q in range(0, (c1 - c0) // 8, tb):
        u = np.empty((plan.N2, min(_TILE, c1 - c0 - 8 * q)), dtype=np.complex128)
        u.real = np.unpackbits(sp[:, q:q + tb], axis=1)
        u.imag = np.unpackbits(xp[:, q:q + tb], axis=1)
        u = sfft.fft(u, axis=0, overwrite_x=True, workers=workers)
        tw.apply(u, c0 + 8 * q)
        t[:, 8 * q: 8 * q + u.shape[1]] = u
    return t


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
    """Row FFTs, spectrum product, inverse row FFTs, for lead rows [r0, r1): read
    (:func:`middle_read`), computed (:func:`middle_compute`) and written (:func:`put_all`)."""
    put_all(dst, middle_compute(plan, middle_read(plan, src, r0, r1), workers))


def _self_paired(N2: int) -> tuple[int, ...]:
    return (0, N2 // 2) if N2 % 2 == 0 and N2 > 1 else (0,)


def middle_read(plan: FourStepPlan, src: Any, r0: int, r1: int) -> tuple:
    """The rows the lead rows [r0, r1) need: each lead row r pairs with row (N2 - r) mod N2,
    which holds the frequencies -k of row r (reversed; row 0 and, for even N2, row N2/2 pair
    with themselves)."""
    N2 = plan.N2
    single = [(r, src.rows(r, r + 1)[0]) for r in _self_paired(N2) if r0 <= r < r1]
    lo = max(r0, 1)
    hi = min(r1, (N2 + 1) // 2)  # lead rows with a distinct partner: 1 .. ceil(N2/2) - 1
    if hi <= lo:
        return single, lo, hi, None, None
    return single, lo, hi, src.rows(lo, hi), src.rows(N2 - hi + 1, N2 - lo + 1)


def middle_compute(plan: FourStepPlan, data: tuple, workers: int = 1) -> list:
    """The inverse row transforms of the product spectrum for the rows read by
    :func:`middle_read`, as (first row, rows) pieces for :func:`put_all`.

    Each row is transformed, multiplied and transformed back on its own, so that its
    few MB stay in the cache through the whole sequence (a block at a time would stream the
    block through memory once per operation). Only the lead rows are kept: the product
    spectrum is that of a real sequence, so the partner rows follow from them (see
    :func:`columns_inverse`)."""
    import scipy.fft as sfft

    single, lo, hi, lead, partner = data
    out = []
    for r, row in single:
        Z = sfft.fft(row, workers=workers)
        mirror = np.roll(Z[::-1], 1) if r == 0 else Z[::-1]
        out.append((r, sfft.ifft(_product(Z, mirror), workers=workers)[None, :]))
    if lead is not None:
        k = hi - lo
        for i in range(k):  # (the result replaces each lead row once it is transformed)
            X = sfft.fft(lead[i], workers=workers)
            # partner row of lead row lo + i is N2 - lo - i, i.e. partner[k - 1 - i]
            Y = sfft.fft(partner[k - 1 - i], overwrite_x=True, workers=workers)
            lead[i] = sfft.ifft(_product(X, Y[::-1]), overwrite_x=True, workers=workers)
        out.append((lo, lead))
    return out


def put_all(dst: Any, pieces: list) -> None:
    for r, rows in pieces:
        dst.put_rows(r, rows)


def columns_inverse(plan: FourStepPlan, src: Any, c0: int, c1: int,
                    workers: int = 1) -> tuple[np.ndarray, float]:
    """Conjugate twiddles and inverse column FFTs of columns [c0, c1); returns the packed
    output bits of those columns for rows 0 .. J-1 (J = ceil(m / N1)), shape (J, (c1-c0)/8),
    and the largest distance of a wanted value from an integer."""
    return inverse_compute(plan, inverse_read(plan, src, c0, c1), c0, c1, workers)


def inverse_read(plan: FourStepPlan, src: Any, c0: int, c1: int) -> np.ndarray:
    """The stored rows 0 .. H of columns [c0, c1), an (H + 1) x (c1 - c0) array."""
    t = aligned_empty((plan.H + 1, c1 - c0), np.complex128)
    if hasattr(src, "cols_into"):
        src.cols_into(c0, t)
    else:
        t[...] = src.cols(c0, c1, plan.H + 1)
    return t


def inverse_compute(plan: FourStepPlan, t: np.ndarray, c0: int, c1: int,
                    workers: int = 1) -> tuple[np.ndarray, float]:
    """The rest of :func:`columns_inverse` once the stored rows 0 .. H are read (``t``, from
    :func:`inverse_read`); the other rows are filled in tile by tile."""
    import scipy.fft as sfft

    N1, m = plan.N1, plan.m
    J = -(-m // N1)
    N2, H = plan.N2, plan.H
    # Q(-k) = -conj(Q(k)) for the stored Q = 4i x (spectrum of a real sequence), hence for the
    # row inverse transforms E: E[N2 - k2, j1] = -exp(-2 pi i j1 / N1) conj(E[k2, j1]).
    f = -_roots(np.arange(c0, c1), N1, -1) if N2 - 1 > H else None
    vals = np.empty((J, c1 - c0), dtype=np.float64)  # position j2*N1 + c0 + col
    tw = _Twiddles(N2, c0, c1 - c0, plan.L, +1)
    for q in range(0, c1 - c0, _TILE):  # tiles of columns, as in columns_first
        u = np.empty((N2, min(_TILE, c1 - c0 - q)), dtype=np.complex128)
        u[:H + 1] = t[:, q:q + _TILE]
        if f is not None:
            np.multiply(f[None, q:q + _TILE], np.conj(t[1: N2 - H, q:q + _TILE][::-1]),
                        out=u[H + 1:])
        tw.apply(u, c0 + q)
        u = sfft.ifft(u, axis=0, overwrite_x=True, workers=workers)
        np.multiply(u.imag[:J], 0.25, out=vals[:, q:q + _TILE])
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
    """The whole computation in this process; returns (output bytes, max deviation, pieces).

    Each pass is a pipeline (:func:`_pipeline`): the reads of the next pieces and the writes
    of finished ones run on two transfer threads while ``workers`` threads (at most two)
    compute, so the transfers of the work file overlap the arithmetic (numpy, the FFTs and the
    file transfers release the GIL).
    """
    import threading
    from concurrent.futures import ThreadPoolExecutor

    pieces = plan_pieces(plan)
    total = sum(len(v) for v in pieces.values())
    done = 0
    lock = threading.Lock()

    def tick() -> None:
        nonlocal done
        with lock:
            done += 1
            if progress is not None:
                progress(done, total)

    threads = 2 if workers > 1 else 1
    fft_workers = 1 if threads > 1 else workers
    cpu = ThreadPoolExecutor(max_workers=threads, thread_name_prefix="dicert-fft")
    # reads and writes on their own threads: the disk serves both at once faster than in turn
    io = (ThreadPoolExecutor(max_workers=1, thread_name_prefix="dicert-read"),
          ThreadPoolExecutor(max_workers=1, thread_name_prefix="dicert-write"))

    def run(jobs: list[tuple[int, int]], compute: Any, read: Any = None,
            write: Any = None) -> list[Any]:
        return _pipeline(cpu, io, jobs, compute, read, write, ahead=threads + 1, tick=tick)

    # One work array: the middle pass writes its rows in place (each row is read once, before
    # it is overwritten, by the piece that overwrites it; the pieces' rows are disjoint).
    opened: list[Any] = []
    try:
        x.read_bytes(0, 1)  # open the sources here, not in two threads at once
        s.read_bytes(0, 1)
        packed = open_packed(plan, temp_dir)
        opened.append(packed)
        run(pieces["pack"], lambda job, _: pack_sources(plan, x, s, packed, *job))
        a = open_store(plan, plan.N2, temp_dir)
        opened.append(a)
        run(pieces["first"], lambda job, _: first_compute(plan, packed, *job, fft_workers),
            write=lambda job, t: a.put_cols(job[0], t))
        packed.close()
        run(pieces["middle"], lambda job, d: middle_compute(plan, d, fft_workers),
            read=lambda job: middle_read(plan, a, *job), write=lambda job, w: put_all(a, w))
        got = run(pieces["inverse"], lambda job, t: inverse_compute(plan, t, *job, fft_workers),
                  read=lambda job: inverse_read(plan, a, *job))
        out, dev = assemble(plan, got, pieces["inverse"])
    finally:
        # (on an interrupt, pieces not yet started are dropped, not run)
        cpu.shutdown(cancel_futures=True)
        for pool in io:
            pool.shutdown(cancel_futures=True)
        for st in opened:
            st.close()
    return out, dev, total


def _pipeline(cpu: Any, io: Any, jobs: list, compute: Any, read: Any, write: Any, *,
              ahead: int, tick: Any) -> list[Any]:
    """compute(job, read(job)) for every job on the ``cpu`` pool, with read(job) and
    write(job, result) (either may be None) on the ``io`` pools (one for reads, one for
    writes), at most ``ahead`` jobs in flight (which bounds the memory held). Returns the
    computed results (None for jobs whose result was written). Every job ends (or fails)
    before this returns; the first exception, if any, is then raised, and no job is admitted
    after a failure."""
    import threading
    from concurrent.futures import Future, wait

    slots = threading.Semaphore(ahead)
    results: list[Any] = [None] * len(jobs)
    futures: list[Future] = []
    failed = threading.Event()

    def fetch(job: Any, box: list) -> None:
        box.append(read(job))

    def written(f: Future) -> None:
        if f.exception() is not None:
            failed.set()  # (before the slot is freed, so no further piece is admitted)
        slots.release()
        if f.exception() is None:
            tick()

    def work(i: int, job: Any, fr: Future | None, box: list) -> None:
        handed = False
        try:
            if failed.is_set():
                return
            if fr is not None:
                fr.result()
            data = box.pop() if box else None  # (held by nothing else once taken)
            res = compute(job, data)
            del data
            if write is None:
                results[i] = res
                tick()
                return
            fw = io[1].submit(write, job, res)
            del res
            futures.append(fw)
            fw.add_done_callback(written)
            handed = True
        except BaseException:
            failed.set()
            raise
        finally:
            if not handed:
                slots.release()

    for i, job in enumerate(jobs):
        slots.acquire()
        if failed.is_set():
            slots.release()
            break
        box: list = []
        fr = io[0].submit(fetch, job, box) if read is not None else None
        futures.append(cpu.submit(work, i, job, fr, box))
    while True:  # (writes are appended while the computations end)
        pending = [f for f in futures if not f.done()]
        if not pending:
            break
        wait(pending)
    for f in futures:
        if f.exception() is not None:
            raise f.exception()
    return results


def plan_pieces(plan: FourStepPlan) -> dict[str, list[tuple[int, int]]]:
    """The independent pieces of each pass, in order."""
    N1, N2 = plan.N1, plan.N2
    slabs = [(c, c + plan.slab) for c in range(0, N1, plan.slab)]
    leads = plan.H + 1
    return {
        "pack": [(r, min(r + plan.fill, N2)) for r in range(0, N2, plan.fill)],
        "first": slabs,
        "middle": [(r, min(r + plan.rows, leads)) for r in range(0, leads, plan.rows)],
        "inverse": slabs,
    }


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
