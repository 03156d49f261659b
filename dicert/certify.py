"""End-to-end certification: trial log + protocol + seed -> certified bits + audit record.

This is the one-call recipe the ``dicert certify`` command uses. It

1. validates the protocol (:mod:`dicert.protocol`) and reads the seed;
2. reads the log ONCE, streaming: per chunk it adds the trial counts and harvests the raw
   outcome bits (see *Raw-bit order and packing*), spilling them to a temporary file in the
   output directory. With method "pef" on a single binary log, reading stops at the trial
   where the outcome is decided and the record covers exactly the bytes read (see
   *Log scope*); ``follow`` waits for a growing log;
3. checks the log against the protocol's declared design (:func:`dicert.design.check_design`:
   test-round fraction, settings distribution, serial independence, physical range, declared
   n; a failed check aborts the run with that reason), refuses a multi-file log holding the
   same data twice or mixing formats, estimates the CHSH value
   (:func:`dicert.estimate.estimate_chsh`, informational) and runs the
   protocol's finite-size method on the counts (:func:`dicert.finite.certify_counts`), which
   decides accepted/aborted against the PRE-DECLARED threshold and bounds the min-entropy;
   before extraction the seed is checked (:func:`dicert.design.seed_problems`) and after it
   the output and the raw outcomes are screened (:func:`dicert.design.output_screens`): a
   gross failure withholds the bits (status "withheld", the record is still written);
4. on acceptance sizes the output with the leftover hash lemma
   (:func:`dicert.extract.lhl_output_length`) and runs the Toeplitz extractor;
5. writes the bits file and the signed record into a complete folder next to ``out_dir`` and
   renames it into place in one step (with ``chain``, after linking the record into the
   beacon chain, the commit point); see :mod:`dicert._outputs`.

An abort is a normal outcome: status ``"aborted"``, 0 output bits, a record is still written.

Raw-bit order and packing
-------------------------
Harvested trials are taken in log order (trial index 0, 1, ...). ``rounds = "all"`` harvests
every trial; ``rounds = "generation"`` only trials with t = 0. Per harvested trial the bits
are ``a`` (parties "A") or ``a`` then ``b`` (parties "AB"). The bit string is packed
big-endian, 8 bits per byte (``numpy.packbits``, first bit = most significant bit of byte 0),
the last byte zero-padded. ``raw_bits`` counts the bits without padding; ``raw_sha256`` is the
SHA-256 of the packed bytes. The extractor reads the same packing.

Log scope
---------
The record's ``log`` section says which bytes it certifies. ``scope = "whole"``: every byte
of every file (``sha256`` over the concatenated files, ``size_bytes`` = ``bytes_read`` = their
total size). ``scope = "prefix"`` (method "pef", single binary log only): the first
``bytes_read`` bytes of the file, i.e. the 24-byte header and trials ``0 .. trials_read - 1``;
``sha256`` and ``counts`` cover exactly those bytes. A prefix arises when the outcome was
decided at trial ``stop_trial_index = trials_read - 1`` (``stopped_early``, ``ended_by =
"decision"``: the success trial, the last of n_max analysis trials, or the end of the feeding
trial outside the settings model) or when ``--follow`` timed out waiting
(``ended_by = "idle-timeout"``, an abort). Bytes after the prefix, if any, were not read and
are not certified; :func:`dicert.verify.verify` hashes only the prefix. Text, npz and
multi-file logs are always read to the end (``scope = "whole"``, ``stopped_early = false``
even when the PEF run was decided earlier; the success trial is in the finite-size details).
Every reader stops at the same trial however the bytes arrive (a trial outside the settings
model stops the run at that very trial).

Exit codes of the CLI: 0 certified, 3 aborted, 5 withheld, 2 bad input, 1 verification failure.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import hashlib
import math
import os
import tempfile
import time
from collections.abc import Callable, Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert import __version__
from dicert._io import read_user_file
from dicert._plain import plain
from dicert.errors import DicertError, LogFormatError, ParameterError, SeedError

#: Exit code of ``dicert certify`` when the protocol aborts (a normal, recorded outcome).
EXIT_ABORTED = 3
#: Exit code when the output screens failed grossly: record written, bits withheld.
EXIT_WITHHELD = 5
#: Name of the raw-randomness output file inside ``out_dir``.
BITS_NAME = "random.bits"
#: Name of the audit record inside ``out_dir``.
RECORD_NAME = "record.json"

#: Keep harvested raw bits in memory below this many bytes, spill to a private temp file
#: (mode 0600, removed when done) above, so memory does not grow with the log.
_SPILL_BYTES = 8 << 20
#: Trials per streamed chunk.
_CHUNK_TRIALS = 1 << 22

ASSUMPTIONS = (
    ("No communication between the two stations during a trial (locality / no signalling "
    "between the measurement devices within each round)."),
    ("Measurement settings are chosen independently of the devices and of any adversary, "
    "with the distribution declared in the protocol, and the round type and settings of each "
    "round stay unknown to the devices until that round (the design section of the record "
    "lists what was checked on the data; the rest is assumed)."),
    ("The classical processing (logging, this software, the machine running it) is trusted "
    "and the log faithfully records the settings and outcomes of every trial in order."),
    "The extractor seed is uniformly random and independent of the devices and the raw bits.",
    ("The acceptance threshold and every error parameter were fixed in the protocol before "
    "the data were taken."),
)

CAUTION = (
    "Certificates hold only under the stated assumptions, including the side-information "
    "model of the method. For production use, defer to applicable standards and accredited "
    "review."
)

HARVEST_ORDER = (
    "trials in log order; rounds 'all' = every trial, 'generation' = trials with t = 0; per "
    "trial a (parties A) or a then b (parties AB); packed big-endian with numpy.packbits "
    "(first bit = MSB of byte 0), last byte zero-padded; raw_sha256 is over the packed bytes"
)

Clock = Callable[[], "_dt.datetime | str"]
Progress = Callable[[str, int, "int | None"], None]


# --------------------------------------------------------------------------- results


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


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Analysis:
    """Decisions derived from the counts and the protocol alone (re-derivable by verify)."""

    estimate: Any
    finite: Any
    status: str
    abort_reason: str | None
    min_entropy_bits: float
    output_bits: int
    seed_bits_needed: int
    total_error: float
    design: Any = None  # dicert.design.DesignReport


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CertifyResult:
    """Outcome of :func:`certify`.

    ``status`` is "certified" or "aborted"; ``error`` is the total soundness error in
    "P(accept) x distance" form; ``bits_file`` is None when no bits were produced.
    """

    status: str
    output_bits: int
    bits_file: Path | None
    record_file: Path
    chain_file: Path | None
    min_entropy_bits: float
    error: float
    raw_bits: int
    trials: int
    abort_reason: str | None
    record_sha256: str
    record: dict
    log_scope: str = "whole"
    stopped_early: bool = False
    stop_trial_index: int | None = None
    success_trial_index: int | None = None
    ended_by: str = "end-of-log"

    @property
    def certified(self) -> bool:
        return self.status == "certified"

    @property
    def exit_code(self) -> int:
        if self.certified:
            return 0
        return EXIT_WITHHELD if self.status == "withheld" else EXIT_ABORTED


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

    def __init__(self, protocol: Any, sink: _BitSink, *, has_test_flag: bool,
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


def _check_design_flag(protocol: Any, has_t: bool, path: Any) -> None:
    if protocol.design.gamma < 1.0 and not has_t:
        raise LogFormatError(path, "", "the protocol uses spot-checking (settings.gamma < 1) "
                             "but the log has no t column marking test rounds")


def _open_log_file(path: Path):
    try:
        return open(path, "rb")
    except OSError as exc:
        raise LogFormatError(path, "", f"cannot open ({exc.strerror})") from None


def _scan_binary_pef(path: Path, protocol: Any, sink: _BitSink, *,
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
             progress: Progress | None = None, protocol: Any = None,
             follow: FollowSpec | None = None,
             prefix_trials: int | None = None) -> tuple[LogScan, _BitSink]:
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
    return _scan_whole(log, parties, rounds, spill_dir=spill_dir, progress=progress,
                       protocol=protocol)


def _scan_whole(log: Any, parties: str, rounds: str, *, spill_dir: Path | None,
                progress: Progress | None, protocol: Any) -> tuple[LogScan, _BitSink]:
    from dicert.design import declared_trials, settings_symbol_counts, spec_of
    from dicert.logs import summarize_log

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
    in_log = int(summary.trials_in_log if summary.trials_in_log is not None else summary.trials)
    cut = n_decl is not None and in_log > n_decl
    scan = LogScan(counts=np.asarray(summary.counts, dtype=np.int64), trials=int(summary.trials),
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
    return scan, sink


def _dropped_trials(scan: LogScan) -> int:
    """Trials the station join dropped (missing at one station) under the spec's tolerance."""
    join = scan.log_spec.get("join") if isinstance(scan.log_spec, Mapping) else None
    if not isinstance(join, Mapping):
        return 0
    return int(join.get("missing_at_a") or 0) + int(join.get("missing_at_b") or 0)


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


