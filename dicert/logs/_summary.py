"""The one streaming pass over a log: per-block and consecutive-pair counts.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import functools
from collections.abc import Callable
from pathlib import Path

import numpy as np

from dicert.errors import ParameterError

from dicert.logs._model import DEFAULT_BLOCK_TRIALS, DEFAULT_CHUNK_TRIALS, LogChunk, LogSummary
from dicert.logs._files import files_digest
from dicert.logs._open import TrialLog, open_log


# --------------------------------------------------------------------------------------------
# One streaming pass: counts, block counts, digest
# --------------------------------------------------------------------------------------------


class BlockTally:
    """Counts per block of ``block_trials`` consecutive trials over a stream of trial codes.

    ``offset`` is the global index of the first trial fed, so a stream that starts inside a
    block (one file of a multi-file log) fills that block's remainder first. :meth:`result`
    gives the raw counts (t as coded) of every block touched, the last one possibly partial,
    shape (nblocks, 2, 2, 2, 2, 2).
    """

    def __init__(self, block_trials: int, offset: int = 0) -> None:
        self.block_trials = int(block_trials)
        self.first_block = int(offset) // self.block_trials
        self._blocks: list[np.ndarray] = []
        self._partial = np.zeros(32, dtype=np.int64)  # counts of the block being filled
        self._fill = int(offset) % self.block_trials

    def add(self, codes: np.ndarray) -> None:
        from dicert._kernels import count_blocks

        bt, pos = self.block_trials, 0
        if self._fill:
            take = min(bt - self._fill, codes.size)
            c, _ = count_blocks(codes[:take], max(take, 1))
            self._partial += c.sum(axis=0)
            self._fill += take
            pos = take
            if self._fill == bt:
                self._blocks.append(self._partial.copy())
                self._partial[:] = 0
                self._fill = 0
        rest = codes[pos:]
        if rest.size:
            c, _ = count_blocks(rest, bt)
            full = rest.size // bt
            if full:
                self._blocks.extend(c[:full])
            if rest.size % bt:
                self._partial += c[-1]
                self._fill = rest.size % bt

    def result(self) -> np.ndarray:
        blocks = self._blocks + ([self._partial.copy()] if self._fill else [])
        return np.array(blocks, dtype=np.int64).reshape(-1, 2, 2, 2, 2, 2)


# long: about 30 of its lines are the signature and docstring; the rest is the one
# streaming loop
def summarize_log(
    source,
    *,
    block_trials: int = DEFAULT_BLOCK_TRIALS,
    chunk_trials: int = DEFAULT_CHUNK_TRIALS,
    digest: bool = True,
    format: str | None = None,
    on_chunk: Callable[[LogChunk], object] | None = None,
    progress: Callable[[int, int], object] | None = None,
    max_trials: int | None = None,
) -> LogSummary:
    """Read a log once, streaming, and return its counts (total and per block) and digest.

    Parameters
    ----------
    source : path, directory or glob
    block_trials : int
        Block size for per-block counts (drift diagnostics).
    digest : bool
        Compute the SHA-256 of the log's bytes (overlapped with counting).
    on_chunk : callable, optional
        Called with every :class:`LogChunk` in order (e.g. to harvest outcome bits in the same
        pass).
    progress : callable, optional
        Called as ``progress(bytes_done, bytes_total)``.
    max_trials : int, optional
        Count (and pass to ``on_chunk``) only the first ``max_trials`` trials; the rest of
        the log is still read, validated and hashed, and counted in ``trials_in_log``.
    """
    from dicert._kernels import count_pairs

    if block_trials <= 0:
        raise ParameterError("block_trials must be positive")
    log = open_log(source, format=format)
    total_bytes = sum(f.stat().st_size for f in log.files)
    tally = BlockTally(block_trials)
    trials = 0
    in_log = 0
    pairs = np.zeros(64, dtype=np.int64)
    prev = -1  # settings symbol of the last trial counted (carried across chunks and files)
    # Without a consumer of the chunks the buffers can be reused (nothing keeps the codes).
    # The digest is built from the per-file digests (see files_digest), so no second hasher.
    for chunk in log.iter_chunks(chunk_trials, hash_files=digest,
                                 reuse_buffers=on_chunk is None):
        codes = chunk.codes
        in_log += codes.size
        if max_trials is not None:
            room = max_trials - trials
            if room <= 0:
                if progress is not None:
                    progress(min(total_bytes, _bytes_done(log, in_log, total_bytes)), total_bytes)
                continue
            if codes.size > room:
                codes = codes[:room]
                chunk = LogChunk(codes=codes, start=chunk.start, has_test_flag=chunk.has_test_flag)
        # Pair counting runs in a worker thread while this one counts the blocks (both C
        # kernels release the GIL); it finishes before the next chunk reuses the buffer.
        big = codes.size >= _PAIR_THREAD_MIN
        fut = _pair_pool().submit(count_pairs, codes, prev) if big else None
        if fut is None:
            pc, prev = count_pairs(codes, prev)
            pairs += pc
        tally.add(codes)
        if fut is not None:
            pc, prev = fut.result()
            pairs += pc
        trials += codes.size
        if on_chunk is not None:
            on_chunk(chunk)
        if progress is not None:
            progress(min(total_bytes, _bytes_done(log, trials, total_bytes)), total_bytes)
    block_counts = tally.result()
    if not log.has_test_flag:
        block_counts = np.stack([np.zeros_like(block_counts[:, 0]), block_counts.sum(axis=1)], axis=1)
    counts = block_counts.sum(axis=0) if block_counts.size else np.zeros((2,) * 5, dtype=np.int64)
    sha = None
    if digest:
        infos = log.file_infos
        sha = infos[0].sha256 if len(infos) == 1 else files_digest(
            {"name": Path(f.path).name, "bytes": f.size_bytes, "sha256": f.sha256} for f in infos)
    spec_audit = getattr(log, "audit", None)
    return LogSummary(
        trials=trials,
        counts=counts,
        block_trials=block_trials,
        block_counts=block_counts,
        has_test_flag=log.has_test_flag,
        sha256=sha,
        size_bytes=total_bytes,
        files=tuple(log.file_infos),
        pair_counts=pairs.reshape(8, 8),
        trials_in_log=in_log,
        log_spec=spec_audit,
    )


_PAIR_THREAD_MIN = 1 << 20


@functools.cache
def _pair_pool():
    from concurrent.futures import ThreadPoolExecutor

    return ThreadPoolExecutor(max_workers=1, thread_name_prefix="dicert-pairs")


def _bytes_done(log: TrialLog, trials: int, total_bytes: int) -> int:
    # Progress in trials scaled to bytes (exact for binary logs, an estimate for text).
    done_files = sum(fi.size_bytes for fi in log.file_infos)
    return max(done_files, min(total_bytes, trials))
