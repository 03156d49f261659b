"""Counting kernels for trial codes (one byte per trial).

A trial code is ``(t<<4) | (x<<3) | (y<<2) | (a<<1) | b``. The kernels count the 32 possible
codes per block of trials and report the bitwise OR of all codes so that the caller can detect
reserved bits without a second pass.

``np.bincount`` on bytes manages only about 50 M trials/s on a small machine (it widens every
byte to a 64-bit index first), so the fast path is a small numba kernel: several interleaved
histograms per thread (to break the store-to-load dependency on repeated codes) and blocks
counted in parallel. When numba is not importable the numpy path is used; it gives identical
counts, only slower.
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
def _numba_kernel():
    if os.environ.get("DICERT_NO_NUMBA"):
        return None
    try:
        import numba
    except Exception:  # pragma: no cover - numba missing on exotic platforms
        return None

    @numba.njit(parallel=True, nogil=True, cache=True, boundscheck=False)
    def count_blocks(codes, block_len):  # pragma: no cover - compiled
        n = codes.size
        nblocks = max(1, (n + block_len - 1) // block_len)
        out = np.zeros((nblocks, 32), dtype=np.int64)
        ors = np.zeros(nblocks, dtype=np.uint8)
        for k in numba.prange(nblocks):
            lo = k * block_len
            hi = min(n, lo + block_len)
            h = np.zeros((4, 256), dtype=np.int64)
            acc = np.uint8(0)
            i = lo
            while i + 4 <= hi:
                c0 = codes[i]
                c1 = codes[i + 1]
                c2 = codes[i + 2]
                c3 = codes[i + 3]
                h[0, c0] += 1
                h[1, c1] += 1
                h[2, c2] += 1
                h[3, c3] += 1
                acc |= c0 | c1 | c2 | c3
                i += 4
            while i < hi:
                c0 = codes[i]
                h[0, c0] += 1
                acc |= c0
                i += 1
            for c in range(256):
                out[k, c & 31] += h[0, c] + h[1, c] + h[2, c] + h[3, c]
            ors[k] = acc
        total_or = np.uint8(0)
        for k in range(nblocks):
            total_or |= ors[k]
        return out, total_or

    return count_blocks


def count_blocks(codes: np.ndarray, block_len: int) -> tuple[np.ndarray, int]:
    """Per-block counts of the 32 trial codes and the OR of all codes (fast path if available)."""
    if block_len <= 0:
        raise ValueError("block_len must be positive")
    codes = np.ascontiguousarray(codes, dtype=np.uint8)
    kernel = _numba_kernel()
    if kernel is None or codes.size == 0:
        return count_blocks_numpy(codes, block_len)
    out, or_all = kernel(codes, np.int64(block_len))
    return out, int(or_all)


def kernel_name() -> str:
    """Which counting kernel is in use (for benchmark reports)."""
    return "numba" if _numba_kernel() is not None else "numpy-bincount"
