"""Stage 1, read and scan: one streaming pass over the log that counts, hashes and harvests
the raw outcome bits (:func:`scan_log`), with early stopping for probability estimation on a
single binary log and ``follow`` for a growing one. Shared by certify and verify.

Part of the certify and verify recipes (:mod:`dicert.certification`,
:mod:`dicert.verification`).
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import hashlib
import math
import os
import tempfile
from collections.abc import Callable
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from dicert._io import read_user_file
from dicert.errors import DicertError, LogFormatError, ParameterError, SeedError

if TYPE_CHECKING:
    from dicert.protocol import Protocol


#: Keep harvested raw bits in memory below this many bytes, spill to a private temp file
#: (mode 0600, removed when done) above, so memory does not grow with the log.
_SPILL_BYTES = 8 << 20
#: Trials per streamed chunk.
_CHUNK_TRIALS = 1 << 22
Clock = Callable[[], "_dt.datetime | str"]
Progress = Callable[[str, int, "int | None"], None]
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LogScan:
    """What one streaming pass over a log yields."""

    counts: np.ndarray  # int64 (2,2,2,2,2) [t,x,y,a,b]
    trials: int
    sha256: str
    size_bytes: int
    files: tuple[str, ...]
    has_test_flag: bool
    raw_bits: int
    raw_sha256: str
    finite: Any = None  # FiniteSizeResult of a streaming method (pef), else None
    scope: str = "whole"  # "whole": every byte of the log; "prefix": header + trials_read
    bytes_read: int | None = None  # bytes covered by sha256 (= size_bytes)
    trials_read: int | None = None
    stopped_early: bool = False  # reading stopped because the outcome was decided
    stop_trial_index: int | None = None  # last trial read when stopped_early
    ended_by: str = "end-of-log"  # "end-of-log" | "decision" | "idle-timeout" | "declared-trials"
    follow: dict | None = None  # FollowSpec.to_dict() of a --follow run
    # Inputs of the design-conformance stage (dicert.design) and the input identity.
    block_settings: Any = None  # (B, 8) settings-symbol counts (4t+2x+y) per block
    pair_counts: Any = None  # (8, 8) consecutive settings symbols
    trials_in_log: int | None = None  # trials present (> trials when n was declared)
    file_entries: tuple = ()  # ({"name", "bytes", "sha256"}, ...) in read order
    formats: tuple = ()  # format of each file
    log_spec: dict | None = None  # log read through a log spec: its content, digest, join report
    # Per-block counts for the record's CHSH-per-block series (see group_blocks):
    # (first trial of each group, (G, 32) int64 counts), or None.
    block_series: Any = None


# --------------------------------------------------------------------------- harvesting


class _BitSink:
    """Packs a stream of 0/1 values big-endian; keeps bytes in memory or spills to a file."""

    def __init__(self, spill_dir: Path | None) -> None:
        self._carry = np.zeros(0, dtype=np.uint8)
        self._parts: list[bytes] = []
        self._mem = 0
        self._spill_dir = spill_dir
        self._fh = None
        self.path: Path | None = None
        self.bits = 0
        self._hash = hashlib.sha256()

    def _emit(self, data: bytes) -> None:
        if not data:
            return
        self._hash.update(data)
        try:
            if (self._fh is None and self._mem + len(data) > _SPILL_BYTES
                    and self._spill_dir is not None):
                self._spill_dir.mkdir(parents=True, exist_ok=True)
                fd, tmp = tempfile.mkstemp(prefix=".raw.", suffix=".part", dir=self._spill_dir)
                self._fh = os.fdopen(fd, "wb")
                self.path = Path(tmp)
                for p in self._parts:
                    self._fh.write(p)
                self._parts = []
            if self._fh is not None:
                self._fh.write(data)
                return
        except OSError as exc:  # disk full, quota: one line naming the spill folder
            raise DicertError(f"{self.path or self._spill_dir}: cannot write the raw-bit "
                              f"spill file ({exc.strerror or exc})") from None
        self._parts.append(data)
        self._mem += len(data)

    def add(self, bits: np.ndarray) -> None:
        if bits.size == 0:
            return
        self.bits += int(bits.size)
        if self._carry.size:
            bits = np.concatenate([self._carry, bits])
        whole = bits.size - bits.size % 8
        if whole:
            self._emit(np.packbits(bits[:whole]).tobytes())
        self._carry = bits[whole:].copy()

    def finish(self) -> str:
        if self._carry.size:
            self._emit(np.packbits(self._carry).tobytes())
            self._carry = np.zeros(0, dtype=np.uint8)
        if self._fh is not None:
            self._fh.flush()
            self._fh.close()
            self._fh = None
        return self._hash.hexdigest()

    def data(self) -> bytes | Path:
        """The packed raw bits: bytes in memory, or the spill file's path."""
        return self.path if self.path is not None else b"".join(self._parts)

    def discard(self) -> None:
        if self._fh is not None:
            with contextlib.suppress(OSError):
                self._fh.close()
            self._fh = None
        if self.path is not None:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self.path)
            self.path = None
        self._parts = []


