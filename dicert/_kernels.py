"""Counting kernels for trial codes (one byte per trial).

A trial code is ``(t<<4) | (x<<3) | (y<<2) | (a<<1) | b``. The kernels count the 32 possible
codes per block of trials and report the bitwise OR of all codes so that the caller can detect
reserved bits without a second pass.

``np.bincount`` on bytes manages only about 50 M trials/s on a small machine (it widens every
byte to a 64-bit index first), so the fast path is a small C extension (``dicert/_ccount.c``):
four interleaved histograms (to break the store-to-load dependency on repeated codes), the GIL
released so that hashing runs in parallel. When the extension is not built the numpy path is
used; it gives identical counts, only slower (tests compare the two).
"""

from __future__ import annotations

import functools
import os

import numpy as np

NCODES = 32


def count_blocks_numpy(codes: np.ndarray, block_len: int) -> tuple[np.ndarray, int]:
    """Reference implementation: per-block counts of the 32 codes with ``np.bincount``.

    Returns ``(counts, or_all)`` where ``counts`` has shape (nblocks, 32) and ``or_all`` is the
    bitwise OR of every code (so bits outside 0x1F reveal invalid bytes).
    """
    codes = np.asarray(codes, dtype=np.uint8)
    n = codes.size
    nblocks = max(1, -(-n // block_len))
    out = np.zeros((nblocks, NCODES), dtype=np.int64)
    or_all = int(np.bitwise_or.reduce(codes)) if n else 0
    for k in range(nblocks):
        blk = codes[k * block_len : (k + 1) * block_len] & 0x1F
        out[k] = np.bincount(blk, minlength=NCODES)[:NCODES]
    return out, or_all


@functools.cache
def _c_kernel():
    if os.environ.get("DICERT_PURE_PYTHON"):
        return None
    try:
        from dicert import _ccount
    except ImportError:  # pragma: no cover - extension not built on this install
        return None
    return _ccount.count_blocks


def count_blocks(codes: np.ndarray, block_len: int) -> tuple[np.ndarray, int]:
    """Per-block counts of the 32 trial codes and the OR of all codes (fast path if available)."""
    if block_len <= 0:
        raise ValueError("block_len must be positive")
    codes = np.ascontiguousarray(codes, dtype=np.uint8)
    kernel = _c_kernel()
    if kernel is None or codes.size == 0:
        return count_blocks_numpy(codes, block_len)
    nblocks = max(1, -(-codes.size // block_len))
    out = np.zeros((nblocks, NCODES), dtype=np.int64)
    if codes.size < _PARALLEL_MIN or nblocks < 2:
        return out, int(kernel(codes, block_len, out))
    # Two threads on the two halves (split at a block boundary); the kernel releases the GIL.
    mid = (nblocks // 2) * block_len
    pool = _pool()
    left = pool.submit(kernel, codes[:mid], block_len, out[: nblocks // 2])
    or_right = kernel(codes[mid:], block_len, out[nblocks // 2 :])
    return out, int(left.result()) | int(or_right)


_PARALLEL_MIN = 1 << 22


@functools.cache
def _pool():
    from concurrent.futures import ThreadPoolExecutor

    return ThreadPoolExecutor(max_workers=1, thread_name_prefix="dicert-count")


def count_pairs_numpy(codes: np.ndarray, prev: int = -1) -> tuple[np.ndarray, int]:
    """Reference implementation of :func:`count_pairs` with ``np.bincount``."""
    codes = np.asarray(codes, dtype=np.uint8)
    out = np.zeros(64, dtype=np.int64)
    if codes.size == 0:
        return out, prev
    s = (codes >> 2) & 7
    if prev >= 0:
        out[((prev & 7) << 3) | int(s[0])] += 1
    if s.size > 1:
        out += np.bincount((s[:-1] << 3) | s[1:], minlength=64)[:64]
    return out, int(s[-1])


def count_pairs(codes: np.ndarray, prev: int = -1) -> tuple[np.ndarray, int]:
    """Counts of consecutive settings symbols in a chunk of trial codes.

    A trial's settings symbol is ``(code >> 2) & 7`` = 4 t + 2 x + y. Returns ``(pairs,
    last)``: ``pairs[8 * s + s']`` counts trials with symbol s followed by symbol s' (the
    pair across the chunk boundary included when ``prev``, the symbol of the trial before the
    chunk, is >= 0), and the symbol of the chunk's last trial (carry it to the next chunk).
    """
    codes = np.ascontiguousarray(codes, dtype=np.uint8)
    fn = _c_pairs()
    if fn is None:
        return count_pairs_numpy(codes, prev)
    out = np.zeros(64, dtype=np.int64)
    last = int(fn(codes, int(prev), out))
    return out, last


@functools.cache
def _c_pairs():
    if os.environ.get("DICERT_PURE_PYTHON"):
        return None
    try:
        from dicert import _ccount
    except ImportError:  # pragma: no cover - extension not built on this install
        return None
    return getattr(_ccount, "count_pairs", None)


def kernel_name() -> str:
    """Which counting kernel is in use (for benchmark reports)."""
    return "C" if _c_kernel() is not None else "numpy-bincount"