def _blocks_section(block_series: Any, protocol: Any) -> dict | None:
    """The record's per-block CHSH series (informational, drawn by reports and beacon pages)."""
    from dicert.estimate import azuma_margin, martingale_chsh

    firsts, counts = block_series
    if not len(firsts):
        return None
    eps = _estimate_eps(protocol)
    design = protocol.design
    blocks = []
    for first, row in zip(firsts, np.asarray(counts, dtype=np.int64)):
        n = int(row.sum())
        if n == 0:
            continue
        value = martingale_chsh(row.reshape(2, 2, 2, 2, 2), design)
        margin = azuma_margin(n, design.estimator_width, eps)
        blocks.append({"first_trial": int(first), "trials": n, "counts": row.tolist(),
                       "chsh": value, "chsh_lower": value - margin,
                       "chsh_upper": value + margin})
    return {"note": "martingale CHSH estimate per group of consecutive trials with its "
                    "two-sided Azuma-Hoeffding interval at eps_per_side (each group on its "
                    "own; informational: drift shows here, certification uses the whole log)",
            "eps_per_side": eps, "counts_order": "[t, x, y, a, b] flattened",
            "blocks": blocks}


# --------------------------------------------------------------------------- analysis


def log_end_note(scan: LogScan) -> str | None:
    """Why reading stopped, when that is part of an abort reason (idle timeout), else None."""
    if scan.ended_by != "idle-timeout":
        return None
    t = (scan.follow or {}).get("idle_timeout_s")
    wait = f"{float(t):g} s" if isinstance(t, (int, float)) else "the idle timeout"
    return (f"no new trials for {wait} while following the log (idle timeout); the record "
            f"covers the {scan.trials} trials read")


def design_report(scan: LogScan, protocol: Any) -> Any:
    """The design-conformance report of a scan (:func:`dicert.design.check_design`)."""
    from dicert.design import check_design

    return check_design(scan.counts, protocol, block_counts=scan.block_settings,
                        pair_counts=scan.pair_counts, trials_in_log=scan.trials_in_log,
                        decided_early=scan.ended_by == "decision", eps=_estimate_eps(protocol))