def harvest_bits(codes: np.ndarray, parties: str, rounds: str, has_test_flag: bool) -> np.ndarray:
    """Raw outcome bits of a chunk of trial codes, in the documented order (uint8 0/1 values).

    ``codes`` are trial bytes (t<<4)|(x<<3)|(y<<2)|(a<<1)|b.
    """
    codes = np.asarray(codes, dtype=np.uint8)
    if rounds == "generation":
        if not has_test_flag:
            return np.zeros(0, dtype=np.uint8)
        codes = codes[(codes & 0x10) == 0]
    a = (codes >> 1) & 1
    if parties == "A":
        return a
    out = np.empty(2 * codes.size, dtype=np.uint8)
    out[0::2] = a
    out[1::2] = codes & 1
    return out


def expected_raw_bits(counts: np.ndarray, parties: str, rounds: str) -> int:
    """Number of harvested bits implied by the counts table [t,x,y,a,b]."""
    counts = np.asarray(counts)
    n = int(counts.sum()) if rounds == "all" else int(counts[0].sum())
    return n * len(parties)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class FollowSpec:
    """How ``certify --follow`` waits for a growing binary log.

    ``poll_s`` is the pause between looks for new bytes; after ``idle_timeout_s`` seconds
    without growth (None: wait until the trailer, the target or n_max) the run ends with what
    was read.
    """

    poll_s: float = 0.5
    idle_timeout_s: float | None = 300.0

    def __post_init__(self) -> None:
        if not (isinstance(self.poll_s, (int, float)) and math.isfinite(self.poll_s)
                and self.poll_s > 0):
            raise ParameterError(f"--poll: expected a positive number of seconds, got "
                                 f"{self.poll_s!r}")
        t = self.idle_timeout_s
        if t is not None and not (isinstance(t, (int, float)) and math.isfinite(t) and t > 0):
            raise ParameterError(f"--idle-timeout: expected a positive number of seconds, got "
                                 f"{t!r}")

    def to_dict(self) -> dict:
        return {"poll_s": float(self.poll_s),
                "idle_timeout_s": None if self.idle_timeout_s is None
                else float(self.idle_timeout_s)}


