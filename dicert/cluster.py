"""Scale-out on dask.distributed (optional extra ``dicert[cluster]``).

dicert does not schedule anything itself: it submits independent pieces of work as tasks to a
dask.distributed scheduler (``dask scheduler`` / ``dask worker ADDRESS``, or a
``distributed.LocalCluster``) and combines their results in a fixed order, so the bits and
records are identical to a run in one process.

* Extraction (:func:`four_step`): the passes of the four-step transform of
  :mod:`dicert._fourstep` run as tasks, one block of rows or columns each (a few MB of memory
  per task). The work array lives in two private files in a directory every worker sees
  (``temp_dir``; a shared file system on a real cluster). Each task reads one file and writes
  a disjoint part of the other, so a task that dies half-way can simply be run again: the
  engine retries it on another worker, and if it gives up the run fails with
  :class:`ClusterError` before any output or record is written. The work files are removed
  in every case.
* Logs (:func:`file_digests`): the files of a multi-file log are hashed one per task.

The scheduler is named by an address (``tcp://host:8786``) or given as a ``Client``; the
environment variable ``DICERT_SCHEDULER`` supplies a default address.
"""

from __future__ import annotations

import contextlib
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

from dicert.errors import DicertError

#: Environment variable naming the default scheduler address.
ENV_SCHEDULER = "DICERT_SCHEDULER"
#: Times a task that raised an error is re-run (a task whose worker died is re-run by the
#: scheduler itself, up to its ``allowed-failures`` setting).
RETRIES = 2


class ClusterError(DicertError, RuntimeError):
    """The cluster could not be reached or a task failed for good; nothing was written."""


def _distributed() -> Any:
    try:
        import distributed
    except ImportError:
        raise DicertError("running on a dask cluster needs the optional extra: "
                          "pip install 'dicert[cluster]'") from None
    return distributed


@contextlib.contextmanager
def client_for(scheduler: Any):
    """A dask Client for an address (connected here and closed after) or a given Client."""
    distributed = _distributed()
    if isinstance(scheduler, distributed.Client):
        yield scheduler
        return
    try:
        client = distributed.Client(str(scheduler), timeout="20s", set_as_default=False)
    except (OSError, TimeoutError) as exc:
        raise ClusterError(f"cannot reach the dask scheduler at {scheduler}: {exc}") from None
    try:
        yield client
    finally:
        client.close()


def scheduler_from_env(scheduler: Any = None) -> Any:
    """``scheduler`` if given, else ``$DICERT_SCHEDULER`` if set, else None (run locally)."""
    if scheduler is not None:
        return scheduler
    return os.environ.get(ENV_SCHEDULER) or None


def _run_all(client: Any, fn: Callable[..., Any], jobs: list[tuple[Any, ...]], tag: str,
             tick: Callable[[], None]) -> list[Any]:
    """Submit fn(*job) for every job, wait for all; results in job order."""
    distributed = _distributed()
    futures = [client.submit(fn, *job, key=f"{tag}-{i}", retries=RETRIES, pure=False)
               for i, job in enumerate(jobs)]
    try:
        for _ in distributed.as_completed(futures, loop=client.loop):
            tick()
        return client.gather(futures)
    except (DicertError, OSError, ValueError):
        raise
    except Exception as exc:  # KilledWorker, CommClosedError, CancelledError, ...
        raise ClusterError(f"dask task {tag} failed: {type(exc).__name__}: {exc}") from None
    finally:
        for f in futures:
            f.release()


# --------------------------------------------------------------------------- task bodies


def _fault_point() -> None:
    """Fault injection for the test suite: with ``DICERT_TEST_KILL_ONCE=PATH`` set in a
    worker's environment, the first task that finds PATH absent creates it and kills its own
    worker process (as a crash would)."""
    marker = os.environ.get("DICERT_TEST_KILL_ONCE")
    if marker:
        try:
            fd = os.open(marker, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o600)
        except FileExistsError:
            return
        os.close(fd)
        os._exit(70)


def _bits(source: Any, what: str) -> Any:
    from dicert.extract import _Bits

    return _Bits(source, what)


