"""Sampling trials from a device model: the word-to-trial map (numba kernel, numpy oracle) and chunked streams.

Part of :mod:`dicert.simulate` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
from collections.abc import Iterator
from typing import Any

import numpy as np

from dicert.errors import ParameterError

from dicert.simulate._boxes import (
    DEFAULT_CHUNK_TRIALS,
    _U53,
    _check_design,
    deterministic_strategy,
    validate_box,
)
from dicert.simulate._devices import DeviceModel


@dataclasses.dataclass(frozen=True, slots=True)
class _Plan:
    cdf: np.ndarray  # (4, K) float64, cdf[z, K-1] = 1
    table: np.ndarray  # (4, K) uint8 outcome code (a<<1)|b of category k at setting z
    gamma: float
    has_t: bool
    gen_z: int
    biased: bool
    px: float
    py: float

    @property
    def words(self) -> int:
        return 1 + (1 if self.gamma < 1.0 else 0) + (2 if self.biased else 0)


def _make_plan(source: Any, gamma, generation, settings_bias, include_t) -> _Plan:
    g, gen, bias = _check_design(gamma, generation, settings_bias)
    weights = None
    if isinstance(source, DeviceModel):
        weights = source.strategy_weights
        box = validate_box(source.box)
    else:
        box = validate_box(source)
    if weights is not None:
        # Local model: category = deterministic strategy, same distribution for every setting.
        w = np.asarray(weights, dtype=np.float64)
        cdf = np.tile(_cdf(w), (4, 1))
        table = np.zeros((4, 16), dtype=np.uint8)
        for k in range(16):
            a0, a1, b0, b1 = deterministic_strategy(k)
            for z in range(4):
                x, y = z >> 1, z & 1
                table[z, k] = ((a0, a1)[x] << 1) | (b0, b1)[y]
    else:
        cdf = np.stack([_cdf(box[z >> 1, z & 1].ravel()) for z in range(4)])
        table = np.tile(np.arange(4, dtype=np.uint8), (4, 1))
    has_t = (g < 1.0) if include_t is None else bool(include_t)
    px, py = (0.5, 0.5) if bias is None else bias
    return _Plan(cdf=cdf, table=table, gamma=g, has_t=has_t, gen_z=2 * gen[0] + gen[1],
                 biased=bias is not None, px=px, py=py)


def _cdf(p: np.ndarray) -> np.ndarray:
    c = np.cumsum(p / p.sum())
    c = np.minimum(c, 1.0)
    c[-1] = 1.0
    return c


def _codes_numpy(words: np.ndarray, plan: _Plan) -> np.ndarray:
    """Reference map from raw 64-bit words (shape (n, words_per_trial)) to trial codes."""
    w = words.reshape(-1, plan.words)
    n = w.shape[0]
    u = (w[:, 0] >> np.uint64(11)).astype(np.float64) * _U53
    j = 1
    if plan.gamma < 1.0:
        t = (w[:, 1] >> np.uint64(11)).astype(np.float64) * _U53 < plan.gamma
        j = 2
    else:
        t = np.ones(n, dtype=bool)
    if plan.biased:
        x = ((w[:, j] >> np.uint64(11)).astype(np.float64) * _U53 < plan.px).astype(np.uint8)
        y = ((w[:, j + 1] >> np.uint64(11)).astype(np.float64) * _U53 < plan.py).astype(np.uint8)
    else:
        x = (w[:, 0] & np.uint64(1)).astype(np.uint8)
        y = ((w[:, 0] >> np.uint64(1)) & np.uint64(1)).astype(np.uint8)
    z = np.where(t, 2 * x + y, plan.gen_z).astype(np.intp)
    k = np.zeros(n, dtype=np.intp)
    for col in range(plan.cdf.shape[1] - 1):
        k += u >= plan.cdf[z, col]
    c = plan.table[z, k]
    codes = (z.astype(np.uint8) << 2) | c
    if plan.has_t:
        codes |= t.astype(np.uint8) << 4
    return codes.astype(np.uint8)


@functools.cache
def _numba_sampler():
    if os.environ.get("DICERT_NO_NUMBA"):
        return None
    try:
        import numba
    except Exception:  # pragma: no cover - numba missing on exotic platforms
        return None

    @numba.njit(cache=True, nogil=True, boundscheck=False)
    def sample(words, nw, thr, K, table, g53, has_t, gen_z, biased, px53, py53, out):  # pragma: no cover
        # thr[z*K + j] = ceil(cdf[z, j] * 2**53), so "u53 >= thr" is exactly "u >= cdf" for
        # u = u53 * 2**-53; likewise g53, px53, py53. The outcome category is the number of
        # thresholds at or below u (branch-free: random data would defeat branch prediction).
        n = out.size
        spot = g53 < np.int64(9007199254740992)
        tbit = np.int64(16) if has_t else np.int64(0)
        sh = np.uint64(11)
        for i in range(n):
            base = i * nw
            w0 = words[base]
            u = np.int64(w0 >> sh)
            j = 1
            t = np.int64(1)
            if spot:
                t = np.int64(np.int64(words[base + 1] >> sh) < g53)
                j = 2
            if biased:
                x = np.int64(np.int64(words[base + j] >> sh) < px53)
                y = np.int64(np.int64(words[base + j + 1] >> sh) < py53)
            else:
                x = np.int64(w0 & np.uint64(1))
                y = np.int64((w0 >> np.uint64(1)) & np.uint64(1))
            z = t * (2 * x + y) + (1 - t) * gen_z
            b = z * K
            if K == 4:
                k = np.int64(u >= thr[b]) + np.int64(u >= thr[b + 1]) + np.int64(u >= thr[b + 2])
            else:
                k = np.int64(0)
                for col in range(K - 1):
                    k += np.int64(u >= thr[b + col])
            out[i] = np.uint8((z << 2) | np.int64(table[b + k]) | (t * tbit))

    return sample


def _codes_from_words(words: np.ndarray, plan: _Plan) -> np.ndarray:
    kernel = _numba_sampler()
    if kernel is None:
        return _codes_numpy(words, plan)
    n = words.size // plan.words
    out = np.empty(n, dtype=np.uint8)
    K = plan.cdf.shape[1]
    kernel(words, np.int64(plan.words), _scaled53(plan.cdf).ravel(), np.int64(K),
           np.ascontiguousarray(plan.table.ravel()), _scaled53(plan.gamma), bool(plan.has_t),
           np.int64(plan.gen_z), bool(plan.biased), _scaled53(plan.px), _scaled53(plan.py), out)
    return out


def _scaled53(p):
    """ceil(p * 2**53) as int64: ``u53 < ceil(p 2**53)`` iff ``u53 * 2**-53 < p`` (exact)."""
    if isinstance(p, np.ndarray):
        return np.ceil(p * 9007199254740992.0).astype(np.int64)
    return np.int64(math.ceil(float(p) * 9007199254740992.0))


def sampler_name() -> str:
    """Which sampling kernel is in use (for reports)."""
    return "numba" if _numba_sampler() is not None else "numpy"


def _check_rng(rng: Any) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise ParameterError("rng must be a numpy.random.Generator (e.g. numpy.random.default_rng(seed))")
    return rng


def _check_n(n: Any) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)):
        if isinstance(n, float) and n.is_integer():
            n = int(n)
        else:
            raise ParameterError(f"the number of trials must be an integer, got {n!r}")
    if n < 1:
        raise ParameterError(f"the number of trials must be at least 1, got {n}")
    return int(n)


def iter_trial_chunks(
    n: int,
    source: Any,
    *,
    gamma: float = 1.0,
    generation: tuple[int, int] = (0, 0),
    settings_bias: tuple[float, float] | None = None,
    include_t: bool | None = None,
    rng: np.random.Generator,
    chunk: int = DEFAULT_CHUNK_TRIALS,
) -> Iterator[Any]:
    """Simulate ``n`` trials and yield them as :class:`dicert.logs.LogChunk` objects, in order.

    Parameters are those of :func:`simulate_trials`. Memory stays bounded by ``chunk`` trials
    (about 8 to 32 bytes per trial while a chunk is made). The trials do not depend on
    ``chunk``. The generator is validated before the first trial is drawn.
    """
    from dicert.logs import LogChunk

    n = _check_n(n)
    rng = _check_rng(rng)
    if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
        raise ParameterError(f"chunk must be a positive integer, got {chunk!r}")
    plan = _make_plan(source, gamma, generation, settings_bias, include_t)

    def gen() -> Iterator[Any]:
        bitgen = rng.bit_generator
        start = 0
        while start < n:
            m = min(int(chunk), n - start)
            words = bitgen.random_raw(m * plan.words)
            yield LogChunk(codes=_codes_from_words(words, plan), start=start, has_test_flag=plan.has_t)
            start += m

    return gen()


def simulate_trials(
    n: int,
    source: Any,
    *,
    gamma: float = 1.0,
    generation: tuple[int, int] = (0, 0),
    settings_bias: tuple[float, float] | None = None,
    include_t: bool | None = None,
    rng: np.random.Generator,
    chunk: int = DEFAULT_CHUNK_TRIALS,
) -> Any:
    """Simulate ``n`` independent trials of a box or device model; return a ``TrialArrays``.

    Parameters
    ----------
    n : int
        Number of trials.
    source : ndarray (2, 2, 2, 2) or DeviceModel
        The box p[x, y, a, b], or a :class:`DeviceModel` (local models draw a deterministic
        strategy afresh every trial).
    gamma : float in (0, 1]
        Test-round probability; 1 means every round is a test round with uniform settings.
    generation : (int, int)
        Settings (x, y) of generation rounds.
    settings_bias : (float, float), optional
        P(x=1), P(y=1) on test rounds (uniform when omitted).
    include_t : bool, optional
        Whether to record the test-round column ``t``; by default only when ``gamma < 1``.
    rng : numpy.random.Generator
        Source of randomness (e.g. ``Generator(PCG64(SeedSequence(seed)))``).
    chunk : int
        Trials per internal chunk.

    Returns
    -------
    dicert.logs.TrialArrays
    """
    from dicert.logs import TrialArrays

    parts = [c.codes for c in iter_trial_chunks(n, source, gamma=gamma, generation=generation,
                                                   settings_bias=settings_bias, include_t=include_t,
                                                   rng=rng, chunk=chunk)]
    codes = parts[0] if len(parts) == 1 else np.concatenate(parts)
    has_t = (float(gamma) < 1.0) if include_t is None else bool(include_t)
    return TrialArrays.from_codes(codes, has_t)


def make_rng(seed: int | None = None) -> tuple[np.random.Generator, int]:
    """A PCG64 generator from ``SeedSequence(stream)``; returns it and the stream number (for replay)."""
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise ParameterError(f"--rng-stream must be a nonnegative integer, got {seed!r}")
    ss = np.random.SeedSequence(seed)
    return np.random.Generator(np.random.PCG64(ss)), int(ss.entropy)