class _PefFeed:
    """Feeds a :class:`~dicert.finite.pef.PefAccumulator` as trials arrive, and records what
    it consumed: counts, harvested bits and (optionally) a digest of exactly those trial bytes.

    The accumulator's success trial and its n_max stop do not depend on how the trials are
    split into pieces, but the point at which it notices a trial outside the settings model
    (factor 0) is the end of an internal sub-block. So an analysed piece is always cut right
    after the first such trial: the run then stops at that very trial, whatever the reader
    (certify, certify --follow, verify) and however the bytes arrived. Calibration trials are
    fed separately from analysis trials for the same reason.
    """

    def __init__(self, protocol: Protocol, sink: _BitSink, *, has_test_flag: bool,
                 hasher: Any = None, log_path: Any = None, offset0: int = 0) -> None:
        from dicert.finite.pef import PefAccumulator

        self.acc = PefAccumulator(protocol.analysis, protocol.design)
        params = protocol.analysis
        self.first = params.calibration_trials if params.calibration == "prefix" else 0
        self.parties = protocol.harvest.parties
        self.rounds = protocol.harvest.rounds
        self.has_t = has_test_flag
        self.mask = 0x1F if has_test_flag else 0x0F
        self.sink = sink
        self.hasher = hasher
        self.log_path = log_path
        self.offset0 = offset0  # byte offset of trial 0 in the file (for error messages)
        self.counts = np.zeros(32, dtype=np.int64)
        self.fed = 0  # trials consumed by the accumulator (index of the next trial)
        from dicert.design import spec_of

        self.blocks = _BlockTally(spec_of(protocol).block_trials)
        self.pairs = np.zeros(64, dtype=np.int64)
        self._prev = -1
        self._zero: np.ndarray | None = None

    @property
    def done(self) -> bool:
        return self.acc.done

    def push(self, codes: np.ndarray) -> None:
        """Consume trial codes (in log order) until the outcome is decided."""
        codes = np.asarray(codes, dtype=np.uint8)
        bad_at = -1
        if codes.size and int(codes.max()) > self.mask:
            bad_at = int(np.flatnonzero(codes & np.uint8(~self.mask & 0xFF))[0])
        good = codes if bad_at < 0 else codes[:bad_at]
        # Logs without a t column carry t = 0 in the code, but every trial is a test round
        # (project data model); the accumulator reads t from the code.
        acc_codes = good if self.has_t else good | np.uint8(0x10)
        pos = 0
        while pos < good.size and not self.done:
            if self.acc.pef is None:  # calibration prefix still being read
                take = min(self.first - self.fed, good.size - pos)
            else:
                if self._zero is None:
                    self._zero = ~np.isfinite(self.acc.pef.log2_table)  # factor-0 codes
                hit = self._zero[acc_codes[pos:]]
                take = int(hit.argmax()) + 1 if hit.any() else hit.size
            self._feed(good[pos:pos + take], acc_codes[pos:pos + take])
            pos += take
        if bad_at >= 0 and not self.done:
            i = self.fed
            what = ("test-round bit set but the header declares no t column"
                    if codes[bad_at] & 0xE0 == 0 else "reserved bits set")
            raise LogFormatError(self.log_path, f"byte offset {self.offset0 + i}",
                                 f"{what} (byte 0x{int(codes[bad_at]):02x}, trial {i})")

    def _feed(self, piece: np.ndarray, acc_piece: np.ndarray) -> None:
        start = self.fed
        self.acc.update(acc_piece)
        used = self.acc.trials_seen - start  # the whole piece unless a stop inside it
        self.fed = start + used
        self.counts += np.bincount(acc_piece[:used], minlength=32)
        from dicert._kernels import count_pairs

        pc, self._prev = count_pairs(piece[:used], self._prev)
        self.pairs += pc
        self.blocks.add(acc_piece[:used])
        if self.hasher is not None:
            self.hasher.update(piece[:used].tobytes())
        lo = max(self.first - start, 0)
        if used > lo:
            self.sink.add(harvest_bits(piece[lo:used], self.parties, self.rounds, self.has_t))