def checked_analysis(scan: LogScan, proto: Any, *, log: Any, seed_bytes: bytes,
                     seed_label: str, chain_dir: Path | None, allow_mixed_inputs: bool,
                     allow_seed_reuse: bool) -> tuple[Analysis, dict]:
    """Certify's stages between the scan and the extraction, with the record's ``inputs``.

    Input identity of a multi-file log (bad input unless allowed), the design-conformance
    stage and the analysis (:func:`analyse_counts`), then, when the seed will be used, its
    length and sanity (:func:`dicert.design.seed_problems`; bad input unless allowed).
    """
    input_problems = input_problems_of(scan)
    if input_problems and not allow_mixed_inputs:
        raise LogFormatError(log, "", f"{input_problems[0]}; refusing a log that may hold "
                             "the same data twice or mix sources (pass --allow-mixed-inputs "
                             "if this is intended; it is then recorded)")
    analysis = analyse_counts(scan.counts, proto, scan.raw_bits, finite=scan.finite,
                              log_end=log_end_note(scan), design=design_report(scan, proto))
    seed_issues: list[str] = []
    if analysis.status == "certified":
        from dicert.design import seed_problems

        check_seed_length(seed_bytes, seed_label, scan.raw_bits, analysis.output_bits)
        used = _chain_seed_digests(chain_dir) if chain_dir is not None else ()
        digests = (scan.sha256,) + tuple(str(e.get("sha256")) for e in scan.file_entries)
        fatal, seed_issues = seed_problems(seed_bytes, log_digests=digests, used_digests=used)
        if fatal:
            raise SeedError(f"{seed_label}: {fatal[0]}; an extractor seed must be "
                            "uniformly random")
        if seed_issues and not allow_seed_reuse:
            raise SeedError(f"{seed_label}: {seed_issues[0]}; use a fresh uniformly random "
                            "seed (or pass --allow-seed-reuse; it is then recorded)")
    inputs = {"allow_mixed_inputs": bool(allow_mixed_inputs),
              "input_problems": list(input_problems),
              "allow_seed_reuse": bool(allow_seed_reuse),
              "seed_problems": list(seed_issues)}
    return analysis, inputs


def screened(extraction: Any, analysis: Analysis, proto: Any, scan: LogScan,
             raw: Any) -> tuple[Analysis, dict | None]:
    """Output screens after extraction (:func:`dicert.design.output_screens`); a gross
    failure turns the analysis into status "withheld"."""
    if extraction is None:
        return analysis, None
    from dicert.design import output_screens, spec_of

    screens = output_screens(extraction.output, analysis.output_bits,
                             spec_of(proto).significance, raw=raw, raw_bits=scan.raw_bits,
                             bits_per_symbol=proto.harvest.bits_per_trial,
                             min_entropy_bits=analysis.min_entropy_bits)
    return withhold(analysis, screens), screens


def input_problems_of(scan: LogScan) -> list[str]:
    """Input identity problems of a multi-file log (:func:`dicert.logs.input_identity_problems`)."""
    from dicert.logs import input_identity_problems

    if len(scan.file_entries) < 2:
        return []
    return input_identity_problems([Path(str(e["name"])) for e in scan.file_entries],
                                   scan.formats if len(scan.formats) > 1 else None,
                                   [e.get("sha256") for e in scan.file_entries])


def _chain_seed_digests(chain_dir: Path) -> tuple[str, ...]:
    """Seed digests already used (seed bits consumed) by the records of a beacon chain."""
    import json

    out = []
    if not chain_dir.is_dir():
        return ()
    for p in sorted(chain_dir.glob("*.json")):
        try:
            rec = json.loads(p.read_bytes())
        except (OSError, ValueError):
            continue  # verify --chain reports unreadable pulses
        ex = rec.get("extractor") if isinstance(rec, dict) else None
        if isinstance(ex, dict) and isinstance(ex.get("seed_sha256"), str) \
                and (ex.get("seed_bits_used") or 0) > 0:
            out.append(ex["seed_sha256"])
    return tuple(out)


def withhold(analysis: Analysis, screens: Mapping[str, Any] | None) -> Analysis:
    """The analysis with status "withheld" when the output screens failed grossly."""
    if screens is None or screens.get("passed", True) or analysis.status != "certified":
        return analysis
    return dataclasses.replace(
        analysis, status="withheld",
        abort_reason=f"output withheld: the output screens failed grossly "
                     f"({screens.get('failure')})")


def _not_run(protocol: Any, reason: str) -> Any:
    """A finite-size result standing for a method that was not run (design check failed)."""
    from dicert.finite.result import FiniteSizeResult

    name = getattr(protocol.analysis, "method_name", None) or str(protocol.method)
    return FiniteSizeResult(method=str(name),
                            side_information="quantum" if protocol.method == "eat"
                            else "classical", accepted=False, min_entropy_bits=0.0, eps={},
                            details={"not_run": reason})


def analyse_counts(counts: np.ndarray, protocol: Any, raw_bits: int, *,
                   finite: Any = None, log_end: str | None = None,
                   design: Any = None) -> Analysis:
    """Design checks, estimate, finite-size bound, accept/abort and output length.

    Deterministic in its inputs, so :func:`dicert.verify.verify` re-derives it from a record.
    ``finite`` supplies the result of a streaming method (pef), which depends on the trial
    order and not only on the counts. ``log_end`` (see :func:`log_end_note`) is appended to the
    abort reason. ``design`` is the :class:`dicert.design.DesignReport` of the log (default:
    the checks the counts alone allow); when a check fails the run aborts with that reason and
    no finite-size method is run (a streaming pef result is kept, but not used).
    """
    from dicert.design import check_design
    from dicert.estimate import estimate_chsh
    from dicert.extract import lhl_output_length, seed_bits_required

    counts = np.asarray(counts, dtype=np.int64)
    eps_est = _estimate_eps(protocol)
    estimate = estimate_chsh(counts, design=protocol.design, eps=eps_est)
    if design is None:
        design = check_design(counts, protocol, eps=eps_est)
    if not design.passed:
        if finite is None:
            finite = _not_run(protocol, "the finite-size method was not run: " +
                              str(design.abort_reason))
        reason = str(design.abort_reason)
        det = finite.details if isinstance(finite.details, Mapping) else {}
        if not finite.accepted and "not_run" not in det:
            why = det.get("abort_reason") or det.get("outcome")
            if why:  # a streaming method (pef) aborted too: give its reason first
                reason = f"the acceptance test of the protocol failed: {why}; also {reason}"
        if log_end:
            reason = f"{reason} ({log_end})"
        return Analysis(estimate=estimate, finite=finite, status="aborted",
                        abort_reason=reason, min_entropy_bits=0.0, output_bits=0,
                        seed_bits_needed=0,
                        total_error=float(finite.total_error(protocol.extractor.eps_ext)),
                        design=design)
    if finite is None:
        finite = _certify_counts(counts, protocol)
    eps_ext = protocol.extractor.eps_ext
    k = float(finite.min_entropy_bits) if finite.accepted else 0.0
    if not math.isfinite(k) or k < 0:
        k = 0.0
    total_error = float(finite.total_error(eps_ext))
    m = int(lhl_output_length(k, eps_ext)) if finite.accepted else 0
    m = max(0, min(m, raw_bits))
    if not finite.accepted:
        status, reason = "aborted", "the acceptance test of the protocol failed"
        det = finite.details if isinstance(finite.details, Mapping) else {}
        why = det.get("abort_reason") or det.get("outcome")
        if why:
            reason = f"{reason}: {why}"
    elif m <= 0:
        status = "aborted"
        reason = (f"accepted, but the certified min-entropy ({k:.6g} bits) leaves no output "
                  f"at eps_ext = {eps_ext:g}")
    else:
        status, reason = "certified", None
    if reason is not None and log_end:
        reason = f"{reason} ({log_end})"
    need = int(seed_bits_required(raw_bits, m)) if m > 0 else 0
    return Analysis(estimate=estimate, finite=finite, status=status, abort_reason=reason,
                    min_entropy_bits=k, output_bits=m if status == "certified" else 0,
                    seed_bits_needed=need if status == "certified" else 0,
                    total_error=total_error, design=design)


