"""Toeplitz hashing: the randomness extractor, its seed and output-length rules.

Convention (part of the product: an auditor re-implementing it must get the same bits)
----------------------------------------------------------------------------------------
* Bits are packed big-endian within bytes (the first bit is the most significant bit of the
  first byte; ``numpy.packbits`` default).
* Input x has n bits: ``8 * len(data)`` unless ``n_bits`` says fewer (then the first n bits
  are used and the rest of the last byte is ignored).
* The seed s has n + m - 1 bits; a longer seed uses its first n + m - 1 bits, a shorter one
  is an error saying how many BYTES are needed.
* The matrix is T[i][j] = s[i - j + n - 1] for 0 <= i < m, 0 <= j < n (row 0 is
  s[n-1], s[n-2], ..., s[0]; column 0 is s[n-1], ..., s[n+m-2]) and the output is
  y = T x over GF(2): y[i] = XOR_j ( s[i - j + n - 1] AND x[j] ).
* The output is ceil(m/8) bytes, packed the same way, zero-padded in the last byte; the exact
  m is reported alongside.

Equivalently y[i] = c[i + n - 1] mod 2, where c is the integer linear convolution of s and x.
Those m entries are a "middle product": they are unaffected by wrap-around in a CYCLIC
convolution of any length >= n + m - 1, which is how they are computed here.

Computation
-----------
Three strategies give the same bits:

* n + m - 1 <= 2**22 (default): one in-memory cyclic convolution of length >= n + m - 1 with
  real FFTs in float64.
* Larger inputs (default): ONE cyclic convolution of length L >= n + m - 1 by the four-step
  FFT of :mod:`dicert._fourstep` (Bailey 1990): the seed and the input ride in one complex
  vector, the transform runs through blocks of rows and columns of 32 MB, and the rest of
  the work array sits in private temporary files. Time grows like (n + m) log(n + m); memory
  stays within ``memory_budget`` (default :data:`MEMORY_BUDGET`, whatever n is). The pieces
  of each pass are independent, so they can also run as tasks on a dask cluster
  (:mod:`dicert.cluster`).
* Tiles (``block_bits`` given, and the recomputation after a failed guard): the m x n matrix
  is cut into tiles of M output rows and B input columns. Each tile is itself a Toeplitz
  matrix (with a contiguous stretch of M + B - 1 seed bits), evaluated by one cyclic
  convolution of length F >= M + B - 1; the spectra of the tiles in an output block are
  summed (linearity) and transformed back once. Cost ~ n m / B; the input is read in several
  passes when the output blocks do not fit the budget.

Every value is rounded to the nearest integer and reduced mod 2.

Exactness: the convolution values are integers in [0, min(n, m)] ([0, min(M, B)] per
tile). By the standard error
analysis of the FFT (Higham, *Accuracy and Stability of Numerical Algorithms*, 2nd ed.,
SIAM 2002, sec. 24.1) the computed cyclic convolution of 0/1 vectors of length <= F differs
from the exact one by at most about 5 * log2(F) * eta * B**1.5 in the 2-norm, with eta a small
multiple of the unit roundoff 1.1e-16; that bound is a worst case (for one transform of length
2**31 it exceeds 1/2), and the observed errors are far smaller (1.5e-8 at n = 2**28 and
6e-8 at n = 2**30, m = n / 2, in
the benchmarks). Exactness therefore rests on the run-time guard, not on the bound: every
value is checked, and if any strays more than ``rounding_threshold`` (0.25) from an integer,
the four-step result is discarded and the bits recomputed by tiles, whose blocks that fail
their own guard are recomputed with exact integer arithmetic; ``method`` says so. Bits are
never emitted from a computation that failed the guard.

References
----------
.. [1] Y. Mansour, N. Nisan, P. Tiwari, "The computational complexity of universal hashing",
   STOC 1990; Theor. Comput. Sci. 107, 121-133 (1993). Toeplitz matrices as a universal family
   with n + m - 1 seed bits.
.. [2] H. Krawczyk, "LFSR-based hashing and authentication", CRYPTO '94, LNCS 839, 129-139.
.. [3] M. Tomamichel, C. Schaffner, A. Smith, R. Renner, "Leftover hashing against quantum side
   information", IEEE Trans. Inf. Theory 57(8), 5524-5535 (2011); arXiv:1002.2436.
.. [4] R. Impagliazzo, L. A. Levin, M. Luby, "Pseudo-random generation from one-way functions",
   STOC 1989 (the classical leftover hash lemma).
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from dicert._display import displayed
from dicert.errors import ParameterError, SeedError

# re-exported: every name that lived here keeps its import path
from dicert._extract_sizing import (  # noqa: F401
    LhlSizing,
    OUTPUT_RULE,
    _REFERENCES,
    _finite_float,
    _log2_inverse,
    _positive_int,
    lhl_output_length,
    lhl_sizing,
    seed_bits_required,
    seed_bytes_required,
)


#: Human-readable statement of the matrix convention, recorded with every extraction.
CONVENTION = (
    "T[i][j] = s[i - j + n - 1] (0 <= i < m, 0 <= j < n), y = T x over GF(2); "
    "bits packed big-endian within bytes; seed uses its first n + m - 1 bits; "
    "output ceil(m/8) bytes, zero-padded"
)
#: Default largest FFT length of one tile for inputs up to 2**24 bits (float64 error and memory
#: stay small); it doubles with the input up to MAX_FFT_LENGTH_LARGE.
MAX_FFT_LENGTH = 1 << 22
MAX_FFT_LENGTH_LARGE = 1 << 24
#: Default rounding guard: any value further than this from an integer triggers the exact path.
ROUNDING_THRESHOLD = 0.25
#: Default memory budget (bytes) for the extractor's working arrays, whatever the input size.
MEMORY_BUDGET = 1 << 29
#: Largest n + m - 1 computed by a single in-memory cyclic convolution; beyond it (unless tiles
#: are asked for) the four-step transform of :mod:`dicert._fourstep` is used.
SINGLE_LIMIT = MAX_FFT_LENGTH
#: Strategies accepted by :func:`extract_toeplitz`.
STRATEGIES = ("auto", "tiled", "four-step")
#: Tile width used by the exact integer fallback (direct convolution, O(width^2) per tile).
_EXACT_TILE = 1 << 12


# --------------------------------------------------------------------------- result


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ExtractionResult:
    """Output of :func:`extract_toeplitz` with the provenance an auditor needs.

    ``input_sha256`` is the SHA-256 of the ceil(n/8) input bytes read; ``seed_sha256`` of all
    the seed bytes given (the file's digest for a seed file); ``output_sha256`` of ``output``.
    ``max_rounding_error`` is the largest distance of a float convolution value from its
    integer (the guard threshold is ``rounding_threshold``); ``fallback_blocks`` counts output
    blocks recomputed exactly.
    """

    output: bytes
    m_bits: int
    n_bits: int
    seed_bits: int
    seed_bytes: int
    seed_sha256: str
    input_sha256: str
    output_sha256: str
    method: str
    blocks: int
    input_block_bits: int
    output_block_bits: int
    fft_length: int
    passes: int
    max_rounding_error: float
    rounding_threshold: float
    fallback_blocks: int
    convention: str = CONVENTION
    bit_order: str = "big-endian within bytes"

    #: Name of earlier versions (read-only).
    seed_bits_used = property(lambda self: self.seed_bits)

    def summary(self) -> dict[str, Any]:
        """All fields except the output bytes (for JSON and audit records)."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)
                if f.name != "output"}

    def to_dict(self) -> dict[str, Any]:
        """:meth:`summary` as plain JSON values (the output bytes stay in ``output``)."""
        from dicert._plain import plain

        return plain(self.summary())

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("m_bits", self.m_bits), ("n_bits", self.n_bits), ("method", self.method),
                ("output_sha256", self.output_sha256)]
        if full:
            rows += [("seed_bits", self.seed_bits), ("blocks", self.blocks),
                     ("max_rounding_error", self.max_rounding_error),
                     ("fallback_blocks", self.fallback_blocks)]
        return rows