class _BlockTally:
    """Per-block counts of the settings symbol (code >> 2) & 7 = 4t + 2x + y."""

    def __init__(self, block: int) -> None:
        self.block = int(block)
        self.rows: list[np.ndarray] = []
        self.cur = np.zeros(8, dtype=np.int64)
        self.fill = 0

    def add(self, codes: np.ndarray) -> None:
        sym = (np.asarray(codes, dtype=np.uint8) >> 2) & 7
        pos = 0
        while pos < sym.size:
            take = min(self.block - self.fill, sym.size - pos)
            self.cur += np.bincount(sym[pos:pos + take], minlength=8)
            self.fill += take
            pos += take
            if self.fill == self.block:
                self.rows.append(self.cur.copy())
                self.cur[:] = 0
                self.fill = 0

    def result(self) -> np.ndarray:
        rows = self.rows + ([self.cur.copy()] if self.fill else [])
        return np.array(rows, dtype=np.int64).reshape(-1, 8)


class _HeaderTap:
    """Hasher stand-in for :func:`dicert.finite.pef.follow_log`: keeps the header bytes and
    the trailer, counts the bytes consumed (follow_log feeds the header first, then trial
    bytes, then the 9-byte trailer, in separate calls)."""

    def __init__(self) -> None:
        self.header: bytes | None = None
        self.last = b""
        self.total = 0

    def update(self, data: bytes) -> None:
        data = bytes(data)
        if self.header is None:
            self.header = data
        self.last = data
        self.total += len(data)


def _single_binary(log: Any) -> Path | None:
    """The file of a log that is one binary trial-log file, else None."""
    from dicert.logs import detect_format, resolve_sources

    try:
        files = resolve_sources(log)
    except DicertError:
        return None
    if len(files) != 1:
        return None
    try:
        return files[0] if detect_format(files[0]) == "binary" else None
    except DicertError:
        return None


def _check_design_flag(protocol: Protocol, has_t: bool, path: Any) -> None:
    if protocol.design.gamma < 1.0 and not has_t:
        raise LogFormatError(path, "", "the protocol uses spot-checking (settings.gamma < 1) "
                             "but the log has no t column marking test rounds")


def _open_log_file(path: Path):
    try:
        return open(path, "rb")
    except OSError as exc:
        raise LogFormatError(path, "", f"cannot open ({exc.strerror})") from None


