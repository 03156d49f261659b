"""Statistical health screen of output bits (a sanity check, NOT a certificate).

Four tests of NIST SP 800-22 rev. 1a (frequency/monobit 2.1, frequency within a block 2.2,
runs 2.3, longest run of ones in a block 2.4) and the most-common-value min-entropy estimate of
NIST SP 800-90B section 6.3.1. They catch gross failures (stuck or biased bits, a broken
extraction, a wrong seed convention) but **passing them proves nothing about unpredictability**:
any deterministic pseudo-random generator passes them. Only the device-independent
certificate speaks to unpredictability.

Input bits are either packed big-endian within bytes (``bytes``; a path to such a file) or an
array of 0/1 values (numpy array, one bit per element).

References
----------
.. [1] A. Rukhin et al., "A Statistical Test Suite for Random and Pseudorandom Number Generators
   for Cryptographic Applications", NIST SP 800-22 rev. 1a (April 2010), sections 2.1-2.4.
.. [2] M. S. Turan et al., "Recommendation for the Entropy Sources Used for Random Bit
   Generation", NIST SP 800-90B (January 2018), section 6.3.1; doi:10.6028/NIST.SP.800-90B.
"""

from __future__ import annotations

import dataclasses
import math
import os
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from dicert._display import displayed
from dicert.errors import ParameterError

#: Plain statement printed with every health report.
STATEMENT = (
    "These statistical tests only screen for gross defects (bias, stuck or repeating bits, a "
    "broken extraction). Passing them proves nothing about unpredictability: deterministic "
    "generators pass them too. Unpredictability rests solely on the device-independent "
    "certificate and its assumptions."
)
#: Default significance level (SP 800-22 rev. 1a, section 4.2.1 uses 0.01).
ALPHA = 0.01
#: Two-sided 99% normal quantile used by SP 800-90B 6.3.1.
Z_99 = 2.576

_REFERENCES = (
    "NIST SP 800-22 rev. 1a (2010), sections 2.1-2.4",
    "NIST SP 800-90B (2018), section 6.3.1",
)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TestResult:
    """Outcome of one statistical test.

    ``applicable`` is False when the sequence is shorter than the standard's recommended
    minimum; the statistic and P-value are still reported but ``passed`` is None.
    """

    name: str
    section: str
    statistic: float
    p_value: float
    passed: bool | None
    applicable: bool
    parameters: dict[str, Any]
    note: str = ""

    __test__ = False  # not a pytest test class


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class McvEstimate:
    """SP 800-90B 6.3.1 most-common-value estimate over ``samples`` symbols."""

    samples: int
    most_common: int
    p_hat: float
    p_upper: float
    min_entropy_per_sample: float
    bits_per_sample: int


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class HealthReport:
    """All health checks of one bit string; ``passed`` = every applicable test passed."""

    n_bits: int
    alpha: float
    tests: tuple[TestResult, ...]
    mcv_per_bit: McvEstimate
    mcv_per_byte: McvEstimate | None
    passed: bool
    statement: str = STATEMENT
    references: tuple[str, ...] = _REFERENCES

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("passed", self.passed), ("n_bits", self.n_bits), ("alpha", self.alpha),
                ("tests", len(self.tests))]
        if full:
            rows += [(f"{t.name} (p-value)", t.p_value) for t in self.tests]
        return rows


# --------------------------------------------------------------------------- input


#: Largest bits file screened whole (its bits take 8 bytes each in memory while screened);
#: a longer file is screened on a prefix chosen with ``n_bits`` (``--input-bits``).
MAX_SCREEN_BYTES = 64 << 20