def _certify_counts(counts: np.ndarray, protocol: Any) -> Any:
    """The finite-size method of the protocol (dicert.finite's dispatcher)."""
    from dicert import finite

    try:
        return finite.certify_counts(counts, protocol)
    except (ValueError, TypeError) as exc:
        if isinstance(exc, DicertError):
            raise
        raise ParameterError(f"finite-size analysis: {' '.join(str(exc).split())}") from None


def _estimate_eps(protocol: Any) -> float:
    for name in ("eps_est", "eps_EA", "eps_ea", "eps_PE", "eps_pe"):
        v = getattr(protocol.analysis, name, None)
        if isinstance(v, (int, float)) and 0 < v < 1:
            return float(v)
    return 1e-6


# --------------------------------------------------------------------------- record body


def _single_round(estimate: Any) -> dict:
    from dicert.entropy.analytic import min_entropy_single, vn_entropy_single

    out: dict[str, Any] = {
        "note": "informational values at the estimated CHSH value; the certified quantity "
                "is entropy.finite_size.min_entropy_bits",
        "bound_min_entropy": "f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) (Pironio et al. 2010)",
        "bound_von_neumann": "1 - h(1/2 + 1/2 sqrt(S^2/4 - 1)) (Pironio et al. 2009)",
    }
    for label in ("chsh", "chsh_lower"):
        s = getattr(estimate, label, None)
        if s is None or not math.isfinite(float(s)):
            continue
        out[f"min_entropy_per_round_at_{label}"] = float(min_entropy_single(float(s)))
        out[f"von_neumann_per_round_at_{label}"] = float(vn_entropy_single(float(s)))
    return out


def _split_timing(details: Any) -> tuple[Any, float | None]:
    """Move the PEF solver's wall-clock time out of the details (it belongs in ``volatile``)."""
    if not isinstance(details, dict):
        return details, None
    pef = details.get("pef")
    if isinstance(pef, dict) and isinstance(pef.get("solver"), dict) and "seconds" in pef["solver"]:
        solver = {k: v for k, v in pef["solver"].items() if k != "seconds"}
        return {**details, "pef": {**pef, "solver": solver}}, pef["solver"]["seconds"]
    return details, None


