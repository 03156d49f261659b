"""One source (its files in order), the streaming station join and :class:`SpecLog`.

Part of :mod:`dicert.logspec` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import hashlib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert.errors import LogFormatError, ParameterError

from dicert.logspec._spec import (
    LogSpec,
    SPEC_FORMAT,
    STATION_CHUNK_ROWS,
    SourceSpec,
    _format_from_ext,
    is_spec_file,
    load_spec,
)
from dicert.logspec._readers import _READERS, implicit_spec


# --------------------------------------------------------------------------------------------
# One source (files in order) and the join
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JoinReport:
    """What the station join found: trials matched, missing at A or at B (dropped, within the
    spec's ``join.max_missing``), and keys refused (always zero in a completed join: a
    duplicated or out-of-order key stops the join with an error).

    With ``[join] keys = "consecutive"`` also the declaration (``keys``, and the declared
    ``key_range`` [first_key, last_key], either end None when not declared) and the trials
    ``missing_at_both`` stations: keys inside the range that no station recorded (these count
    against ``max_missing`` too). Without the declaration these three are left out of
    :meth:`to_dict` (such a trial leaves no row: it is only assumed not to happen)."""

    matched: int
    missing_at_a: int
    missing_at_b: int
    duplicated_keys: int
    out_of_order_keys: int
    max_missing: int
    first_key: int | None
    last_key: int | None
    keys: str | None = None
    key_range: tuple[int | None, int | None] | None = None
    missing_at_both: int = 0

    def to_dict(self) -> dict:
        d = dataclasses.asdict(self)
        if self.keys is None:
            for k in ("keys", "key_range", "missing_at_both"):
                del d[k]
        else:
            d["key_range"] = list(self.key_range or (None, None))
        return d


class _Source:
    """The rows of one source (its files in order), with per-file digests and key checks."""

    def __init__(self, src: SourceSpec, limits, hash_files: bool) -> None:
        self.src, self.limits, self.hash_files = src, limits, hash_files
        self.infos: list[Any] = []
        self.rows = 0

    def chunks(self, chunk_trials: int) -> Iterator[tuple[Path, dict[str, np.ndarray]]]:
        from dicert.logs import FileInfo

        prev = -1
        keyed = "key" in self.src.columns
        for path in self.src.files:
            h = hashlib.sha256() if self.hash_files else None
            reader = _READERS[self.src.format](self.src, path, self.limits)
            here = 0
            try:
                for cols in reader.chunks(chunk_trials, h):
                    n = len(next(iter(cols.values())))
                    if n == 0:
                        continue
                    if keyed:
                        prev = _check_keys(cols["key"], prev, path, self.src)
                    here += n
                    yield path, cols
                size = path.stat().st_size
            except LogFormatError:
                raise
            except OSError as exc:
                from dicert.logs import _read_error

                raise _read_error(path, exc) from None
            if here == 0:
                raise LogFormatError(path, "", "contains no trials")
            self.rows += here
            self.infos.append(FileInfo(path=str(path), format=self.src.format, size_bytes=size,
                                       sha256=h.hexdigest() if h is not None else None,
                                       trials=here))


def _check_keys(keys: np.ndarray, prev: int, path: Path, src: SourceSpec) -> int:
    """Keys must increase strictly (across chunks and files); return the last key."""
    if int(keys[0]) > prev and bool((keys[1:] > keys[:-1]).all()):
        return int(keys[-1])
    d = np.diff(keys, prepend=prev)
    i = int(np.argmax(d <= 0))
    k = int(keys[i])
    before = int(keys[i - 1]) if i else prev
    if d[i] == 0:
        raise LogFormatError(path, f"key {k}", f"duplicated trial key at {src.label} "
                             f"(column {src.columns['key']!r}); a trial recorded twice "
                             "cannot be joined (remove the duplicate, or find why it was "
                             "written twice)")
    raise LogFormatError(path, f"key {k}", f"out-of-order trial key at {src.label}: {k} "
                         f"follows {before}; the streaming join needs each station's rows "
                         "sorted by increasing key (sort the file, e.g. sort -t, -k1,1n)")


def _prefetched(it: Iterator[Any], depth: int = 1) -> Iterator[Any]:
    """Run ``it`` in a worker thread, at most ``depth`` items ahead (the readers and numpy
    release the GIL, so the two stations are read in parallel with the merge). Exceptions are
    re-raised in the consumer; closing the consumer stops the worker."""
    import queue
    import threading

    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def put(item) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def work() -> None:
        try:
            for item in it:
                if not put((None, item)):
                    return
            put((None, end))
        except BaseException as exc:  # re-raised in the consumer
            put((exc, None))
        finally:
            close = getattr(it, "close", None)
            if close is not None and stop.is_set():
                try:
                    close()
                except Exception:  # pragma: no cover - best effort on abandon
                    pass

    th = threading.Thread(target=work, name="dicert-station-reader", daemon=True)
    th.start()
    try:
        while True:
            exc, item = q.get()
            if exc is not None:
                raise exc
            if item is end:
                return
            yield item
    finally:
        stop.set()
        th.join()


def _codes_table(cols: Mapping[str, np.ndarray]) -> np.ndarray:
    c = (cols["x"] << 3) | (cols["y"] << 2) | (cols["a"] << 1) | cols["b"]
    if "t" in cols:
        c |= cols["t"] << 4
    return c.astype(np.uint8, copy=False)


class SpecLog:
    """A log described by a :class:`LogSpec`, opened for streaming (see the module docstring).

    Offers the interface of :class:`dicert.logs.TrialLog`; after a complete
    :meth:`iter_chunks` pass, :attr:`join_report` and :attr:`audit` describe the join.
    """

    def __init__(self, spec: LogSpec, *, limits=None) -> None:
        from dicert.logs import current_read_limits

        self.spec = spec
        self.limits = limits if limits is not None else current_read_limits()
        self.files = [p for s in spec.sources for p in s.files]
        self.formats = [s.format for s in spec.sources for _ in s.files]
        for p in self.files:
            if not p.is_file():
                raise LogFormatError(p, "", "no such file" if not p.exists() else
                                     "is not a regular file")
        self.has_test_flag = spec.has_test_flag
        self.file_infos: list[Any] = []
        self.join_report: JoinReport | None = None

    @property
    def audit(self) -> dict | None:
        """The record's ``log.spec`` section: the spec's name, content, SHA-256 and the join
        report (None for a plain Parquet/HDF5 log read without a spec)."""
        if self.spec.layout == "plain":
            return None
        return {"format": SPEC_FORMAT, "name": self.spec.path.name, "sha256": self.spec.sha256,
                "content": self.spec.text, "layout": self.spec.layout,
                "join": self.join_report.to_dict() if self.join_report is not None else None}

    def iter_chunks(self, chunk_trials: int = 1 << 24, *, hasher=None, hash_files: bool = True,
                    reuse_buffers: bool = False) -> Iterator[Any]:
        from dicert.logs import LogChunk

        if chunk_trials <= 0:
            raise ParameterError("chunk_trials must be positive")
        if hasher is not None:
            raise ParameterError("a log read through a log spec is digested per file "
                                 "(hash_files), not through one hasher")
        self.file_infos = []
        self.join_report = None
        start = 0
        # Station rows are read in chunks of at most STATION_CHUNK_ROWS (each row costs about
        # 10 bytes per station in the merge buffers); the joined chunks are no larger.
        chunk_trials = min(chunk_trials, STATION_CHUNK_ROWS)
        if self.spec.layout in ("table", "plain"):
            s = _Source(self.spec.sources[0], self.limits, hash_files)
            for _path, cols in s.chunks(chunk_trials):
                codes = _codes_table(cols)
                yield LogChunk(codes=codes, start=start, has_test_flag=self.has_test_flag)
                start += codes.size
            self.file_infos = list(s.infos)
            return
        sa = _Source(self.spec.sources[0], self.limits, hash_files)
        sb = _Source(self.spec.sources[1], self.limits, hash_files)
        state = _JoinState(self.spec)
        for codes in _merge_join(_prefetched(sa.chunks(chunk_trials)),
                                 _prefetched(sb.chunks(chunk_trials)), state, self.spec):
            if codes.size:
                yield LogChunk(codes=codes, start=start, has_test_flag=self.has_test_flag)
                start += codes.size
        self.file_infos = list(sa.infos) + list(sb.infos)
        self.join_report = JoinReport(matched=state.matched, missing_at_a=state.missing_a,
                                      missing_at_b=state.missing_b, duplicated_keys=0,
                                      out_of_order_keys=0, max_missing=self.spec.max_missing,
                                      first_key=state.first_key, last_key=state.last_key,
                                      keys=self.spec.keys,
                                      key_range=(self.spec.first_key, self.spec.last_key)
                                      if self.spec.keys is not None else None,
                                      missing_at_both=state.missing_both)
        if state.matched == 0:
            raise LogFormatError(self.spec.path, "", "the stations share no trial key: the "
                                 "join is empty")


class _JoinState:
    """Counts of the join; with consecutive keys declared also the gaps (keys no station
    recorded), from the previous key seen at either station (the only key remembered)."""

    def __init__(self, spec: LogSpec) -> None:
        self.spec = spec
        self.matched = self.missing_a = self.missing_b = self.missing_both = 0
        self.first_key: int | None = None
        self.last_key: int | None = None
        self.consecutive = spec.keys == "consecutive"
        #: the last key seen at either station (gaps are counted from it); before any key,
        #: first_key - 1 when a first key is declared (a gap at the start is visible)
        self.prev_key: int | None = (spec.first_key - 1 if self.consecutive
                                     and spec.first_key is not None else None)

    def missing(self, miss_a: np.ndarray, miss_b: np.ndarray, pa: Path, pb: Path,
                ka: np.ndarray | None = None, kb: np.ndarray | None = None,
                matched: int = 0) -> None:
        """Count trials missing at A (``miss_a``: keys seen only at B) and at B, and with
        consecutive keys the gaps before and among this round's keys (``ka`` of A, ``kb`` of
        B, sorted, ``matched`` of them common: the round's keys number ka + kb - matched, so
        no union is built unless a key is refused); refuse, naming the first key in key order
        beyond the spec's tolerance."""
        gaps = 0
        prev = self.prev_key
        if self.consecutive and ka is not None and kb is not None and (ka.size or kb.size):
            lo = min(int(k[0]) for k in (ka, kb) if k.size)
            hi = max(int(k[-1]) for k in (ka, kb) if k.size)
            self._check_range(lo, hi, ka, pa, pb)
            if prev is None:
                prev = lo - 1  # no declared first key: the range starts at the first key seen
            gaps = (lo - prev - 1) + (hi - lo - (ka.size + kb.size - matched - 1))
            self.prev_key = hi
        n = miss_a.size + miss_b.size + gaps
        if n == 0:
            return
        allowed = self.spec.max_missing - (self.missing_a + self.missing_b + self.missing_both)
        if n > allowed:
            if gaps:
                k = _kth_missing(miss_a, miss_b, np.union1d(ka, kb), prev, max(allowed, 0))
                self._refuse(_EMPTY, _EMPTY, np.array([k], np.int64), 0, pa, pb,
                             one_sided=(miss_a, miss_b))
            self._refuse(miss_a, miss_b, _EMPTY, allowed, pa, pb)
        self.missing_a += miss_a.size
        self.missing_b += miss_b.size
        self.missing_both += gaps

    def finish(self, pa: Path, pb: Path) -> None:
        """The gap after the last key seen, up to a declared last key."""
        if not self.consecutive or self.spec.last_key is None or self.prev_key is None:
            return
        gaps = self.spec.last_key - self.prev_key
        if gaps <= 0:
            return
        allowed = self.spec.max_missing - (self.missing_a + self.missing_b + self.missing_both)
        if gaps > allowed:
            self._refuse(_EMPTY, _EMPTY, np.array([self.prev_key + 1 + max(allowed, 0)],
                                                  np.int64), 0, pa, pb)
        self.missing_both += gaps
        self.prev_key = self.spec.last_key

    def _check_range(self, lo: int, hi: int, ka: np.ndarray, pa: Path, pb: Path) -> None:
        first, last = self.spec.first_key, self.spec.last_key
        for bad, k, what in ((first is not None and lo < first, lo,
                              f"below join.first_key = {first}"),
                             (last is not None and hi > last, hi,
                              f"above join.last_key = {last}")):
            if bad:
                raise LogFormatError(pa if _contains(ka, k) else pb, f"key {k}", f"trial key "
                                     f"{what}: the spec declares the run's consecutive keys "
                                     "to lie in [join.first_key, join.last_key]")

    def _refuse(self, miss_a: np.ndarray, miss_b: np.ndarray, gap_keys: np.ndarray,
                allowed: int, pa: Path, pb: Path, one_sided: tuple | None = None) -> None:
        if one_sided is not None:  # gap_keys holds the key refused: where is it missing?
            k = int(gap_keys[0])
            for w, arr in enumerate(one_sided):
                if _contains(arr, k):
                    miss_a, miss_b = (gap_keys, _EMPTY) if w == 0 else (_EMPTY, gap_keys)
                    gap_keys = _EMPTY
                    break
        keys = np.concatenate([miss_a, miss_b, gap_keys])
        where = np.concatenate([np.zeros(miss_a.size, np.int8), np.ones(miss_b.size, np.int8),
                                np.full(gap_keys.size, 2, np.int8)])
        order = np.argsort(keys, kind="stable")
        j = int(order[max(allowed, 0)])
        k, w = int(keys[j]), int(where[j])
        tail = (f"the spec tolerates {self.spec.max_missing} missing trials "
                "(join.max_missing); silently dropping trials can bias the test")
        if w == 2:
            raise LogFormatError(pa, f"key {k}", f"trial missing at both stations (no row in "
                                 f"{pa.name} nor in {pb.name}; the spec declares consecutive "
                                 f"keys, join.keys); {tail}")
        at = "AB"[w]
        here, other = (pa, pb) if at == "A" else (pb, pa)
        raise LogFormatError(here, f"key {k}", f"trial missing at station {at} (present "
                             f"at station {'B' if at == 'A' else 'A'}, {other.name}); {tail}")