# long: on purpose (about 130 lines): one read loop whose state (header tap, PEF feed, block
# tally, byte offsets) is shared by the read, follow and prefix modes; splitting it would pass
# that state around in pieces. Tested through certify and verify in every mode (test_pef.py).
def _scan_binary_pef(path: Path, protocol: Protocol, sink: _BitSink, *,
                     follow: FollowSpec | None = None, prefix_trials: int | None = None,
                     progress: Progress | None = None) -> LogScan:
    """One pass over a single binary log for method "pef", stopping at the decision.

    Read mode (``follow`` None) reads the bytes present; follow mode waits for more
    (:func:`dicert.finite.pef.follow_log`). ``prefix_trials`` (verify) reads at most that many
    trials and never complains about what follows them.
    """
    from dicert.logs import (
        BINARY_HEADER_SIZE,
        COUNT_STREAMED,
        FLAG_HAS_T,
        TRAILER,
        TRAILER_MARK,
        read_binary_header,
    )

    hasher = hashlib.sha256()
    feed: _PefFeed | None = None
    header = b""
    complete = False  # the whole file, trailer included, was read
    end = "end-of-log"
    size_now = 0

    def start(head: bytes) -> _PefFeed:
        flags = head[9]
        _check_design_flag(protocol, bool(flags & FLAG_HAS_T), path)
        hasher.update(head)
        return _PefFeed(protocol, sink, has_test_flag=bool(flags & FLAG_HAS_T), hasher=hasher,
                        log_path=path, offset0=BINARY_HEADER_SIZE)

    if follow is not None:
        from dicert.finite.pef import follow_log

        tap = _HeaderTap()
        gen = follow_log(path, follow.poll_s, idle_timeout_s=follow.idle_timeout_s,
                         hasher=tap)
        try:
            for codes in gen:
                if feed is None:
                    header = tap.header or b""
                    feed = start(header)
                feed.push(codes)
                if progress is not None:
                    progress("follow", feed.fed, None)
                if feed.done:
                    break
        finally:
            gen.close()
        if feed is None:  # nothing but a header arrived
            header = tap.header or b""
            feed = start(header)
        count = int.from_bytes(header[16:24], "little")
        n_seen = tap.total - BINARY_HEADER_SIZE
        if feed.done:
            end = "decision"
        elif count == COUNT_STREAMED and n_seen - feed.fed == TRAILER.size \
                and tap.last[:1] == bytes([TRAILER_MARK]):
            hasher.update(tap.last)
            complete = True
        elif count != COUNT_STREAMED and feed.fed == count:
            complete = True
        else:
            end = "idle-timeout"
        size_now = path.stat().st_size
        if complete and count != COUNT_STREAMED and size_now != BINARY_HEADER_SIZE + count:
            raise LogFormatError(path, f"byte offset {BINARY_HEADER_SIZE + count}",
                                 f"{size_now - BINARY_HEADER_SIZE - count} unexpected bytes "
                                 "after the last trial")
    else:
        with _open_log_file(path) as fh:
            size_now = os.fstat(fh.fileno()).st_size
            _flags, count, header = read_binary_header(fh, path)
            feed = start(header)
            body = size_now - BINARY_HEADER_SIZE
            trailer = b""
            if prefix_trials is not None:
                n_avail = min(body, prefix_trials)
            elif count != COUNT_STREAMED:
                if body < count:
                    raise LogFormatError(path, f"byte offset {size_now}", f"truncated: header "
                                         f"promises {count} trials, file holds {max(body, 0)}")
                if body > count:
                    raise LogFormatError(path, f"byte offset {BINARY_HEADER_SIZE + count}",
                                         f"{body - count} unexpected bytes after the last trial")
                n_avail = count
            else:
                n_avail = body
                if body >= TRAILER.size:
                    fh.seek(size_now - TRAILER.size)
                    tail = fh.read(TRAILER.size)
                    if tail[0] == TRAILER_MARK:
                        _, n_tr = TRAILER.unpack(tail)
                        if n_tr != body - TRAILER.size:
                            raise LogFormatError(path, f"byte offset {size_now - TRAILER.size}",
                                                 f"trailer says {n_tr} trials but the file "
                                                 f"holds {body - TRAILER.size}")
                        n_avail, trailer = n_tr, tail
                fh.seek(BINARY_HEADER_SIZE)
            done_trials = 0
            while done_trials < n_avail and not feed.done:
                want = min(1 << 20, n_avail - done_trials)  # early stop wastes <= 1 MiB of reading
                data = fh.read(want)
                if not data:
                    break
                feed.push(np.frombuffer(data, dtype=np.uint8))
                done_trials += len(data)
                if progress is not None:
                    progress("scan", BINARY_HEADER_SIZE + done_trials, size_now)
            if feed.done:
                end = "decision"
            elif prefix_trials is not None:
                end = "limit"
            elif done_trials < n_avail:
                raise LogFormatError(path, f"byte offset {BINARY_HEADER_SIZE + done_trials}",
                                     "truncated while reading (the file shrank)")
            elif count == COUNT_STREAMED and not trailer:
                raise LogFormatError(path, f"byte offset {size_now}", "truncated: a streamed "
                                     "log must end with its trailer (the log is still being "
                                     "written? use --follow)")
            else:
                hasher.update(trailer)
                complete = True
    bytes_read = BINARY_HEADER_SIZE + feed.fed + (TRAILER.size if complete and count ==
                                                   COUNT_STREAMED else 0)
    stopped = end == "decision"
    sha = hasher.hexdigest()
    return LogScan(
        block_settings=feed.blocks.result(), pair_counts=feed.pairs.reshape(8, 8),
        trials_in_log=feed.fed,
        file_entries=({"name": path.name, "bytes": int(bytes_read), "sha256": sha},),
        formats=("binary",),
        counts=feed.counts.reshape(2, 2, 2, 2, 2).copy(), trials=feed.fed,
        sha256=sha, size_bytes=bytes_read, files=(path.name,),
        has_test_flag=feed.has_t, raw_bits=sink.bits, raw_sha256="",
        finite=feed.acc.result(complete=complete),
        scope="whole" if complete else "prefix", bytes_read=bytes_read, trials_read=feed.fed,
        stopped_early=stopped, stop_trial_index=feed.fed - 1 if stopped else None,
        ended_by=end, follow=follow.to_dict() if follow is not None else None)