def build_body(*, protocol: Any, scan: LogScan, analysis: Analysis, seed_sha256: str,
               seed_bytes: int, extraction: Any | None, chain_info: tuple[int, str | None] | None,
               volatile: dict, inputs: dict | None = None, screens: dict | None = None) -> dict:
    """The record body (everything the audit layer then digests and signs)."""
    from dicert.audit.record import RECORD_FORMAT

    fin = analysis.finite
    details, solver_seconds = _split_timing(plain(fin.details))
    if solver_seconds is not None and isinstance(volatile, dict):
        volatile = {**volatile, "timings_s": {**volatile.get("timings_s", {}),
                                              "pef_solver": solver_seconds}}
    eps = {str(k): float(v) for k, v in dict(fin.eps).items()}
    eps["eps_ext"] = float(protocol.extractor.eps_ext)
    eps_block = {
        "terms": eps,
        "smoothing_eps": float(fin.smoothing_eps),
        "entropy_error": float(fin.entropy_error),
        "total": analysis.total_error,
        "form": "P(accept) x distance from ideal of (output, seed, settings, side information) "
                "<= total",
    }
    certified = analysis.status == "certified"
    published = certified
    extractor = {
        "kind": protocol.extractor.kind,
        "output_rule": protocol.extractor.output_rule,
        "eps_ext": float(protocol.extractor.eps_ext),
        "seed_sha256": seed_sha256,
        "seed_bytes": int(seed_bytes),
        "seed_bits_used": int(extraction.seed_bits_used) if extraction is not None else 0,
        "raw_sha256": scan.raw_sha256,
        "raw_bits": int(scan.raw_bits),
        "output_bits": int(analysis.output_bits),
        "output_sha256": extraction.output_sha256 if extraction is not None else None,
        "method": getattr(extraction, "method", None) if extraction is not None else None,
        "convention": _extractor_convention(),
    }
    assumptions = list(ASSUMPTIONS)
    side = str(fin.side_information)
    assumptions.append(f"Side-information model of the method ({fin.method}): {side} "
                       "side information held by the adversary.")
    for a in fin.assumptions:
        if a not in assumptions:
            assumptions.append(str(a))
    dropped = _dropped_trials(scan)
    if dropped:
        assumptions.append(
            f"Trials dropped by the station join ({dropped}, tolerated by the log spec's "
            "join.max_missing) went missing independently of the settings and outcomes: "
            "NOT checked, and nothing is charged for them; if the devices or the stations' "
            "electronics can cause a trial to go missing, the certificate does not hold.")
    references = [str(r) for r in fin.references]
    body: dict[str, Any] = {
        "format": RECORD_FORMAT,
        "kind": "certification",
        "tool": {"name": "dicert", "version": __version__},
        "protocol": {
            "name": protocol.name,
            "sha256": protocol.sha256,
            "content": protocol.text,
            "method": protocol.method,
        },
        "log": {
            "sha256": scan.sha256,
            "size_bytes": int(scan.size_bytes),
            "trials": int(scan.trials),
            "files": ([dict(e) for e in scan.file_entries] if scan.file_entries
                      else list(scan.files)),
            "trials_in_log": int(scan.trials_in_log if scan.trials_in_log is not None
                                 else scan.trials),
            "has_test_flag": bool(scan.has_test_flag),
            "scope": scan.scope,
            "bytes_read": int(scan.bytes_read if scan.bytes_read is not None
                              else scan.size_bytes),
            "trials_read": int(scan.trials_read if scan.trials_read is not None
                               else scan.trials),
            "stopped_early": bool(scan.stopped_early),
            "stop_trial_index": scan.stop_trial_index,
            "ended_by": scan.ended_by,
            "follow": scan.follow,
        },
        "counts": {
            "layout": "counts[t][x][y][a][b]; logs without a t column count every trial as t = 1",
            "values": scan.counts.astype(np.int64).tolist(),
        },
        "estimate": plain(analysis.estimate),
        "entropy": {
            "single_round": _single_round(analysis.estimate),
            "finite_size": {
                "method": str(fin.method),
                "side_information": side,
                "accepted": bool(fin.accepted),
                "min_entropy_bits": float(fin.min_entropy_bits),
                "smoothing_eps": float(fin.smoothing_eps),
                "entropy_error": float(fin.entropy_error),
                "eps": {str(k): float(v) for k, v in dict(fin.eps).items()},
                "assumptions": [str(a) for a in fin.assumptions],
                "references": [str(r) for r in fin.references],
                "details": details,
            },
        },
        "harvest": {
            "parties": protocol.harvest.parties,
            "rounds": protocol.harvest.rounds,
            "order": HARVEST_ORDER,
            "raw_bits": int(scan.raw_bits),
            "raw_sha256": scan.raw_sha256,
        },
        "eps": eps_block,
        "extractor": extractor,
        "status": analysis.status,
        "abort_reason": analysis.abort_reason,
        "certified_min_entropy_bits": analysis.min_entropy_bits if published else 0.0,
        "assumptions": assumptions,
        "caution": CAUTION,
        "references": references,
        "pulse_index": chain_info[0] if chain_info else None,
        "previous_record_sha256": chain_info[1] if chain_info else None,
        "volatile": volatile,
    }
    if analysis.design is not None:
        sec = analysis.design.to_dict()
        sec["inputs"] = {
            "symbol": "settings symbol s = 4 t + 2 x + y (t = 0 for every trial of a log "
                      "without a t column in pair_counts)",
            "pair_counts": (np.asarray(scan.pair_counts, dtype=np.int64).tolist()
                            if scan.pair_counts is not None else None),
            "block_settings_counts": (np.asarray(scan.block_settings, dtype=np.int64).tolist()
                                      if scan.block_settings is not None else None),
        }
        body["design"] = sec
    body["inputs"] = inputs if inputs is not None else {
        "allow_mixed_inputs": False, "input_problems": [],
        "allow_seed_reuse": False, "seed_problems": []}
    if screens is not None:
        body["output_screens"] = screens
    if scan.log_spec is not None:  # a log read through a log spec (dicert.logspec)
        body["log"]["spec"] = dict(scan.log_spec)
    if scan.block_series is not None:
        section = _blocks_section(scan.block_series, protocol)
        if section is not None:
            body["estimate_blocks"] = section
    return plain(body)


# --------------------------------------------------------------------------- recipe


def _now(clock: Clock | None) -> str:
    t = clock() if clock is not None else _dt.datetime.now(_dt.UTC)
    if isinstance(t, str):
        return t
    if t.tzinfo is None:
        t = t.replace(tzinfo=_dt.UTC)
    return t.astimezone(_dt.UTC).isoformat().replace("+00:00", "Z")


def read_seed(seed: bytes | str | os.PathLike[str]) -> tuple[bytes, str]:
    """Seed bytes and a label for messages; a path is read as raw bytes."""
    if isinstance(seed, (bytes, bytearray, memoryview)):
        return bytes(seed), "seed"
    p = Path(seed)
    data = read_user_file(p, "seed file (raw bytes)", SeedError)
    if not data:
        raise SeedError(f"{p}: seed file is empty")
    return data, str(p)


def check_seed_length(seed: bytes, label: str, raw_bits: int, output_bits: int) -> int:
    """Raise SeedError unless ``seed`` holds the n + m - 1 bits the Toeplitz extractor needs."""
    from dicert.extract import seed_bits_required

    need_bits = int(seed_bits_required(raw_bits, output_bits))
    need_bytes = (need_bits + 7) // 8
    if len(seed) < need_bytes:
        raise SeedError(
            f"{label}: seed too short: {len(seed)} bytes given, {need_bytes} bytes needed "
            f"({need_bits} bits = {raw_bits} raw bits + {output_bits} output bits - 1)"
        )
    return need_bits


def _load(protocol: Any):
    from dicert.protocol import Protocol, load_protocol

    if isinstance(protocol, Protocol):
        return protocol
    return load_protocol(protocol)