def _task_pack(plan: Any, data: Any, seed: Any, dst: Any, r0: int, r1: int) -> None:
    from dicert import _fourstep

    _fault_point()
    x, s = _bits(data, "input"), _bits(seed, "seed")
    try:
        _fourstep.pack_sources(plan, x, s, dst, r0, r1)
    finally:
        x.close()
        s.close()
        dst.close()


def _task_first(plan: Any, packed: Any, dst: Any, c0: int, c1: int) -> None:
    from dicert import _fourstep

    _fault_point()
    try:
        _fourstep.columns_first(plan, packed, dst, c0, c1)
    finally:
        packed.close()
        dst.close()


def _task_middle(plan: Any, src: Any, dst: Any, r0: int, r1: int) -> None:
    from dicert import _fourstep

    _fault_point()
    try:
        _fourstep.rows_middle(plan, src, dst, r0, r1)
    finally:
        src.close()
        dst.close()


def _task_inverse(plan: Any, src: Any, c0: int, c1: int) -> Any:
    from dicert import _fourstep

    _fault_point()
    try:
        return _fourstep.columns_inverse(plan, src, c0, c1)
    finally:
        src.close()


# --------------------------------------------------------------------------- extraction


def four_step(plan: Any, data: Any, seed: Any, *, scheduler: Any, temp_dir: Any = None,
              progress: Callable[[int, int], None] | None = None) -> tuple[bytes, float, int]:
    """The four-step extraction of :mod:`dicert._fourstep` with its pieces as dask tasks.

    ``data`` and ``seed`` are what :func:`dicert.extract.extract_toeplitz` was given (paths
    are opened by the workers, so they must see them; bytes are sent to them). Returns
    (output bytes, largest rounding deviation, pieces), exactly as the local driver.
    """
    import uuid

    from dicert import _fourstep

    pieces = _fourstep.plan_pieces(plan)
    total = sum(len(v) for v in pieces.values())
    done = 0

    def tick() -> None:
        nonlocal done
        done += 1
        if progress is not None:
            progress(done, total)

    work = Path(temp_dir) if temp_dir is not None else Path(tempfile.gettempdir())
    tag = f"dicert-extract-{uuid.uuid4().hex[:12]}"
    d, sd = (os.fspath(Path(v).resolve()) if isinstance(v, (str, os.PathLike))
             else bytes(v) if isinstance(v, (memoryview, bytearray)) else v
             for v in (data, seed))
    opened: list[Any] = []
    with client_for(scheduler) as client:
        try:
            packed = _fourstep.open_packed(plan, work, named=True)
            opened.append(packed)
            a = _fourstep.named_store(plan, plan.N2, work)
            opened.append(a)
            b = _fourstep.named_store(plan, plan.H + 1, work)
            opened.append(b)
            # Files are opened by the workers; bytes are sent to them once.
            if not isinstance(d, str):
                [d] = client.scatter([d], broadcast=True, hash=False)
            if not isinstance(sd, str):
                [sd] = client.scatter([sd], broadcast=True, hash=False)
            _run_all(client, _task_pack, [(plan, d, sd, packed, r0, r1)
                                          for r0, r1 in pieces["pack"]], f"{tag}-pack", tick)
            _run_all(client, _task_first, [(plan, packed, a, c0, c1)
                                           for c0, c1 in pieces["first"]], f"{tag}-first", tick)
            _run_all(client, _task_middle, [(plan, a, b, r0, r1)
                                            for r0, r1 in pieces["middle"]], f"{tag}-middle", tick)
            got = _run_all(client, _task_inverse, [(plan, b, c0, c1)
                                                   for c0, c1 in pieces["inverse"]],
                           f"{tag}-inverse", tick)
            out, dev = _fourstep.assemble(plan, got, pieces["inverse"])
        finally:
            for st in opened:
                st.close()
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(st.path)
    return out, dev, total


# --------------------------------------------------------------------------- logs


def _task_digest(path: str) -> tuple[int, str]:
    import hashlib

    _fault_point()
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        while chunk := fh.read(1 << 22):
            h.update(chunk)
            size += len(chunk)
    return size, h.hexdigest()