def _contains(arr: np.ndarray, k: int) -> bool:
    """Whether the sorted array ``arr`` holds ``k``."""
    i = int(np.searchsorted(arr, k))
    return i < arr.size and int(arr[i]) == k


def _kth_missing(miss_a: np.ndarray, miss_b: np.ndarray, union: np.ndarray, prev: int,
                 k: int) -> int:
    """The ``k``-th (from 0) smallest key missing somewhere in this round: at A (``miss_a``),
    at B (``miss_b``) or at both (a key after ``prev``, up to ``union[-1]``, not in
    ``union``), by bisection on the key (no list of gap keys is built: memory stays flat
    whatever the tolerance)."""
    def count(v: int) -> int:  # missing keys <= v
        in_union = int(np.searchsorted(union, v, "right"))
        return (int(np.searchsorted(miss_a, v, "right")) + int(np.searchsorted(miss_b, v, "right"))
                + (v - prev) - in_union)
    lo, hi = prev + 1, int(union[-1])
    while lo < hi:
        mid = (lo + hi) // 2
        if count(mid) >= k + 1:
            hi = mid
        else:
            lo = mid + 1
    return lo


_EMPTY = np.zeros(0, np.int64)


def _match_runs(ka: np.ndarray, kb: np.ndarray, max_steps: int = 16) -> tuple[
        list[tuple[int, int, int]], tuple[np.ndarray, np.ndarray] | None]:
    """The keys common to two strictly increasing arrays, as aligned runs ``(i, j, d)``
    (``ka[i:i+d] == kb[j:j+d]``) and, if any, index arrays of a remainder (``ka[ixa] ==
    kb[ixb]``). A few missing keys are stepped over with vectorised comparisons of the
    aligned remainders (runs are sliced later, never gathered); beyond ``max_steps`` the rest
    is matched by binary search."""
    runs: list[tuple[int, int, int]] = []
    i = j = 0
    for _ in range(max_steps):
        m = min(ka.size - i, kb.size - j)
        if m == 0:
            break
        diff = ka[i:i + m] != kb[j:j + m]
        d = int(np.argmax(diff))
        if not diff[d]:
            d = m
        if d:
            runs.append((i, j, d))
        i, j = i + d, j + d
        if d == m:
            break  # what is left of the longer array lies beyond the other's last key
        if ka[i] < kb[j]:
            i += 1  # ka[i] is in no later position of kb (all larger): missing at B
        else:
            j += 1
    else:
        ra, rb = ka[i:], kb[j:]
        pos = np.searchsorted(rb, ra)
        posc = np.minimum(pos, max(rb.size - 1, 0))
        hit = (pos < rb.size) & (rb[posc] == ra) if rb.size else np.zeros(ra.size, bool)
        h = np.flatnonzero(hit)
        return runs, (h + i, pos[h] + j)
    return runs, None