def read_bits_file(path: str | os.PathLike[str], n_bits: int | None = None) -> bytes:
    """The bytes of a bits file: the first ceil(n_bits / 8) with ``n_bits``, else the whole file
    if it is a regular file of at most :data:`MAX_SCREEN_BYTES` (a device or pipe such as
    /dev/zero, or a larger file, is refused with one line naming it)."""
    import stat

    from dicert._io import reading_errors

    p = Path(path)
    with reading_errors(p, "file of packed bits", ParameterError):
        with open(p, "rb") as fh:
            if n_bits is not None and isinstance(n_bits, (int, np.integer)) and n_bits >= 1:
                return fh.read((int(n_bits) + 7) // 8)  # a prefix: bounded whatever the file
            st = os.fstat(fh.fileno())
            if not stat.S_ISREG(st.st_mode):
                raise ParameterError(f"{p}: not a regular file; save the bits to a file, or "
                                     "screen a prefix with --input-bits N")
            if st.st_size > MAX_SCREEN_BYTES:
                raise ParameterError(
                    f"{p}: {st.st_size} bytes; the screen reads at most {MAX_SCREEN_BYTES} "
                    "bytes at once: screen a prefix with --input-bits N")
            return fh.read(MAX_SCREEN_BYTES + 1)[:MAX_SCREEN_BYTES]


def as_bits(bits: Any, n_bits: int | None = None) -> np.ndarray:
    """Return a uint8 array of 0/1 values.

    ``bytes``/``bytearray``/``memoryview`` and paths are packed big-endian within bytes; a
    numpy array (or list) holds one bit per element. ``n_bits`` keeps the first n bits.
    """
    if isinstance(bits, (str, os.PathLike)):
        bits = read_bits_file(bits, n_bits)
    if isinstance(bits, (bytes, bytearray, memoryview)):
        packed = np.frombuffer(bits, dtype=np.uint8)
        if isinstance(n_bits, (int, np.integer)) and not isinstance(n_bits, bool) \
                and 0 < n_bits <= 8 * packed.size:
            packed = packed[: -(-int(n_bits) // 8)]  # unpack only the bytes used
        arr = np.unpackbits(packed)
    else:
        arr = np.asarray(bits)
        if arr.ndim != 1:
            raise ParameterError(f"bits: expected a 1-D array of 0/1 values, got {arr.ndim}-D")
        if arr.size and (arr.dtype.kind not in "biu" or int(arr.min()) < 0 or int(arr.max()) > 1):
            raise ParameterError("bits: an array must hold only 0/1 values (pass bytes for "
                                 "packed data)")
        arr = arr.astype(np.uint8, copy=False)
    if n_bits is not None:
        if isinstance(n_bits, bool) or not isinstance(n_bits, (int, np.integer)) or n_bits < 1:
            raise ParameterError(f"n_bits must be a positive integer, got {n_bits!r}")
        if n_bits > arr.size:
            raise ParameterError(f"n_bits={n_bits} exceeds the {arr.size} bits given")
        arr = arr[:n_bits]
    return arr


def _need(e: np.ndarray, k: int, name: str) -> None:
    if e.size < k:
        raise ParameterError(f"{name} needs at least {k} bits, got {e.size}")


# --------------------------------------------------------------------------- SP 800-22


#: Elements per chunk where a test would otherwise make temporaries as large as its input.
_CHUNK = 1 << 22


def frequency_test(bits: Any) -> TestResult:
    """SP 800-22 rev. 1a section 2.1, frequency (monobit) test.

    S_n = sum(2 e_i - 1), s_obs = |S_n| / sqrt(n), P = erfc(s_obs / sqrt 2).

    References
    ----------
    .. [1] NIST SP 800-22 rev. 1a (2010), section 2.1.
    """
    e = as_bits(bits)
    _need(e, 1, "frequency test")
    n = e.size
    s_n = 2 * int(np.count_nonzero(e)) - n
    s_obs = abs(s_n) / math.sqrt(n)
    p = math.erfc(s_obs / math.sqrt(2.0))
    return _result("frequency (monobit)", "SP 800-22 2.1", s_obs, p, n >= 100,
                   {"n": n, "S_n": s_n}, "recommended n >= 100")


def block_frequency_test(bits: Any, block_bits: int) -> TestResult:
    """SP 800-22 rev. 1a section 2.2, frequency test within a block of M bits.

    N = floor(n/M) blocks (leftover bits dropped); chi2 = 4 M sum (pi_i - 1/2)^2;
    P = igamc(N/2, chi2/2).

    References
    ----------
    .. [1] NIST SP 800-22 rev. 1a (2010), section 2.2.
    """
    import scipy.special

    e = as_bits(bits)
    M = int(block_bits)
    if M < 1:
        raise ParameterError(f"block_bits must be >= 1, got {block_bits!r}")
    N = e.size // M
    if N < 1:
        raise ParameterError(f"block frequency test needs at least one block of {M} bits, got "
                             f"{e.size} bits")
    ones = e[: N * M].reshape(N, M).sum(axis=1, dtype=np.int64)
    # 4 M sum (ones/M - 1/2)^2 = sum (2 ones - M)^2 / M, exact in integers
    chi2 = float(np.sum((2 * ones - M) ** 2)) / M
    p = float(scipy.special.gammaincc(N / 2.0, chi2 / 2.0))
    ok = e.size >= 100 and M >= 20 and M > 0.01 * e.size and N < 100
    return _result("frequency within a block", "SP 800-22 2.2", chi2, p, ok,
                   {"n": int(e.size), "M": M, "N": N},
                   "recommended n >= 100, M >= 20, M > n/100, N < 100")


def runs_test(bits: Any) -> TestResult:
    """SP 800-22 rev. 1a section 2.3, runs test.

    pi = ones / n; if |pi - 1/2| >= 2/sqrt(n) the test is not run (P = 0); otherwise
    V = 1 + #{k : e_k != e_(k+1)} and P = erfc(|V - 2 n pi (1-pi)| / (2 sqrt(2n) pi (1-pi))).

    References
    ----------
    .. [1] NIST SP 800-22 rev. 1a (2010), section 2.3.
    """
    e = as_bits(bits)
    _need(e, 2, "runs test")
    n = e.size
    pi = int(np.count_nonzero(e)) / n
    tau = 2.0 / math.sqrt(n)
    v = 1 + sum(int(np.count_nonzero(e[k + 1:j + 1] != e[k:j]))
                for k in range(0, n - 1, _CHUNK) for j in (min(k + _CHUNK, n - 1),))
    if abs(pi - 0.5) >= tau or pi in (0.0, 1.0):  # (pi in {0, 1} only matters for n < 17)
        return _result("runs", "SP 800-22 2.3", float(v), 0.0, n >= 100,
                       {"n": n, "pi": pi, "V": v},
                       "frequency prerequisite failed (|pi - 1/2| >= 2/sqrt(n)): P = 0")
    num = abs(v - 2.0 * n * pi * (1.0 - pi))
    p = math.erfc(num / (2.0 * math.sqrt(2.0 * n) * pi * (1.0 - pi)))
    return _result("runs", "SP 800-22 2.3", float(v), p, n >= 100, {"n": n, "pi": pi, "V": v},
                   "recommended n >= 100")


#: SP 800-22 2.4 parameters: (minimum n, M, class edges (lowest class <= edges[0], highest >=
#: edges[-1])).
_LONGEST_RUN = ((750_000, 10_000, (10, 16)), (6_272, 128, (4, 9)), (128, 8, (1, 4)))


@lru_cache(maxsize=8)
def longest_run_class_probabilities(block_bits: int, low: int, high: int) -> tuple[float, ...]:
    """Exact probabilities that the longest run of ones in M fair bits falls in each class.

    Classes: <= low, low+1, ..., high-1, >= high. Computed by counting strings (dynamic
    programming over the length of the current run, exact integers). They agree with the
    rounded table of SP 800-22 rev. 1a section 3.4 for M = 8 (55/256, 94/256, 59/256, 48/256)
    and M = 128; the printed M = 10^4 row was computed approximately by the standard's authors
    and differs in the third decimal.
    """
    M = int(block_bits)

    def count_at_most(k: int) -> int:
        state = [1] + [0] * k  # state[r]: strings ending in a run of exactly r ones
        for _ in range(M):
            state = [sum(state), *state[:-1]]
        return sum(state)

    cum = [count_at_most(k) for k in range(low, high)]
    total = 1 << M
    counts = [cum[0]] + [cum[i] - cum[i - 1] for i in range(1, len(cum))] + [total - cum[-1]]
    from fractions import Fraction

    return tuple(float(Fraction(c, total)) for c in counts)


def _longest_runs(blocks: np.ndarray) -> np.ndarray:
    """Longest run of ones in each row of a (N, M) 0/1 array."""
    N, M = blocks.shape
    out = np.zeros(N, dtype=np.int64)
    step = max(1, (1 << 22) // (M + 1))
    for r0 in range(0, N, step):
        chunk = blocks[r0: r0 + step]
        k = chunk.shape[0]
        padded = np.zeros((k, M + 1), dtype=np.int8)
        padded[:, :M] = chunk
        edge = np.zeros(1, dtype=np.int8)  # (an int list here would make the chunk int64)
        flat = np.concatenate((edge, padded.ravel(), edge))
        d = np.diff(flat)
        starts = np.flatnonzero(d == 1)
        ends = np.flatnonzero(d == -1)
        if starts.size:
            np.maximum.at(out, r0 + starts // (M + 1), ends - starts)
    return out


def longest_run_test(bits: Any, block_bits: int | None = None) -> TestResult:
    """SP 800-22 rev. 1a section 2.4, longest run of ones in a block.

    M = 8 (n >= 128), 128 (n >= 6272) or 10^4 (n >= 750000) unless given; N = floor(n/M)
    blocks; chi2 = sum (nu_i - N pi_i)^2 / (N pi_i); P = igamc(K/2, chi2/2), with the class
    probabilities pi_i computed exactly (:func:`longest_run_class_probabilities`). With the
    standard's 4-decimal table instead, the section 2.4 example gives P = 0.180598 rather than
    0.180609 (both values appear in the standard's text).

    References
    ----------
    .. [1] NIST SP 800-22 rev. 1a (2010), sections 2.4 and 3.4.
    """
    import scipy.special

    e = as_bits(bits)
    n = e.size
    params = None
    for nmin, M, edges in _LONGEST_RUN:
        if block_bits is None and n >= nmin or block_bits == M:
            params = (M, edges)
            break
    if params is None:
        if block_bits is None:
            raise ParameterError(f"longest-run test needs at least 128 bits, got {n}")
        raise ParameterError(f"longest-run block size must be 8, 128 or 10000, got {block_bits}")
    M, (low, high) = params
    N = n // M
    if N < 1:
        raise ParameterError(f"longest-run test with M={M} needs at least {M} bits, got {n}")
    runs = _longest_runs(e[: N * M].reshape(N, M))
    classes = np.clip(runs, low, high) - low
    nu = np.bincount(classes, minlength=high - low + 1)
    pi = np.array(longest_run_class_probabilities(M, low, high))
    chi2 = float(np.sum((nu - N * pi) ** 2 / (N * pi)))
    K = high - low
    p = float(scipy.special.gammaincc(K / 2.0, chi2 / 2.0))
    applicable = any(n >= nmin and M == mm for nmin, mm, _ in _LONGEST_RUN)
    return _result("longest run of ones in a block", "SP 800-22 2.4", chi2, p, applicable,
                   {"n": n, "M": M, "N": N, "K": K, "nu": nu.tolist()},
                   "class probabilities computed exactly")


# --------------------------------------------------------------------------- SP 800-90B


def mcv_estimate(samples: Any, bits_per_sample: int = 1) -> McvEstimate:
    """SP 800-90B section 6.3.1 most-common-value min-entropy estimate.

    p_hat = (count of the most common value) / L;
    p_u = min(1, p_hat + 2.576 sqrt(p_hat (1 - p_hat) / (L - 1))); H = -log2(p_u) per sample.

    Parameters
    ----------
    samples : array-like of non-negative integers
        The sample sequence (L >= 2).
    bits_per_sample : int
        Recorded for the caller's convenience (1 for bits, 8 for bytes).

    References
    ----------
    .. [1] NIST SP 800-90B (2018), section 6.3.1.
    """
    s = np.asarray(samples)
    if s.ndim != 1 or s.size < 2:
        raise ParameterError(f"MCV estimate needs a 1-D sequence of at least 2 samples, got "
                             f"shape {s.shape}")
    if s.dtype.kind not in "biu" or int(s.min()) < 0:
        raise ParameterError("MCV estimate needs non-negative integer samples")
    # by chunks: bincount casts its input to intp (8 bytes per sample), which for the bits of a
    # large output would be a copy eight times its size
    counts = np.zeros(int(s.max()) + 1, dtype=np.int64)
    for k in range(0, s.size, _CHUNK):
        counts += np.bincount(s[k:k + _CHUNK], minlength=counts.size)
    mode = int(np.argmax(counts))
    L = s.size
    p_hat = int(counts[mode]) / L
    p_u = min(1.0, p_hat + Z_99 * math.sqrt(p_hat * (1.0 - p_hat) / (L - 1)))
    return McvEstimate(samples=L, most_common=mode, p_hat=p_hat, p_upper=p_u,
                       min_entropy_per_sample=-math.log2(p_u) if p_u < 1.0 else 0.0,
                       bits_per_sample=int(bits_per_sample))


# --------------------------------------------------------------------------- recipe


def run_health_checks(bits: Any, *, n_bits: int | None = None, alpha: float = ALPHA
                      ) -> HealthReport:
    """Run the four SP 800-22 tests and the SP 800-90B MCV estimate on a bit string.

    Parameters
    ----------
    bits : bytes, path or array of 0/1
        Packed big-endian bits (bytes or a file), or one bit per array element.
    n_bits : int, optional
        Use only the first n bits (e.g. the exact m of an extractor output).
    alpha : float
        Significance level (default 0.01, SP 800-22 rev. 1a section 4.2.1).

    Returns
    -------
    HealthReport
        ``passed`` is True when every applicable test has P >= alpha (at least one must be
        applicable). Ideal random bits fail a given test with probability alpha.

    Notes
    -----
    Block sizes follow the standard's recommendations: M = max(20, floor(n/100) + 1) for the
    block frequency test (so M >= 20, M > n/100 and N < 100) and the table of section 2.4.2 for
    the longest-run test. Passing proves nothing about unpredictability (see ``STATEMENT``).

    References
    ----------
    .. [1] NIST SP 800-22 rev. 1a (2010), sections 2.1-2.4.
    .. [2] NIST SP 800-90B (2018), section 6.3.1.
    """
    a = float(alpha)
    if not 0.0 < a < 1.0:
        raise ParameterError(f"alpha must be in (0, 1), got {alpha!r}")
    e = as_bits(bits, n_bits)
    n = e.size
    if n < 2:
        raise ParameterError(f"health checks need at least 2 bits, got {n}")
    tests = [frequency_test(e), runs_test(e)]
    M = max(20, n // 100 + 1)
    if n >= M:
        tests.insert(1, block_frequency_test(e, M))
    if n >= 128:
        tests.append(longest_run_test(e))
    tests = [_judge(t, a) for t in tests]
    mcv_bytes = None
    if n >= 16:
        mcv_bytes = mcv_estimate(np.packbits(e[: n - n % 8]), bits_per_sample=8)
    applicable = [t for t in tests if t.applicable]
    passed = bool(applicable) and all(t.passed for t in applicable)
    return HealthReport(n_bits=n, alpha=a, tests=tuple(tests), mcv_per_bit=mcv_estimate(e),
                        mcv_per_byte=mcv_bytes, passed=passed)


def _result(name: str, section: str, statistic: float, p: float, applicable: bool,
            params: dict[str, Any], note: str) -> TestResult:
    return TestResult(name=name, section=section, statistic=float(statistic), p_value=float(p),
                      passed=None, applicable=bool(applicable), parameters=params,
                      note=note if not applicable or "prerequisite" in note else "")


def _judge(t: TestResult, alpha: float) -> TestResult:
    if not t.applicable:
        return dataclasses.replace(t, passed=None,
                                   note=f"not applied: sequence too short ({t.note})")
    return dataclasses.replace(t, passed=t.p_value >= alpha)


__all__ = [
    "ALPHA",
    "STATEMENT",
    "HealthReport",
    "McvEstimate",
    "TestResult",
    "as_bits",
    "block_frequency_test",
    "frequency_test",
    "longest_run_class_probabilities",
    "longest_run_test",
    "mcv_estimate",
    "run_health_checks",
    "runs_test",
]