def certify(log: Any, protocol: Any, seed: bytes | str | os.PathLike[str],
            out_dir: str | os.PathLike[str], *, key: Any = None,
            chain: str | os.PathLike[str] | None = None, clock: Clock | None = None,
            progress: Progress | None = None, follow: bool = False, poll_s: float = 0.5,
            idle_timeout_s: float | None = 300.0, force: bool = False,
            trusted_keys: Any = None, protocol_change: str | None = None,
            allow_mixed_inputs: bool = False, allow_seed_reuse: bool = False,
            scheduler: Any = None) -> CertifyResult:
    """Certify the randomness of a trial log and write the bits and a signed audit record.

    Parameters
    ----------
    log : path, directory or glob
        The trial log (any format :func:`dicert.logs.open_log` reads).
    protocol : Protocol or path
        The protocol fixed before the run (:func:`dicert.protocol.load_protocol`).
    seed : bytes or path
        Uniformly random extractor seed; it must hold n + m - 1 bits (n raw bits, m output).
    out_dir : path
        Directory receiving ``random.bits`` (certified runs only) and ``record.json``. It must
        be missing or empty unless ``force``; the files appear together (the folder is built
        next to it and renamed into place) or not at all.
    key : private key or path, optional
        Ed25519 private key (object or PEM file) that signs the record; unsigned otherwise.
    chain : path, optional
        Beacon chain directory: the whole chain is first verified against the operator's
        keys (``key``'s public half and ``trusted_keys``); a chain with foreign-signed or
        unsigned pulses, gaps, swapped pulses, reuse or undeclared protocol changes is
        refused, as is a log or seed that already fed a pulse. The record carries the
        previous record's digest and a pulse index, and a copy is appended to the chain.
    clock : callable, optional
        Returns the current time (datetime or ISO string); only the record's ``volatile``
        section depends on it.
    progress : callable(stage, done, total), optional
        Called while the log is read.
    follow : bool
        Method "pef" with a single binary log only: follow a growing log
        (:func:`dicert.finite.pef.follow_log`) until the target is reached, n_max, the log's
        trailer, or ``idle_timeout_s`` seconds without new trials (then the run aborts with
        what was read; a record is still written).
    poll_s, idle_timeout_s : float
        Follow mode: pause between looks for new bytes, and the idle timeout (None: none).
    force : bool
        Replace an earlier certification's ``out_dir`` (only after the new set is complete).
    trusted_keys : path or TrustSet, optional
        With ``chain``: further keys trusted for earlier pulses (key rotation).
    protocol_change : str, optional
        With ``chain``: the reason for a deliberate protocol change; recorded (with the
        previous protocol's digest) in the signed record as ``protocol_change``.
    allow_mixed_inputs : bool
        Accept a multi-file log with files of equal content, a file next to its ``.gz`` copy,
        or mixed formats (refused otherwise as bad input); recorded in ``inputs``.
    allow_seed_reuse : bool
        Accept a seed whose SHA-256 equals the log's (or one of its files') (refused
        otherwise); recorded in ``inputs``. A seed already used in a beacon chain is always
        refused with ``chain``, and a constant or short-period seed always.
    scheduler : str or dask.distributed.Client, optional
        Run the extraction's pieces on a dask cluster (:mod:`dicert.cluster`; default
        ``$DICERT_SCHEDULER``, else this process). Same bits and record.

    Returns
    -------
    CertifyResult

    Raises
    ------
    ProtocolError, LogFormatError, SeedError, ParameterError
        Bad input; nothing is written.

    Notes
    -----
    Early stopping (method "pef", single binary log): reading stops at the trial where the
    outcome is decided, and the record's ``log`` section covers exactly the bytes read
    (``scope`` "prefix", ``bytes_read``, ``trials_read``, ``stopped_early``,
    ``stop_trial_index``); see :func:`scan_log`. Stopping at a data-dependent time is sound
    for PEFs (Knill, Zhang & Bierhorst 2020; methods note section 2).

    Soundness: with the protocol's method the record's ``eps.total`` bounds
    P(accept) x (trace distance of the output, together with seed, settings and the
    adversary's side information of the method's model, from uniform). Assumptions are
    listed in :data:`ASSUMPTIONS` and in every record.

    References
    ----------
    .. [1] H. Krawczyk, "LFSR-based hashing and authentication", CRYPTO '94 (Toeplitz hashing).
    .. [2] M. Tomamichel, C. Schaffner, A. Smith, R. Renner, "Leftover hashing against quantum
       side information", IEEE Trans. Inf. Theory 57, 5524 (2011).
    """
    timings: dict[str, float] = {}
    started = _now(clock)
    t0 = time.perf_counter()
    proto = _load(protocol)
    seed_bytes, seed_label = read_seed(seed)
    seed_sha = hashlib.sha256(seed_bytes).hexdigest()
    signer = _load_key(key)
    out = Path(out_dir)
    if out.name in ("", ".", ".."):  # the folder is replaced as a whole: name it
        out = Path(os.path.abspath(out))
    if out.exists() and not out.is_dir():
        raise ParameterError(f"{out}: --out must be a directory")
    chain_dir = Path(chain) if chain is not None else None
    if chain_dir is not None:
        a, b = Path(os.path.abspath(out)), Path(os.path.abspath(chain_dir))
        if a == b or a.is_relative_to(b) or b.is_relative_to(a):
            raise ParameterError(f"{out}: --out and --chain must be separate folders (neither "
                                 "inside the other)")
    trust = _operator_trust(signer, trusted_keys, chain_dir, protocol_change)
    timings["setup"] = time.perf_counter() - t0

    from dicert import _outputs as outputs

    with contextlib.ExitStack() as held:
        # Locks for the whole run, chain first: a holder knows no other run is active.
        state = None
        if chain_dir is not None:
            outputs.make_public_dir(chain_dir)
            held.enter_context(outputs.held_lock(chain_dir / outputs.CHAIN_LOCK_NAME))
            outputs.recover_chain(chain_dir)
            state = _check_chain(chain_dir, trust, signer, seed_sha, seed_label, proto,
                                 protocol_change)
        try:
            out.parent.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise outputs.output_error(out.parent, exc) from None
        held.enter_context(outputs.held_lock(outputs.out_lock_path(out)))
        outputs.clean_stale(out)
        outputs.sweep_siblings(out)
        _check_out(out, force)
        return _certify_locked(
            log=log, proto=proto, seed_bytes=seed_bytes, seed_label=seed_label,
            seed_sha=seed_sha, signer=signer, out=out, chain_dir=chain_dir, state=state,
            protocol_change=protocol_change, force=force, clock=clock, progress=progress,
            follow=follow, poll_s=poll_s, idle_timeout_s=idle_timeout_s, timings=timings,
            started=started, allow_mixed_inputs=allow_mixed_inputs,
            allow_seed_reuse=allow_seed_reuse, scheduler=scheduler)