def file_digests(paths: list[Any], *, scheduler: Any) -> list[tuple[int, str]]:
    """(size, SHA-256) of each file, one task per file, in the order given."""
    import uuid

    files = [os.fspath(Path(p).resolve()) for p in paths]
    with client_for(scheduler) as client:
        return _run_all(client, _task_digest, [(f,) for f in files],
                        f"dicert-digest-{uuid.uuid4().hex[:12]}", lambda: None)


def _task_summary(path: str, fmt: str, block_trials: int,
                  harvest: tuple[str, str, str] | None = None) -> tuple[Any, int, int, int]:
    """The file's summary, the settings symbols of its first and last trial (for the pairs
    across file boundaries) and, with ``harvest`` = (parties, select, bits file), the number
    of raw bits harvested from it, written packed to that file (0 without)."""
    from dicert.logs import summarize_log

    _fault_point()
    ends = [-1, -1]
    sink = None
    if harvest is not None:
        from dicert.stages.scan import harvest_bits

        parties, select, dest = harvest
        sink = _FileBits(dest)

    def edge(chunk: Any) -> None:
        if chunk.codes.size:
            if ends[0] < 0:
                ends[0] = int(chunk.codes[0] >> 2) & 7
            ends[1] = int(chunk.codes[-1] >> 2) & 7
            if sink is not None:
                sink.add(harvest_bits(chunk.codes, parties, select, bool(chunk.has_test_flag)))

    try:
        s = summarize_log(path, format=fmt, block_trials=block_trials, digest=True,
                          on_chunk=edge)
        bits = sink.finish() if sink is not None else 0
    finally:
        if sink is not None:
            sink.close()
    return s, ends[0], ends[1], bits


class _FileBits:
    """0/1 values packed big-endian into a file (created or truncated; a retried task
    rewrites the same file from the start)."""

    def __init__(self, path: str) -> None:
        import numpy as np

        self._np = np
        self._fh = open(path, "wb")  # noqa: SIM115 - closed by close()
        os.fchmod(self._fh.fileno(), 0o600)
        self._carry = np.zeros(0, dtype=np.uint8)
        self.bits = 0

    def add(self, bits: Any) -> None:
        np = self._np
        if not bits.size:
            return
        self.bits += int(bits.size)
        if self._carry.size:
            bits = np.concatenate([self._carry, bits])
        whole = bits.size - bits.size % 8
        self._fh.write(np.packbits(bits[:whole]).tobytes())
        self._carry = bits[whole:].copy()

    def finish(self) -> int:
        if self._carry.size:
            self._fh.write(self._np.packbits(self._carry).tobytes())
            self._carry = self._carry[:0]
        self._fh.flush()
        return self.bits

    def close(self) -> None:
        self._fh.close()


def _task_blocks(path: str, fmt: str, offset: int, block_trials: int) -> Any:
    """Raw (t not re-filed) counts of the global blocks this file's trials fall in, for a file
    whose first trial has global index ``offset``; returns (first block index, counts)."""
    from dicert.logs import BlockTally, open_log

    _fault_point()
    tally = BlockTally(block_trials, offset)
    for chunk in open_log(path, format=fmt).iter_chunks(hash_files=False):
        tally.add(chunk.codes)
    return tally.first_block, tally.result()


def summarize_log(source: Any, *, scheduler: Any, block_trials: int = 1 << 20,
                  format: str | None = None) -> Any:
    """:func:`dicert.logs.summarize_log` (with digest) with each file counted and hashed by a
    task on the cluster; counts, blocks, settings pairs, files and the log digest
    (:func:`dicert.logs.files_digest` for several files) are identical to the local pass."""
    summary, _ = _summarize(source, scheduler=scheduler, block_trials=block_trials,
                            format=format)
    return summary


def scan_files(source: Any, *, scheduler: Any, block_trials: int, parties: str, select: str,
               work_dir: Any) -> tuple[Any, list[tuple[str, int]]]:
    """:func:`summarize_log` and, in the same task per file, the harvest of each file's raw
    outcome bits (:func:`dicert.stages.scan.harvest_bits`) into a packed file in
    ``work_dir`` (a directory every worker sees). Returns the summary and, per file in log
    order, (bits file, number of bits); the caller joins them in that order and removes them
    (:func:`remove_bit_files`). On failure the files are removed here."""
    return _summarize(source, scheduler=scheduler, block_trials=block_trials, format=None,
                      harvest=(parties, select, os.fspath(Path(work_dir).resolve())))