def scan_log(log: Any, parties: str, rounds: str, *, spill_dir: Path | None = None,
             progress: Progress | None = None, protocol: Protocol | None = None,
             follow: FollowSpec | None = None,
             prefix_trials: int | None = None,
             scheduler: Any = None) -> tuple[LogScan, _BitSink]:
    """Read a log once: counts, log digest, and the harvested raw bits.

    Returns the scan summary and the bit sink holding the packed raw bits (the caller must
    ``discard()`` it).

    Methods other than "pef", and "pef" on a text, npz or multi-file log: one streaming pass of
    :func:`dicert.logs.summarize_log` counts the trials and hashes every byte of the log
    (``scope`` "whole"); its per-chunk callback harvests the raw bits in the same pass.

    Method "pef" on a single binary log: the pass feeds the streaming PEF accumulator
    (:class:`dicert.finite.pef.PefAccumulator`) and STOPS READING as soon as the outcome is
    decided (target reached, n_max analysis trials, or a trial outside the settings model).
    The scan then covers the prefix header + trials 0..stop (``scope`` "prefix"; digest,
    counts and sizes of exactly those bytes). Only the analysed trials are harvested, from the
    first trial after the calibration prefix up to the stopping trial. A run that is not
    decided reads the whole file (``scope`` "whole"); a streamed file still lacking its
    trailer is then "truncated" unless ``follow`` is given.

    ``follow`` (single binary log, method "pef" only) waits for a growing log; the pass also
    ends at the trailer, at the header's count, or after the idle timeout (``ended_by``
    "idle-timeout", ``scope`` "prefix"). ``prefix_trials`` (used by verify) reads at most that
    many trials and ignores whatever follows them.

    ``scheduler`` (a dask address or Client, see :mod:`dicert.cluster`): a multi-file log
    read in one whole pass (methods other than "pef", no declared trial count) is counted,
    hashed and harvested file by file on the cluster's workers (their bits files go to
    ``spill_dir``, which they must see) and combined here in log order: the same scan and
    bits as the local pass. Other logs are read here.
    """
    pef = protocol is not None and protocol.method == "pef"
    binary = _single_binary(log) if pef else None
    if follow is not None:
        from dicert.logs import resolve_sources

        if not pef:
            raise ParameterError("--follow needs a protocol with method \"pef\" (probability "
                                 "estimation stops at a trial; other methods need the whole log)")
        files = resolve_sources(log)
        if len(files) != 1 or binary is None:
            raise ParameterError(f"{log}: --follow needs a single binary (.btl) log file, "
                                 "the format acquisition code appends to")
    declared_limit = False
    if binary is not None and prefix_trials is None and follow is None:
        from dicert.design import declared_trials

        prefix_trials = declared_trials(protocol)
        declared_limit = prefix_trials is not None
    if binary is not None or prefix_trials is not None:
        if binary is None:
            raise ParameterError(f"{log}: a prefix-scoped record needs the single binary "
                                 "(.btl) log file it was read from")
        sink = _BitSink(spill_dir)
        try:
            scan = _scan_binary_pef(binary, protocol, sink, follow=follow,
                                    prefix_trials=prefix_trials, progress=progress)
            raw_sha = sink.finish()
        except BaseException:
            sink.discard()
            raise
        if declared_limit and scan.ended_by == "limit":
            scan = dataclasses.replace(scan, ended_by="declared-trials")
        return dataclasses.replace(scan, raw_bits=sink.bits, raw_sha256=raw_sha), sink
    if scheduler is not None and _cluster_scannable(log, protocol):
        return _scan_whole(log, parties, rounds, spill_dir=spill_dir, progress=progress,
                           protocol=protocol, scheduler=scheduler)
    return _scan_whole(log, parties, rounds, spill_dir=spill_dir, progress=progress,
                       protocol=protocol)