def _certify_locked(*, log: Any, proto: Any, seed_bytes: bytes, seed_label: str,
                    seed_sha: str, signer: Any, out: Path, chain_dir: Path | None, state: Any,
                    protocol_change: str | None, force: bool, clock: Clock | None,
                    progress: Progress | None, follow: bool, poll_s: float,
                    idle_timeout_s: float | None, timings: dict[str, float],
                    started: str, allow_mixed_inputs: bool = False,
                    allow_seed_reuse: bool = False, scheduler: Any = None) -> CertifyResult:
    """The run itself, with the locks held (see :func:`certify`)."""
    from dicert import _outputs as outputs
    from dicert.logs import open_log

    spec = FollowSpec(poll_s=poll_s, idle_timeout_s=idle_timeout_s) if follow else None
    if spec is None and not (proto.method == "pef" and _single_binary(log) is not None):
        # (the binary PEF reader checks this from the header it reads)
        _check_design_flag(proto, open_log(log).has_test_flag, log)
    t1 = time.perf_counter()
    spill = outputs.new_spill_dir(out)  # private (0700): raw bits never sit in --out
    stage: Path | None = None
    try:
        scan, sink = scan_log(log, proto.harvest.parties, proto.harvest.rounds,
                              spill_dir=spill, progress=progress, protocol=proto, follow=spec)
        timings["scan"] = time.perf_counter() - t1
        outputs.fault_point("after-scan")
        try:
            t2 = time.perf_counter()
            if scan.trials == 0:
                raise LogFormatError(log, "", "no trial arrived before the idle timeout; "
                                     "nothing to certify" if scan.follow else "contains no trials")
            generation_rounds = int(scan.counts[0].sum())
            if proto.design.gamma >= 1.0 and generation_rounds:
                raise LogFormatError(log, "", f"the protocol declares every round a test round "
                                     f"(settings.gamma = 1) but the log marks "
                                     f"{generation_rounds} trials as generation rounds (t = 0)")
            if state is not None and scan.sha256 in state.logs_used:
                raise ParameterError(
                    f"{log}: this log (SHA-256 {scan.sha256[:16]}...) already fed pulse "
                    f"{state.logs_used[scan.sha256]} of {chain_dir}; every pulse needs fresh "
                    "trials")
            analysis, inputs = checked_analysis(
                scan, proto, log=log, seed_bytes=seed_bytes, seed_label=seed_label,
                chain_dir=chain_dir, allow_mixed_inputs=allow_mixed_inputs,
                allow_seed_reuse=allow_seed_reuse)
            timings["analysis"] = time.perf_counter() - t2

            extraction = None
            t3 = time.perf_counter()
            if analysis.status == "certified":
                check_seed_length(seed_bytes, seed_label, scan.raw_bits, analysis.output_bits)
                from dicert.extract import extract_toeplitz

                extraction = extract_toeplitz(sink.data(), seed_bytes, analysis.output_bits,
                                              n_bits=scan.raw_bits, scheduler=scheduler,
                                              temp_dir=spill)
                if extraction.m_bits != analysis.output_bits:  # pragma: no cover - defensive
                    raise DicertError("extractor returned a different output length")
            timings["extraction"] = time.perf_counter() - t3
            analysis, screens = screened(extraction, analysis, proto, scan, sink.data())
            outputs.fault_point("after-extract")
        finally:
            sink.discard()

        t4 = time.perf_counter()
        publish = extraction is not None and analysis.status == "certified"
        chain_info = None
        if state is not None:
            link = state.next_link()
            chain_info = (int(link["pulse_index"]), link["previous_record_sha256"])
        volatile = {"timestamps": {"started": started, "finished": _now(clock)},
                    "timings_s": {k: round(v, 6) for k, v in timings.items()}}
        body = build_body(protocol=proto, scan=scan, analysis=analysis, seed_sha256=seed_sha,
                          seed_bytes=len(seed_bytes), extraction=extraction,
                          chain_info=chain_info, volatile=volatile, inputs=inputs,
                          screens=screens)
        # The record names its bits file (next to it); verify checks it by default.
        body["bits_file"] = BITS_NAME if publish else None
        if protocol_change is not None:
            body["protocol_change"] = {"previous_protocol_sha256": state.protocol_sha256,
                                       "reason": protocol_change.strip()}
        from dicert.audit.record import record_bytes, record_digest, seal_record

        record = seal_record(body, signer)
        rec_bytes = record_bytes(record)
        rec_sha = record_digest(record)
        # Build the complete output folder next to --out, then commit it in one step.
        stage = outputs.new_stage(out)
        try:
            if publish:
                outputs.write_public_file(stage / BITS_NAME, bytes(extraction.output))
            outputs.write_public_file(stage / RECORD_NAME, rec_bytes)
            outputs.fsync_dir(stage)
        except OSError as exc:
            raise outputs.output_error(exc.filename or stage, exc) from None
        timings["write"] = time.perf_counter() - t4
        outputs.fault_point("after-stage-write")
        chain_file = None
        if chain_dir is not None:
            pulse = pulse_name(int(record["pulse_index"]))
            stage = outputs.hand_to_journal(stage, out)
            journal = outputs.write_journal(chain_dir, stage=stage, out=out, pulse=pulse,
                                            record_sha256=rec_sha, replace=force)
            chain_file = _append_pulse(chain_dir, record, journal)
            # Committed: from here the journal owns the staging folder; should anything fail
            # now, the next certify --chain on this chain puts it in place.
            committed, stage = stage, None
            outputs.fault_point("after-chain-append")
            try:
                outputs.publish_stage(committed, out, replace=force)
            except DicertError as exc:
                raise DicertError(f"{exc} (pulse {pulse} is in the chain; the next certify "
                                  f"--chain on {chain_dir} completes {out})") from None
            os.unlink(journal)
            outputs.fsync_dir(chain_dir)
        else:
            outputs.publish_stage(stage, out, replace=force)
        stage = None
    finally:
        if stage is not None:
            outputs.remove_tree(stage)
        outputs.remove_tree(spill)
    bits_path = out / BITS_NAME
    return CertifyResult(
        status=analysis.status, output_bits=analysis.output_bits,
        bits_file=bits_path if publish else None,
        record_file=out / RECORD_NAME,
        chain_file=chain_file, min_entropy_bits=analysis.min_entropy_bits,
        error=analysis.total_error, raw_bits=scan.raw_bits, trials=scan.trials,
        abort_reason=analysis.abort_reason, record_sha256=rec_sha, record=record,
        log_scope=scan.scope, stopped_early=scan.stopped_early,
        stop_trial_index=scan.stop_trial_index,
        success_trial_index=_success_index(analysis.finite), ended_by=scan.ended_by,
    )