def _match_sorted(ka: np.ndarray, kb: np.ndarray, max_steps: int = 16) -> tuple[np.ndarray,
                                                                              np.ndarray]:
    """Positions of the keys common to two strictly increasing arrays (``ka[ixa] ==
    kb[ixb]``), from :func:`_match_runs`."""
    runs, tail = _match_runs(ka, kb, max_steps)
    pa = [np.arange(i, i + d) for i, _, d in runs]
    pb = [np.arange(j, j + d) for _, j, d in runs]
    if tail is not None:
        pa.append(tail[0])
        pb.append(tail[1])
    if not pa:
        return _EMPTY, _EMPTY
    return np.concatenate(pa), np.concatenate(pb)


def _joined_codes(ba: Mapping[str, np.ndarray], bb: Mapping[str, np.ndarray], sa: Any, sb: Any,
                  ta: bool, tb: bool, keys: np.ndarray, pa: Path, pb: Path) -> np.ndarray:
    """Trial codes of the matched rows ``sa`` of A and ``sb`` of B (slices or index arrays);
    with a test flag at both stations, they must agree."""
    codes = ((ba["setting"][sa] << 3) | (bb["setting"][sb] << 2)
             | (ba["outcome"][sa] << 1) | bb["outcome"][sb])
    if ta and tb:
        t1, t2 = ba["test"][sa], bb["test"][sb]
        if not np.array_equal(t1, t2):
            i = int(np.argmax(t1 != t2))
            k = int(keys[sa][i])
            raise LogFormatError(pb, f"key {k}", "the stations disagree on whether "
                                 f"this trial is a test round ({pa.name}: {int(t1[i])}, "
                                 f"{pb.name}: {int(t2[i])})")
        codes = codes | (t1 << 4)
    elif ta:
        codes = codes | (ba["test"][sa] << 4)
    elif tb:
        codes = codes | (bb["test"][sb] << 4)
    return codes