def _cluster_scannable(log: Any, protocol: Protocol | None) -> bool:
    """A log the cluster scan handles: several plain files (no log spec), read whole."""
    from dicert.design import declared_trials
    from dicert.logs import open_log

    if protocol is None or protocol.method == "pef" or declared_trials(protocol) is not None:
        return False
    try:
        opened = open_log(log)
    except Exception:  # the local pass reports the problem with its usual message
        return False
    return getattr(opened, "spec", None) is None and len(opened.files) > 1


def _scan_whole(log: Any, parties: str, rounds: str, *, spill_dir: Path | None,
                progress: Progress | None, protocol: Protocol,
                scheduler: Any = None) -> tuple[LogScan, _BitSink]:
    from dicert.design import declared_trials, spec_of
    from dicert.logs import summarize_log

    if scheduler is not None:
        return _scan_on_cluster(log, parties, rounds, spill_dir=spill_dir, protocol=protocol,
                                scheduler=scheduler)
    sink = _BitSink(spill_dir)
    feed: _PefFeed | None = None
    pef = protocol is not None and protocol.method == "pef"
    n_decl = declared_trials(protocol) if protocol is not None else None
    block_trials = spec_of(protocol).block_trials

    def on_chunk(chunk: Any) -> None:
        nonlocal feed
        if not pef:
            sink.add(harvest_bits(chunk.codes, parties, rounds, bool(chunk.has_test_flag)))
            return
        if feed is None:
            feed = _PefFeed(protocol, sink, has_test_flag=bool(chunk.has_test_flag),
                            log_path=log)
        # Text logs were validated by the reader; later trials are still hashed and counted
        # by summarize_log (the digest covers the whole log) but not analysed or harvested.
        feed.push(chunk.codes)

    def on_progress(done: int, total: int) -> None:
        if progress is not None:
            progress("scan", done, total)

    try:
        summary = summarize_log(log, digest=True, chunk_trials=_CHUNK_TRIALS, on_chunk=on_chunk,
                                progress=on_progress if progress is not None else None,
                                block_trials=block_trials, max_trials=n_decl)
        finite = None
        if pef:
            if feed is None:  # pragma: no cover - readers reject logs without trials
                raise LogFormatError(log, "", "contains no trials")
            finite = feed.acc.result()
        raw_sha = sink.finish()
    except BaseException:
        sink.discard()
        raise
    return _scan_of(summary, sink, raw_sha, finite, n_decl, block_trials), sink


def _scan_of(summary: Any, sink: _BitSink, raw_sha: str, finite: Any, n_decl: int | None,
             block_trials: int) -> LogScan:
    """The :class:`LogScan` of a whole pass from its log summary and bit sink."""
    from dicert.design import settings_symbol_counts

    in_log = int(summary.trials_in_log if summary.trials_in_log is not None else summary.trials)
    cut = n_decl is not None and in_log > n_decl
    return LogScan(counts=np.asarray(summary.counts, dtype=np.int64), trials=int(summary.trials),
                   sha256=str(summary.sha256), size_bytes=int(summary.size_bytes),
                   files=tuple(Path(f.path).name for f in summary.files),
                   has_test_flag=bool(summary.has_test_flag), raw_bits=sink.bits,
                   raw_sha256=raw_sha, finite=finite, scope="prefix" if cut else "whole",
                   bytes_read=int(summary.size_bytes), trials_read=int(summary.trials),
                   ended_by="declared-trials" if cut else "end-of-log",
                   block_settings=settings_symbol_counts(summary.block_counts)
                   if summary.block_counts.size else np.zeros((0, 8), dtype=np.int64),
                   pair_counts=summary.pair_counts, trials_in_log=in_log,
                   file_entries=tuple({"name": Path(f.path).name, "bytes": int(f.size_bytes),
                                       "sha256": f.sha256} for f in summary.files),
                   formats=tuple(f.format for f in summary.files),
                   log_spec=summary.log_spec,
                   block_series=group_blocks(summary.block_counts, block_trials))