def _operator_trust(signer: Any, trusted_keys: Any, chain_dir: Path | None,
                    protocol_change: str | None) -> Any:
    """The keys an operator trusts for the existing chain: its own and a trusted-keys file."""
    if protocol_change is not None:
        if chain_dir is None:
            raise ParameterError("--protocol-change applies only with --chain")
        if not isinstance(protocol_change, str) or not protocol_change.strip():
            raise ParameterError("--protocol-change: give the reason for the change")
    if chain_dir is None:
        if trusted_keys is not None:
            raise ParameterError("--trusted-keys applies only with --chain")
        return None
    if chain_dir.exists() and not chain_dir.is_dir():
        raise ParameterError(f"{chain_dir}: --chain must be a directory")
    if signer is None:
        raise ParameterError("--chain needs --key: a beacon chain is extended only with "
                             "records signed by its operator")
    from dicert.audit.signing import public_key_bytes
    from dicert.audit.trust import trust_from

    public = public_key_bytes(signer.public_key() if hasattr(signer, "public_key")
                              and callable(signer.public_key) else signer)
    return trust_from(public, trusted_keys)


def _check_chain(chain_dir: Path, trust: Any, signer: Any, seed_sha: str, seed_label: str,
                 proto: Any, protocol_change: str | None) -> Any:
    """Verify the whole chain against the operator's trusted keys; refuse what cannot extend it."""
    from dicert.audit.chain import ChainVerificationError, chain_state
    from dicert.audit.signing import fingerprint
    from dicert.errors import VerificationError

    try:
        state = chain_state(chain_dir, trust)
    except ChainVerificationError as exc:
        raise VerificationError(f"{chain_dir}: refusing to extend a chain that does not "
                                f"verify against the operator's keys: {exc}",
                                "chain") from None
    link = state.next_link()
    fp = fingerprint(signer.public_key() if hasattr(signer, "public_key")
                     and callable(signer.public_key) else signer)
    try:
        trust.authorise(fp, link["pulse_index"], _now(None))
    except VerificationError as exc:
        raise ParameterError(f"--key: not trusted for pulse {link['pulse_index']} "
                             f"({exc})") from None
    if seed_sha in state.seeds_used:
        raise SeedError(f"{seed_label}: this extractor seed (SHA-256 {seed_sha[:16]}...) was "
                        f"already used by pulse {state.seeds_used[seed_sha]} of {chain_dir}; "
                        "use a fresh seed for every pulse (an aborted pulse's seed included)")
    prev = state.protocol_sha256
    if prev is not None and proto.sha256 != prev and protocol_change is None:
        raise ParameterError(
            f"{proto.name}: the protocol (SHA-256 {proto.sha256[:16]}...) differs from the "
            f"chain's ({prev[:16]}...); pass --protocol-change REASON to record a deliberate "
            "change in the signed record")
    if protocol_change is not None and (prev is None or proto.sha256 == prev):
        raise ParameterError("--protocol-change: the protocol is the same as the chain's "
                             "(or the chain is empty); nothing to declare")
    return state


def _check_out(out: Path, force: bool) -> None:
    """Refuse a non-empty --out unless --force, and --force over files certify did not write."""
    if not out.is_dir():
        return
    names = sorted(p.name for p in out.iterdir())
    if not names:
        return
    if not force:
        raise ParameterError(f"{out}: --out is not empty (holds {names[0]}"
                             f"{' and more' if len(names) > 1 else ''}); refusing to replace "
                             "an earlier run's outputs (use --force, or a new folder)")
    foreign = [n for n in names if n not in (BITS_NAME, RECORD_NAME)]
    if foreign:
        raise ParameterError(f"{out}: holds {foreign[0]}, which certify did not write; "
                             "--force replaces only an earlier certification's folder")


def pulse_name(index: int) -> str:
    from dicert.audit.chain import pulse_file_name

    return pulse_file_name(index)


def _append_pulse(chain_dir: Path, record: dict, journal: Path) -> Path:
    """The commit point: link the pulse into the chain (the journal goes if this fails)."""
    from dicert import _outputs as outputs
    from dicert.audit.chain import append_to_chain

    try:
        return Path(append_to_chain(chain_dir, record))
    except OSError as exc:
        os.unlink(journal)
        raise outputs.output_error(chain_dir, exc) from None
    except BaseException:
        os.unlink(journal)
        raise


def _extractor_convention() -> str:
    from dicert.extract import CONVENTION

    return CONVENTION


def _success_index(finite: Any) -> int | None:
    det = getattr(finite, "details", None)
    v = det.get("success_trial_index") if isinstance(det, Mapping) else None
    return int(v) if isinstance(v, int) else None


def _load_key(key: Any) -> Any:
    if key is None:
        return None
    if isinstance(key, (str, os.PathLike)):
        from dicert.audit.signing import load_private_key

        return load_private_key(key)
    return key


def iter_record_items(record: Mapping[str, Any], prefix: str = "") -> Iterator[tuple[str, Any]]:
    """Flatten a record into (dotted.path, value) pairs (lists indexed as path[i])."""
    for k, v in record.items():
        path = f"{prefix}.{k}" if prefix else str(k)
        if isinstance(v, Mapping):
            yield from iter_record_items(v, path)
        else:
            yield path, v


__all__ = [
    "ASSUMPTIONS",
    "BITS_NAME",
    "CAUTION",
    "EXIT_ABORTED",
    "HARVEST_ORDER",
    "RECORD_NAME",
    "Analysis",
    "CertifyResult",
    "FollowSpec",
    "LogScan",
    "analyse_counts",
    "build_body",
    "checked_analysis",
    "design_report",
    "withhold",
    "certify",
    "check_seed_length",
    "expected_raw_bits",
    "harvest_bits",
    "input_problems_of",
    "log_end_note",
    "read_seed",
    "scan_log",
    "screened",
]