def _merge_join(ia: Iterator, ib: Iterator, st: _JoinState, spec: LogSpec) -> Iterator[np.ndarray]:
    """Merge join of two key-sorted chunk streams; each round consumes one buffer entirely,
    so each holds at most one chunk (memory is flat)."""
    ta = "test" in spec.sources[0].columns
    tb = "test" in spec.sources[1].columns
    ba = bb = None  # (path, cols) with unconsumed rows
    pa, pb = spec.sources[0].files[0], spec.sources[1].files[0]
    done_a = done_b = False
    while True:
        if ba is None and not done_a:
            nxt = next(ia, None)
            if nxt is None:
                done_a = True
            else:
                pa, ba = nxt
        if bb is None and not done_b:
            nxt = next(ib, None)
            if nxt is None:
                done_b = True
            else:
                pb, bb = nxt
        if ba is None and bb is None:
            st.finish(pa, pb)
            return
        if ba is None:
            st.missing(bb["key"], _EMPTY, pa, pb, _EMPTY, bb["key"])
            bb = None
            continue
        if bb is None:
            st.missing(_EMPTY, ba["key"], pa, pb, ba["key"], _EMPTY)
            ba = None
            continue
        ka, kb = ba["key"], bb["key"]
        cut = min(int(ka[-1]), int(kb[-1]))
        na = int(np.searchsorted(ka, cut, "right"))
        nb = int(np.searchsorted(kb, cut, "right"))
        ka_, kb_ = ka[:na], kb[:nb]
        if na == nb and np.array_equal(ka_, kb_):
            runs, tail = [(0, 0, na)], None
            if st.consecutive:
                st.missing(_EMPTY, _EMPTY, pa, pb, ka_, kb_, na)
        else:
            runs, tail = _match_runs(ka_, kb_)
            miss_b = np.ones(na, bool)  # rows of A not matched: missing at B
            miss_a = np.ones(nb, bool)
            for i, j, d in runs:
                miss_b[i:i + d] = False
                miss_a[j:j + d] = False
            if tail is not None:
                miss_b[tail[0]] = False
                miss_a[tail[1]] = False
            st.missing(kb_[miss_a], ka_[miss_b], pa, pb, ka_, kb_,
                       sum(d for _, _, d in runs) + (int(tail[0].size) if tail is not None
                                                     else 0))
        parts = [(slice(i, i + d), slice(j, j + d)) for i, j, d in runs]
        if tail is not None and tail[0].size:
            parts.append(tail)
        pieces = [_joined_codes(ba, bb, sa, sb, ta, tb, ka_, pa, pb) for sa, sb in parts]
        nm = sum(int(p.size) for p in pieces)
        if nm:
            codes = pieces[0] if len(pieces) == 1 else np.concatenate(pieces)
            first = parts[0][0]
            last = parts[-1][0]
            if st.first_key is None:
                st.first_key = int(ka_[first][0])
            st.last_key = int(ka_[last][-1])
            st.matched += nm
            yield codes.astype(np.uint8, copy=False)
        ba = {k: v[na:] for k, v in ba.items()} if na < ka.size else None
        bb = {k: v[nb:] for k, v in bb.items()} if nb < kb.size else None