def _scan_on_cluster(log: Any, parties: str, rounds: str, *, spill_dir: Path | None,
                     protocol: Protocol, scheduler: Any) -> tuple[LogScan, _BitSink]:
    """The whole pass with each file counted, hashed and harvested by a task on the cluster
    (:func:`dicert.cluster.scan_files`); the files' bits are joined here in log order, so
    the sink's bytes and digest equal the local pass's."""
    import tempfile

    from dicert import cluster
    from dicert.design import spec_of

    block_trials = spec_of(protocol).block_trials
    work = Path(spill_dir) if spill_dir is not None else Path(tempfile.gettempdir())
    work.mkdir(parents=True, exist_ok=True)
    summary, parts = cluster.scan_files(log, scheduler=scheduler, block_trials=block_trials,
                                        parties=parties, select=rounds, work_dir=work)
    sink = _BitSink(spill_dir)
    try:
        for path, nbits in parts:
            _join_bits(sink, path, nbits)
        raw_sha = sink.finish()
    except BaseException:
        sink.discard()
        raise
    finally:
        cluster.remove_bit_files(parts)
    return _scan_of(summary, sink, raw_sha, None, None, block_trials), sink


def _join_bits(sink: _BitSink, path: str, nbits: int, chunk: int = 1 << 22) -> None:
    """Append the first ``nbits`` bits of a packed bits file to ``sink``, in chunks."""
    with open(path, "rb") as fh:
        left = nbits
        while left > 0:
            raw = fh.read(min(chunk, -(-left // 8)))
            if not raw:
                raise DicertError(f"{path}: a cluster task's bits file is shorter than it said")
            bits = np.unpackbits(np.frombuffer(raw, dtype=np.uint8))[:left]
            sink.add(bits)
            left -= bits.size


#: At most this many points in a record's per-block CHSH series (consecutive blocks are
#: merged into groups of equal size so the record stays small whatever the log's length).
MAX_BLOCK_POINTS = 64


def group_blocks(block_counts: Any, block_trials: int) -> tuple[tuple[int, ...], np.ndarray]:
    """Merge consecutive blocks into at most :data:`MAX_BLOCK_POINTS` groups.

    Returns the first trial (0-based) of each group and the groups' counts, shape (G, 32),
    each row the flattened [t, x, y, a, b] table.
    """
    bc = np.asarray(block_counts, dtype=np.int64).reshape(-1, 32)
    if bc.shape[0] == 0:
        return (), bc
    size = -(-bc.shape[0] // MAX_BLOCK_POINTS)
    starts = list(range(0, bc.shape[0], size))
    return tuple(k * int(block_trials) for k in starts), np.add.reduceat(bc, starts, axis=0)


def read_seed(seed: bytes | str | os.PathLike[str]) -> tuple[bytes, str]:
    """Seed bytes and a label for messages; a path is read as raw bytes."""
    if isinstance(seed, (bytes, bytearray, memoryview)):
        return bytes(seed), "seed"
    p = Path(seed)
    data = read_user_file(p, "seed file (raw bytes)", SeedError)
    if not data:
        raise SeedError(f"{p}: seed file is empty")
    return data, str(p)