# --------------------------------------------------------------------------- bit sources


class _Bits:
    """Random access to a packed big-endian bit string held in memory or in a file."""

    def __init__(self, source: Any, what: str) -> None:
        self.what = what
        self.path: Path | None = None
        self.array: np.ndarray | None = None
        if isinstance(source, (bytes, bytearray, memoryview)):
            self.array = np.frombuffer(bytes(source), dtype=np.uint8)
        elif isinstance(source, np.ndarray):
            if source.dtype != np.uint8 or source.ndim != 1:
                raise ParameterError(
                    f"{what}: expected packed bytes as a 1-D uint8 array, got "
                    f"{source.ndim}-D {source.dtype}")
            self.array = source
        elif isinstance(source, (str, os.PathLike)):
            self.path = Path(source)
            try:
                st = self.path.stat()
            except FileNotFoundError:
                raise _missing(what, self.path) from None
            if self.path.is_dir():
                raise _missing(what, self.path, "is a directory, expected a file of raw bytes")
        else:
            raise ParameterError(
                f"{what}: expected bytes, a uint8 array or a path, got {type(source).__name__}")
        self.size = int(self.array.size) if self.array is not None else int(st.st_size)
        self._fh = None

    def label(self) -> str:
        return str(self.path) if self.path is not None else self.what

    def read_bytes(self, start: int, stop: int) -> np.ndarray:
        """Bytes [start, stop) clipped to the source, as a uint8 array."""
        start, stop = max(start, 0), min(stop, self.size)
        if stop <= start:
            return np.zeros(0, dtype=np.uint8)
        if self.array is not None:
            return self.array[start:stop]
        if self._fh is None:
            self._fh = os.open(self.path, os.O_RDONLY)
        # pread: positional and thread-safe (two FFT threads may read the same file).
        data = os.pread(self._fh, stop - start, start)
        if len(data) != stop - start:
            raise ParameterError(f"{self.label()}: file shrank while being read")
        return np.frombuffer(data, dtype=np.uint8)

    def bits_into(self, out: np.ndarray, start: int, length: int, limit: int) -> None:
        """Write bits [start, start+length) into ``out`` (float64), zero outside [0, limit)."""
        out[:] = 0.0
        lo, hi = max(start, 0), min(start + length, limit)
        if hi <= lo:
            return
        raw = self.read_bytes(lo // 8, -(-hi // 8))
        bits = np.unpackbits(raw)[lo % 8: lo % 8 + (hi - lo)]
        out[lo - start: hi - start] = bits

    def sha256(self, nbytes: int | None = None) -> str:
        """SHA-256 of the first ``nbytes`` bytes (all by default)."""
        nbytes = self.size if nbytes is None else nbytes
        h = hashlib.sha256()
        pos = 0
        while pos < nbytes:
            step = min(1 << 22, nbytes - pos)
            h.update(self.read_bytes(pos, pos + step).tobytes())
            pos += step
        return h.hexdigest()

    def close(self) -> None:
        if self._fh is not None:
            os.close(self._fh)
            self._fh = None


def _missing(what: str, path: Path, problem: str = "no such file") -> Exception:
    err = SeedError if what == "seed" else ParameterError
    return err(f"{path}: {problem} ({what})")


# --------------------------------------------------------------------------- tiling


@dataclasses.dataclass(frozen=True, slots=True)
class _Plan:
    n: int
    m: int
    B: int  # input block width
    M: int  # output block height
    F: int  # FFT length >= B + M - 1
    nb: int
    mo: int
    group: int  # output blocks per pass


def _fast_length(k: int) -> int:
    """Smallest 5-smooth integer (2^a 3^b 5^c) >= k: an efficient real FFT length."""
    best = 1 << max(k - 1, 0).bit_length()
    p5 = 1
    while p5 < best:
        p35 = p5
        while p35 < best:
            # smallest power of two times p35 that is >= k
            q = p35 << max(0, (-(-k // p35) - 1).bit_length())
            best = min(best, q)
            p35 *= 3
        p5 *= 5
    return best


def _plan(n: int, m: int, block_bits: int | None, memory_budget: int) -> _Plan:
    # Larger inputs get larger tiles: the spectrum products cost ~ n m / B, the transforms
    # ~ (n + m) log B, and memory ~ 32 m + 80 B bytes (see _run).
    cap = MAX_FFT_LENGTH
    while cap < MAX_FFT_LENGTH_LARGE and 4 * cap < n:
        cap *= 2
    if block_bits is not None:
        bb = _positive_int(block_bits, "block_bits")
        B, M = min(n, bb), min(m, bb)
    elif n + m - 1 <= cap:
        B, M = n, m
    elif n <= cap // 2:
        B, M = n, cap - n
    elif m <= cap // 2:
        B, M = cap - m, m
    else:
        B = M = cap // 2
    F = _fast_length(B + M - 1)
    nb, mo = -(-n // B), -(-m // M)
    spectrum = 16 * (F // 2 + 1)
    # Held at once: one accumulator and up to one cached seed spectrum per output block of the
    # pass, one input spectrum, two real work rows.
    group = max(1, min(mo, (memory_budget // spectrum - 3) // 2))
    return _Plan(n=n, m=m, B=B, M=M, F=F, nb=nb, mo=mo, group=group)


def _tile_seed_start(plan: _Plan, o: int, b: int) -> int:
    """First seed index of tile (o, b): rows o*M.., columns b*B.. (see the module docstring)."""
    return o * plan.M - b * plan.B - plan.B + plan.n


# --------------------------------------------------------------------------- extraction


# long: about 75 of its lines are the signature and numpydoc docstring; the rest is one
# try/finally that must close both bit sources
def extract_toeplitz(
    data: Any,
    seed: Any,
    m_bits: int,
    *,
    n_bits: int | None = None,
    block_bits: int | None = None,
    progress: Callable[[int, int], None] | None = None,
    rounding_threshold: float = ROUNDING_THRESHOLD,
    workers: int | None = None,
    memory_budget: int | None = None,
    strategy: str = "auto",
    temp_dir: Any = None,
    scheduler: Any = None,
) -> ExtractionResult:
    """Hash n input bits to m output bits with a seeded Toeplitz matrix over GF(2).

    Parameters
    ----------
    data : bytes, 1-D uint8 array or path
        The raw bits, packed big-endian within bytes. A path is read block by block, so
        memory stays bounded for large inputs.
    seed : bytes, 1-D uint8 array or path
        Uniform seed bits, same packing; its first n + m - 1 bits are used.
    m_bits : int
        Output length m >= 1 (may exceed n; then the output cannot be more random than the
        input, which is the caller's concern; see :func:`lhl_output_length`).
    n_bits : int, optional
        Input length n (default: 8 * number of input bytes); must not exceed it.
    block_bits : int, optional
        Tile width (input block width and output block height). Default: a single cyclic
        convolution when n + m - 1 <= 2**23, else tiles with FFT length <= 2**23.
    progress : callable, optional
        Called as ``progress(done, total)`` in units of tiles.
    rounding_threshold : float, optional
        Guard: an output block with any value further than this from an integer is recomputed
        exactly (default 0.25). Tests force the fallback with a negative value.
    workers : int, optional
        Threads for FFTs (default: 2 if the machine has more than one core).
    memory_budget : int, optional
        Bytes allowed for the working arrays held at once (default :data:`MEMORY_BUDGET`,
        512 MiB, independent of the input size). The four-step method keeps a larger working
        array in a private temporary file (``temp_dir``); the tiled method reads the input in
        several passes when its output blocks do not fit.
    strategy : {"auto", "tiled", "four-step"}, optional
        "auto" (default): one in-memory cyclic convolution when n + m - 1 <= 2**22, tiles when
        ``block_bits`` is given, else the four-step transform. The bits never depend on it.
    temp_dir : path, optional
        Directory for the four-step method's work file (default: the system temporary
        directory). The file is private (mode 0600) and removed when done.
    scheduler : str or dask.distributed.Client, optional
        Run the four-step method's pieces as tasks on a dask.distributed cluster (optional
        extra ``dicert[cluster]``); ``temp_dir`` must then be a directory every worker sees.
        Default: the ``DICERT_SCHEDULER`` environment variable, else this process only.

    Returns
    -------
    ExtractionResult

    Raises
    ------
    SeedError
        The seed is shorter than n + m - 1 bits (the message gives the bytes needed).
    ParameterError
        Bad lengths or input types.

    Notes
    -----
    See the module docstring for the exact convention and the exactness argument.

    References
    ----------
    .. [1] Y. Mansour, N. Nisan, P. Tiwari, STOC 1990; Theor. Comput. Sci. 107 (1993).
    .. [2] H. Krawczyk, CRYPTO '94, LNCS 839.
    .. [3] N. J. Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., SIAM (2002),
       sec. 24.1 (error of the FFT).
    """
    m = _positive_int(m_bits, "m_bits")
    x = _Bits(data, "input")
    s = _Bits(seed, "seed")
    try:
        if n_bits is None:
            if x.size == 0:
                raise ParameterError(f"{x.label()}: input is empty")
            n = 8 * x.size
        else:
            n = _positive_int(n_bits, "n_bits")
            if n > 8 * x.size:
                raise ParameterError(
                    f"n_bits={n} exceeds the {8 * x.size} bits in {x.label()} ({x.size} bytes)")
        need_bits = n + m - 1
        need_bytes = -(-need_bits // 8)
        if s.size < need_bytes:
            raise SeedError(
                f"{s.label()}: seed too short: {s.size} bytes given, {need_bytes} bytes needed "
                f"(n + m - 1 = {need_bits} bits for n = {n}, m = {m})")
        thr = float(rounding_threshold)
        if not thr < 0.5:
            raise ParameterError(f"rounding_threshold must be < 0.5, got {thr!r}")
        budget = MEMORY_BUDGET if memory_budget is None else _positive_int(
            memory_budget, "memory_budget")
        if strategy not in STRATEGIES:
            raise ParameterError(f"strategy must be one of {', '.join(STRATEGIES)}, "
                                 f"got {strategy!r}")
        if workers is None:
            workers = 2 if (os.cpu_count() or 1) > 1 else 1
        four = strategy == "four-step" or (
            strategy == "auto" and block_bits is None and need_bits > SINGLE_LIMIT)
        if four:
            res = _four_step(x, s, n, m, budget, thr, int(workers), temp_dir, progress,
                             data, seed, scheduler)
            if res is not None:
                return res
            # The rounding guard failed somewhere (never observed): recompute by tiles, whose
            # own guard falls back to exact integer arithmetic block by block.
            block_bits = block_bits or 1 << 20
        plan = _plan(n, m, block_bits, budget)
        z, max_dev, fallback, tiles = _run(plan, x, s, need_bits, thr, int(workers), progress)
        output = np.packbits(z).tobytes()
        input_sha = x.sha256(-(-n // 8))
        seed_sha = s.sha256()
    finally:
        x.close()
        s.close()
    method = "fft-cyclic" if plan.nb * plan.mo == 1 else "fft-cyclic-tiled"
    if four:
        method = "fft-four-step failed the rounding guard; recomputed by " + method
    if fallback:
        method += f" + exact-integer fallback ({fallback} of {plan.mo} output blocks)"
    return ExtractionResult(
        output=output,
        m_bits=m,
        n_bits=n,
        seed_bits=need_bits,
        seed_bytes=s.size,
        seed_sha256=seed_sha,
        input_sha256=input_sha,
        output_sha256=hashlib.sha256(output).hexdigest(),
        method=method,
        blocks=tiles,
        input_block_bits=plan.B,
        output_block_bits=plan.M,
        fft_length=plan.F,
        passes=-(-plan.mo // plan.group),
        max_rounding_error=float(max_dev),
        rounding_threshold=thr,
        fallback_blocks=fallback,
    )


def _four_step(x: _Bits, s: _Bits, n: int, m: int, budget: int, thr: float, workers: int,
               temp_dir: Any, progress: Callable[[int, int], None] | None, data: Any,
               seed: Any, scheduler: Any) -> ExtractionResult | None:
    """One long cyclic convolution by the four-step FFT; None if the rounding guard failed."""
    from dicert import _fourstep

    if temp_dir is not None and not Path(temp_dir).is_dir():
        raise ParameterError(f"{temp_dir}: not a directory (temp_dir for the work files)")
    fplan = _fourstep.plan_four_step(n, m, budget)
    from dicert import cluster

    scheduler = cluster.scheduler_from_env(scheduler)
    if scheduler is not None:

        output, max_dev, pieces = cluster.four_step(fplan, data, seed, scheduler=scheduler,
                                                    temp_dir=temp_dir, progress=progress)
    else:
        output, max_dev, pieces = _fourstep.run_local(fplan, x, s, workers=workers,
                                                      temp_dir=temp_dir, progress=progress)
    if not max_dev <= thr:  # (a NaN fails this test too)
        return None
    return ExtractionResult(
        output=output,
        m_bits=m,
        n_bits=n,
        seed_bits=n + m - 1,
        seed_bytes=s.size,
        seed_sha256=s.sha256(),
        input_sha256=x.sha256(-(-n // 8)),
        output_sha256=hashlib.sha256(output).hexdigest(),
        method="fft-four-step",
        blocks=pieces,
        input_block_bits=fplan.N1,
        output_block_bits=fplan.N2,
        fft_length=fplan.L,
        passes=1,
        max_rounding_error=float(max_dev),
        rounding_threshold=thr,
        fallback_blocks=0,
    )


# long: the tiled FFT loop; about 50 of its lines are its helpers, closures over the shared
# work rows, thread pool and output array (splitting them out would pass that state around)
def _run(plan: _Plan, x: _Bits, s: _Bits, seed_len: int, thr: float, workers: int,
         progress: Callable[[int, int], None] | None) -> tuple[np.ndarray, float, int, int]:
    """Compute all output bits; returns (bits uint8[m], max deviation, fallback blocks, tiles)."""
    from concurrent.futures import ThreadPoolExecutor

    F, B, M, n = plan.F, plan.B, plan.M, plan.n
    half = F // 2 + 1
    z = np.empty(plan.mo * M, dtype=np.uint8)
    # Two real work rows (F + 2 floats, so each can also serve as a complex scratch spectrum).
    # numpy's pocketfft with ``out=`` writes spectra and inverse transforms into buffers we
    # hold, so nothing else of size F is allocated per transform.
    rows = [np.zeros(2 * half, dtype=np.float64) for _ in range(2)]
    scratch = [r.view(np.complex128) for r in rows]
    total = plan.nb * plan.mo
    done = 0
    max_dev = 0.0
    fallback = 0
    # Threads pay off only for large transforms.
    pool = ThreadPoolExecutor(max_workers=2) if workers > 1 and F >= 1 << 16 else None

    def transform(k: int, fill: Callable[[np.ndarray], None]) -> np.ndarray:
        fill(rows[k][:F])
        spec = np.empty(half, dtype=np.complex128)
        np.fft.rfft(rows[k][:F], out=spec)
        return spec

    def run_jobs(fills: list[Callable[[np.ndarray], None]]) -> list[np.ndarray]:
        """Forward transforms of the given row fillers, two at a time on two threads."""
        out: list[np.ndarray] = []
        for i in range(0, len(fills), 2):
            pair = fills[i:i + 2]
            if pool is not None and len(pair) == 2:
                futs = [pool.submit(transform, k, f) for k, f in enumerate(pair)]
                out.extend(f.result() for f in futs)
            else:
                out.extend(transform(0, f) for f in pair)
        return out

    def mac(k: int, work: list[tuple[np.ndarray, np.ndarray, bool]], xspec: np.ndarray) -> None:
        """acc += spec * xspec for each (acc, spec, spec_is_dead) on scratch row k."""
        for acc_o, spec, dead in work:
            if dead:  # last use of this seed spectrum: multiply in place
                np.multiply(spec, xspec, out=spec)
                acc_o += spec
            else:
                np.multiply(spec, xspec, out=scratch[k])
                acc_o += scratch[k]

    def finish(k: int, o: int, acc_o: np.ndarray) -> float:
        """Inverse transform of output block o, rounding guard, parity; returns the deviation."""
        vals = np.fft.irfft(acc_o, F, out=rows[k][:F])[B - 1: B - 1 + M]
        r = np.rint(vals)
        np.subtract(vals, r, out=vals)
        dev = float(np.max(np.abs(vals))) if vals.size else 0.0
        if dev <= thr:  # (a NaN fails this test too)
            z[o * M:(o + 1) * M] = (r.astype(np.int64) & 1).astype(np.uint8)
        return dev

    def in_pairs(fn: Callable[..., Any], jobs: list[tuple[Any, ...]]) -> list[Any]:
        """Run fn(k, *job) for each job, two at a time on two threads when a pool exists."""
        results: list[Any] = []
        for i in range(0, len(jobs), 2):
            pair = jobs[i:i + 2]
            if pool is not None and len(pair) == 2:
                futs = [pool.submit(fn, k, *job) for k, job in enumerate(pair)]
                results.extend(f.result() for f in futs)
            else:
                results.extend(fn(0, *job) for job in pair)
        return results

    try:
        for g0 in range(0, plan.mo, plan.group):
            outs = list(range(g0, min(g0 + plan.group, plan.mo)))
            acc = {o: np.zeros(half, dtype=np.complex128) for o in outs}
            # Seed spectra are keyed by the tile's seed offset; square tiles share them along
            # diagonals. ``last_use`` lets a spectrum be freed (or overwritten) after its last use.
            last_use: dict[int, int] = {}
            for b in range(plan.nb):
                for o in outs:
                    last_use[_tile_seed_start(plan, o, b)] = b
            cache: dict[int, np.ndarray] = {}
            for b in range(plan.nb):
                starts = [_tile_seed_start(plan, o, b) for o in outs]
                missing = [st for st in dict.fromkeys(starts) if st not in cache]
                fills: list[Callable[[np.ndarray], None]] = [
                    lambda r, b=b: x.bits_into(r, b * B, B, n)]
                fills += [lambda r, st=st: s.bits_into(r, st, B + M - 1, seed_len)
                          for st in missing]
                specs = run_jobs(fills)
                cache.update(zip(missing, specs[1:], strict=True))
                work = [(acc[o], cache[st], last_use[st] == b and starts.count(st) == 1)
                        for o, st in zip(outs, starts, strict=True)]
                ways = 2 if pool is not None else 1
                halves = [(work[k::ways], specs[0]) for k in range(ways)]
                in_pairs(mac, [h for h in halves if h[0]])
                del specs, work, halves
                done += len(starts)
                for st in set(starts):
                    if last_use[st] == b:
                        del cache[st]
                if progress is not None:
                    progress(done, total)
            cache.clear()
            for o, dev in zip(outs, in_pairs(finish, [(o, acc.pop(o)) for o in outs]),
                              strict=True):
                max_dev = max(max_dev, dev)
                if not dev <= thr:
                    # Never emit bits from a block that failed the guard: redo it exactly.
                    fallback += 1
                    z[o * M:(o + 1) * M] = _exact_block(plan, x, s, seed_len, o)
    finally:
        if pool is not None:
            pool.shutdown()
    return z[: plan.m], max_dev, fallback, total


def _exact_block(plan: _Plan, x: _Bits, s: _Bits, seed_len: int, o: int) -> np.ndarray:
    """Output block ``o`` by direct integer convolution over small tiles (exact, O(M n))."""
    n, M = plan.n, plan.M
    W = _EXACT_TILE
    out = np.zeros(M, dtype=np.int64)
    xb = np.empty(W, dtype=np.float64)
    sb = np.empty(2 * W - 1, dtype=np.float64)
    for i0 in range(0, M, W):
        h = min(W, M - i0)
        acc = np.zeros(h, dtype=np.int64)
        for j0 in range(0, n, W):
            x.bits_into(xb, j0, W, n)
            # rows o*M + i0 + i', columns j0 + j': seed index i' - j' + start with
            start = o * M + i0 - j0 - W + n
            s.bits_into(sb[: h + W - 1], start, h + W - 1, seed_len)
            xi = xb.astype(np.int64)
            si = sb[: h + W - 1].astype(np.int64)
            acc += np.convolve(si, xi)[W - 1: W - 1 + h]
        out[i0: i0 + h] = acc
    return (out & 1).astype(np.uint8)


def __getattr__(name: str) -> Any:
    # Health checks live in dicert.health; re-exported here under the agreed interface name.
    if name in ("run_health_checks", "HealthReport"):
        from dicert import health

        return getattr(health, name)
    raise AttributeError(name)


__all__ = [
    "CONVENTION",
    "ExtractionResult",
    "LhlSizing",
    "extract_toeplitz",
    "lhl_output_length",
    "lhl_sizing",
    "seed_bits_required",
    "seed_bytes_required",
]