def open_spec_log(source: Any, *, limits=None, format: str | None = None) -> SpecLog:
    """Open the log a spec file describes (or a plain Parquet/HDF5 log, by its extension or
    an explicit ``format``) for streaming."""
    p = Path(source)
    fmt = format.lower() if format is not None else None
    if fmt in ("parquet", "hdf5") or (fmt is None and _format_from_ext(p) in ("parquet", "hdf5")
                                      and not is_spec_file(p)):
        return SpecLog(implicit_spec(p, fmt), limits=limits)
    return SpecLog(load_spec(p), limits=limits)


def spec_entry_problem(entry: Any) -> str | None:
    """Why a record's ``log.spec`` section is inconsistent (None if it is consistent): the
    recorded SHA-256 must be that of the recorded content."""
    if not isinstance(entry, Mapping):
        return "expected an object"
    content, sha = entry.get("content"), entry.get("sha256")
    if not isinstance(content, str) or not isinstance(sha, str):
        return "expected content and sha256 strings"
    if hashlib.sha256(content.encode("utf-8")).hexdigest() != sha:
        return "the recorded SHA-256 is not that of the recorded spec content"
    if entry.get("format") != SPEC_FORMAT:
        return f"unknown spec format {entry.get('format')!r}"
    return None


def choose_source(log: str | None, log_spec: Any, what: str = "LOG") -> str:
    """The log a command reads: the positional log, or the ``--log-spec`` file (one of them)."""
    if log_spec is None:
        if log is None:
            raise ParameterError(f"give the {what} or --log-spec FILE")
        return log
    if log is not None:
        raise ParameterError(f"give the log either as {what} or with --log-spec, not both")
    if not Path(log_spec).is_file():
        raise LogFormatError(log_spec, "", "no such file")
    if not is_spec_file(log_spec):
        raise LogFormatError(log_spec, "key 'format'", "not a log spec (expected format = "
                             f"\"{SPEC_FORMAT}\" near the top of the file)")
    return str(log_spec)