def remove_bit_files(parts: list[tuple[str, int]]) -> None:
    for path, _ in parts:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(path)


def _summarize(source: Any, *, scheduler: Any, block_trials: int, format: str | None,
               harvest: tuple[str, str, str] | None = None) -> tuple[Any, list]:
    import uuid

    import numpy as np

    from dicert.errors import ParameterError
    from dicert.logs import FileInfo, LogSummary, files_digest, open_log

    _distributed()
    if block_trials <= 0:
        raise ParameterError("block_trials must be positive")
    log = open_log(source, format=format)  # resolves the files, checks their t columns agree
    if getattr(log, "spec", None) is not None:  # dicert.logspec.SpecLog: joined in one pass
        raise ParameterError(f"{source}: a log read through a log spec (or a Parquet/HDF5 "
                             "file) is read locally, not on a cluster; run without --scheduler")
    files = [os.fspath(Path(f).resolve()) for f in log.files]
    tag = f"dicert-log-{uuid.uuid4().hex[:12]}"
    # Named per file and fixed before any task runs, so a task that dies and is run again
    # rewrites the same file, and every file is known here for the clean-up.
    bit_files = ([os.path.join(harvest[2], f".{tag}-{i:05d}.bits") for i in range(len(files))]
                 if harvest is not None else [])
    jobs = [(f, fmt, block_trials) + ((harvest[0], harvest[1], bit_files[i]),)
            if harvest is not None else (f, fmt, block_trials)
            for i, (f, fmt) in enumerate(zip(files, log.formats, strict=True))]
    try:
        with client_for(scheduler) as client:
            got = _run_all(client, _task_summary, jobs, f"{tag}-files", lambda: None)
            parts = [g[0] for g in got]
            # Consecutive settings pairs: those inside each file, plus one across each boundary.
            pairs = sum(np.asarray(p.pair_counts, dtype=np.int64) for p in parts)
            for (_, _, last, _), (_, first, _, _) in zip(got[:-1], got[1:], strict=True):
                pairs[last, first] += 1
            trials = [int(p.trials) for p in parts]
            offsets = np.concatenate([[0], np.cumsum(trials)[:-1]]).astype(np.int64)
            nblocks = -(-sum(trials) // block_trials)
            if all(int(o) % block_trials == 0 for o in offsets):
                block_counts = np.concatenate([p.block_counts for p in parts], axis=0)
            else:  # files do not end on block boundaries: count each file's global blocks again
                raw = np.zeros((nblocks, 2, 2, 2, 2, 2), dtype=np.int64)
                blocks = _run_all(client, _task_blocks,
                                  [(f, fmt, int(o), block_trials)
                                   for f, fmt, o in zip(files, log.formats, offsets,
                                                        strict=True)],
                                  f"{tag}-blocks", lambda: None)
                for first, counts in blocks:
                    raw[first: first + len(counts)] += counts
                block_counts = raw
                if not log.has_test_flag:
                    block_counts = np.stack([np.zeros_like(raw[:, 0]), raw.sum(axis=1)], axis=1)
    except BaseException:
        remove_bit_files([(f, 0) for f in bit_files])
        raise
    infos = [FileInfo(path=str(orig), format=fi.format, size_bytes=fi.size_bytes,
                      sha256=fi.sha256, trials=fi.trials)
             for orig, p in zip(log.files, parts, strict=True) for fi in p.files]
    counts = (block_counts.sum(axis=0) if block_counts.size
              else np.zeros((2,) * 5, dtype=np.int64))
    sha = infos[0].sha256 if len(infos) == 1 else files_digest(
        {"name": Path(f.path).name, "bytes": f.size_bytes, "sha256": f.sha256} for f in infos)
    summary = LogSummary(trials=int(sum(trials)), counts=counts, block_trials=block_trials,
                         block_counts=block_counts, has_test_flag=log.has_test_flag,
                         sha256=sha, size_bytes=int(sum(p.size_bytes for p in parts)),
                         files=tuple(infos), pair_counts=pairs, trials_in_log=int(sum(trials)))
    if harvest is None:
        return summary, []
    return summary, [(f, int(g[3])) for f, g in zip(bit_files, got, strict=True)]
