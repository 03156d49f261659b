"""End-to-end certification: trial log + protocol + seed -> certified bits + audit record.

This is the one-call recipe the ``dicert certify`` command uses. It

1. validates the protocol (:mod:`dicert.protocol`) and reads the seed;
2. reads the log ONCE, streaming: per chunk it adds the trial counts and harvests the raw
   outcome bits (see *Raw-bit order and packing*), spilling them to a temporary file in the
   output directory;
3. estimates the CHSH value (:func:`dicert.estimate.estimate_chsh`, informational) and runs the
   protocol's finite-size method on the counts (:func:`dicert.finite.certify_counts`), which
   decides accepted/aborted against the PRE-DECLARED threshold and bounds the min-entropy;
4. on acceptance sizes the output with the leftover hash lemma
   (:func:`dicert.extract.lhl_output_length`) and runs the Toeplitz extractor;
5. writes the bits file and the signed record atomically (temporary files renamed into place
   only at the very end; nothing is left behind on failure) and, with ``chain``, appends the
   record to a beacon chain.

An abort is a normal outcome: status ``"aborted"``, 0 output bits, a record is still written.

Raw-bit order and packing
-------------------------
Harvested trials are taken in log order (trial index 0, 1, ...). ``rounds = "all"`` harvests
every trial; ``rounds = "generation"`` only trials with t = 0. Per harvested trial the bits
are ``a`` (parties "A") or ``a`` then ``b`` (parties "AB"). The bit string is packed
big-endian, 8 bits per byte (``numpy.packbits``, first bit = most significant bit of byte 0),
the last byte zero-padded. ``raw_bits`` counts the bits without padding; ``raw_sha256`` is the
SHA-256 of the packed bytes. The extractor reads the same packing.

Exit codes of the CLI: 0 certified, 3 aborted, 2 bad input, 1 verification failure.
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
from dicert.errors import DicertError, LogFormatError, ParameterError, SeedError

#: Exit code of ``dicert certify`` when the protocol aborts (a normal, recorded outcome).
EXIT_ABORTED = 3
#: Name of the raw-randomness output file inside ``out_dir``.
BITS_NAME = "random.bits"
#: Name of the audit record inside ``out_dir``.
RECORD_NAME = "record.json"

#: Keep harvested raw bits in memory below this many bytes, spill to a temp file above.
_SPILL_BYTES = 64 << 20
#: Trials per streamed chunk.
_CHUNK_TRIALS = 1 << 22

ASSUMPTIONS = (
    ("No communication between the two stations during a trial (locality / no signalling "
    "between the measurement devices within each round)."),
    ("Measurement settings are chosen independently of the devices and of any adversary, "
    "with the distribution declared in the protocol."),
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

    @property
    def certified(self) -> bool:
        return self.status == "certified"

    @property
    def exit_code(self) -> int:
        return 0 if self.certified else EXIT_ABORTED


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
        if self._fh is None and self._mem + len(data) > _SPILL_BYTES and self._spill_dir is not None:
            self._spill_dir.mkdir(parents=True, exist_ok=True)
            fd, tmp = tempfile.mkstemp(prefix=".raw.", suffix=".part", dir=self._spill_dir)
            self._fh = os.fdopen(fd, "wb")
            self.path = Path(tmp)
            for p in self._parts:
                self._fh.write(p)
            self._parts = []
        if self._fh is not None:
            self._fh.write(data)
        else:
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


def scan_log(log: Any, parties: str, rounds: str, *, spill_dir: Path | None = None,
             progress: Progress | None = None, protocol: Any = None) -> tuple[LogScan, _BitSink]:
    """Read a log once: counts, log digest, and the harvested raw bits.

    One streaming pass of :func:`dicert.logs.summarize_log` counts the trials and hashes the
    log's bytes; its per-chunk callback harvests the raw bits in the same pass. Returns the
    scan summary and the bit sink holding the packed raw bits (the caller must ``discard()``
    it).

    With a ``protocol`` whose method is "pef", the same pass feeds the streaming PEF
    accumulator (:class:`dicert.finite.pef.PefAccumulator`) and harvests only the analysed
    trials, from the first trial after the calibration prefix up to and including the trial at
    which the target is reached; later trials are still hashed and counted (the record's log
    digest covers the whole log) but neither analysed nor harvested.
    """
    from dicert.logs import summarize_log

    sink = _BitSink(spill_dir)
    acc = None
    first = 0
    if protocol is not None and protocol.method == "pef":
        from dicert.finite.pef import PefAccumulator

        acc = PefAccumulator(protocol.analysis, protocol.design)
        params = protocol.analysis
        first = params.calibration_trials if params.calibration == "prefix" else 0

    def on_chunk(chunk: Any) -> None:
        if acc is None:
            sink.add(harvest_bits(chunk.codes, parties, rounds, bool(chunk.has_test_flag)))
            return
        if acc.done:
            return
        codes = chunk.codes
        if not chunk.has_test_flag:
            # Logs without a t column carry t = 0 in the code, but every trial is a test
            # round (project data model); the accumulator reads t from the code.
            codes = codes | np.uint8(0x10)
        acc.update(codes)
        start = int(chunk.start)
        end = acc.trials_seen  # trials consumed so far (the success trial included)
        lo, hi = max(first - start, 0), min(end - start, len(chunk.codes))
        if hi > lo:
            sink.add(harvest_bits(chunk.codes[lo:hi], parties, rounds,
                                  bool(chunk.has_test_flag)))

    def on_progress(done: int, total: int) -> None:
        if progress is not None:
            progress("scan", done, total)

    try:
        summary = summarize_log(log, digest=True, chunk_trials=_CHUNK_TRIALS, on_chunk=on_chunk,
                                progress=on_progress if progress is not None else None)
        raw_sha = sink.finish()
    except BaseException:
        sink.discard()
        raise
    scan = LogScan(counts=np.asarray(summary.counts, dtype=np.int64), trials=int(summary.trials),
                   sha256=str(summary.sha256), size_bytes=int(summary.size_bytes),
                   files=tuple(Path(f.path).name for f in summary.files),
                   has_test_flag=bool(summary.has_test_flag), raw_bits=sink.bits,
                   raw_sha256=raw_sha, finite=acc.result() if acc is not None else None)
    return scan, sink


# --------------------------------------------------------------------------- analysis


def analyse_counts(counts: np.ndarray, protocol: Any, raw_bits: int, *,
                   finite: Any = None) -> Analysis:
    """Estimate, finite-size bound, accept/abort and output length from the counts alone.

    Deterministic in its inputs, so :func:`dicert.verify.verify` re-derives it from a record.
    ``finite`` supplies the result of a streaming method (pef), which depends on the trial
    order and not only on the counts.
    """
    from dicert.estimate import estimate_chsh
    from dicert.extract import lhl_output_length, seed_bits_required

    counts = np.asarray(counts, dtype=np.int64)
    eps_est = _estimate_eps(protocol)
    estimate = estimate_chsh(counts, design=protocol.design, eps=eps_est)
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
        why = (finite.details or {}).get("abort_reason") if isinstance(finite.details, Mapping) else None
        if why:
            reason = f"{reason}: {why}"
    elif m <= 0:
        status = "aborted"
        reason = (f"accepted, but the certified min-entropy ({k:.6g} bits) leaves no output "
                  f"at eps_ext = {eps_ext:g}")
    else:
        status, reason = "certified", None
    need = int(seed_bits_required(raw_bits, m)) if m > 0 else 0
    return Analysis(estimate=estimate, finite=finite, status=status, abort_reason=reason,
                    min_entropy_bits=k, output_bits=m if status == "certified" else 0,
                    seed_bits_needed=need if status == "certified" else 0,
                    total_error=total_error)


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


def plain(obj: Any) -> Any:
    """Convert dataclasses, numpy values, tuples and paths into JSON values (finite floats)."""
    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {f.name: plain(getattr(obj, f.name)) for f in dataclasses.fields(obj)}
    if isinstance(obj, Mapping):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return plain(obj.tolist())
    if isinstance(obj, np.generic):
        return plain(obj.item())
    if isinstance(obj, bool) or obj is None or isinstance(obj, (int, str)):
        return obj
    if isinstance(obj, float):
        if math.isnan(obj):
            return None
        if math.isinf(obj):
            return "inf" if obj > 0 else "-inf"
        return obj
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    return str(obj)


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
               volatile: dict) -> dict:
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
    }
    assumptions = list(ASSUMPTIONS)
    side = str(fin.side_information)
    assumptions.append(f"Side-information model of the method ({fin.method}): {side} "
                       "side information held by the adversary.")
    for a in fin.assumptions:
        if a not in assumptions:
            assumptions.append(str(a))
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
            "files": list(scan.files),
            "has_test_flag": bool(scan.has_test_flag),
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
        "certified_min_entropy_bits": analysis.min_entropy_bits if certified else 0.0,
        "assumptions": assumptions,
        "caution": CAUTION,
        "references": references,
        "pulse_index": chain_info[0] if chain_info else None,
        "previous_record_sha256": chain_info[1] if chain_info else None,
        "volatile": volatile,
    }
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
    try:
        data = p.read_bytes()
    except FileNotFoundError:
        raise SeedError(f"{p}: seed file not found") from None
    except IsADirectoryError:
        raise SeedError(f"{p}: is a directory, expected a seed file of raw bytes") from None
    except OSError as exc:
        raise SeedError(f"{p}: cannot read seed file ({exc.strerror})") from None
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
            progress: Progress | None = None) -> CertifyResult:
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
        Directory receiving ``random.bits`` (certified runs only) and ``record.json``.
    key : private key or path, optional
        Ed25519 private key (object or PEM file) that signs the record; unsigned otherwise.
    chain : path, optional
        Beacon chain directory: the record carries the previous record's digest and a
        pulse index, and a copy is appended to the chain.
    clock : callable, optional
        Returns the current time (datetime or ISO string); only the record's ``volatile``
        section depends on it.
    progress : callable(stage, done, total), optional
        Called while the log is read.

    Returns
    -------
    CertifyResult

    Raises
    ------
    ProtocolError, LogFormatError, SeedError, ParameterError
        Bad input; nothing is written.

    Notes
    -----
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
    if out.exists() and not out.is_dir():
        raise ParameterError(f"{out}: --out must be a directory")
    chain_dir = Path(chain) if chain is not None else None
    chain_info = _chain_position(chain_dir)
    timings["setup"] = time.perf_counter() - t0

    from dicert.logs import open_log

    if proto.design.gamma < 1.0 and not open_log(log).has_test_flag:
        raise LogFormatError(log, "", "the protocol uses spot-checking (settings.gamma < 1) "
                             "but the log has no t column marking test rounds")
    t1 = time.perf_counter()
    spill = out if out.is_dir() else out.parent
    scan, sink = scan_log(log, proto.harvest.parties, proto.harvest.rounds, spill_dir=spill,
                          progress=progress, protocol=proto)
    timings["scan"] = time.perf_counter() - t1
    tmp_files: list[Path] = []
    try:
        t2 = time.perf_counter()
        generation_rounds = int(scan.counts[0].sum())
        if proto.design.gamma >= 1.0 and generation_rounds:
            raise LogFormatError(log, "", f"the protocol declares every round a test round "
                                 f"(settings.gamma = 1) but the log marks {generation_rounds} "
                                 f"trials as generation rounds (t = 0)")
        analysis = analyse_counts(scan.counts, proto, scan.raw_bits, finite=scan.finite)
        timings["analysis"] = time.perf_counter() - t2

        extraction = None
        t3 = time.perf_counter()
        if analysis.status == "certified":
            check_seed_length(seed_bytes, seed_label, scan.raw_bits, analysis.output_bits)
            from dicert.extract import extract_toeplitz

            extraction = extract_toeplitz(sink.data(), seed_bytes, analysis.output_bits,
                                          n_bits=scan.raw_bits)
            if extraction.m_bits != analysis.output_bits:  # pragma: no cover - defensive
                raise DicertError("extractor returned a different output length")
        timings["extraction"] = time.perf_counter() - t3

        t4 = time.perf_counter()
        out.mkdir(parents=True, exist_ok=True)
        bits_path = out / BITS_NAME
        record_path = out / RECORD_NAME
        if extraction is not None:
            tmp_files.append(_write_temp(out, BITS_NAME, extraction.output))
        timings["write"] = time.perf_counter() - t4
        volatile = {"timestamps": {"started": started, "finished": _now(clock)},
                    "timings_s": {k: round(v, 6) for k, v in timings.items()}}
        body = build_body(protocol=proto, scan=scan, analysis=analysis, seed_sha256=seed_sha,
                          seed_bytes=len(seed_bytes), extraction=extraction,
                          chain_info=chain_info, volatile=volatile)
        from dicert.audit.record import record_bytes, record_digest, seal_record

        record = seal_record(body, signer)
        rec_bytes = record_bytes(record)
        tmp_files.append(_write_temp(out, RECORD_NAME, rec_bytes))
        # Commit point: rename into place (bits first, record last).
        if extraction is not None:
            os.replace(tmp_files[0], bits_path)
        else:
            # A bits file left by an earlier run in this directory must not be mistaken for
            # the output of this (aborted) one.
            with contextlib.suppress(FileNotFoundError):
                os.unlink(bits_path)
        os.replace(tmp_files[-1], record_path)
        tmp_files = []
        chain_file = None
        if chain_dir is not None:
            from dicert.audit.chain import append_to_chain

            try:
                chain_file = Path(append_to_chain(chain_dir, record))
            except BaseException:
                with contextlib.suppress(FileNotFoundError):
                    os.unlink(record_path)
                if extraction is not None:
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(bits_path)
                raise
    finally:
        sink.discard()
        for p in tmp_files:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(p)
    return CertifyResult(
        status=analysis.status, output_bits=analysis.output_bits,
        bits_file=bits_path if extraction is not None else None, record_file=record_path,
        chain_file=chain_file, min_entropy_bits=analysis.min_entropy_bits,
        error=analysis.total_error, raw_bits=scan.raw_bits, trials=scan.trials,
        abort_reason=analysis.abort_reason, record_sha256=record_digest(record), record=record,
    )


def _write_temp(directory: Path, name: str, data: bytes) -> Path:
    fd, tmp = tempfile.mkstemp(prefix=f".{name}.", suffix=".part", dir=directory)
    try:
        with os.fdopen(fd, "wb") as fh:
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return Path(tmp)


def _load_key(key: Any) -> Any:
    if key is None:
        return None
    if isinstance(key, (str, os.PathLike)):
        from dicert.audit.signing import load_private_key

        return load_private_key(key)
    return key


def _chain_position(chain_dir: Path | None) -> tuple[int, str | None] | None:
    if chain_dir is None:
        return None
    if chain_dir.exists() and not chain_dir.is_dir():
        raise ParameterError(f"{chain_dir}: --chain must be a directory")
    from dicert.audit.chain import next_link

    link = next_link(chain_dir)
    return (int(link["pulse_index"]), link["previous_record_sha256"])


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
    "LogScan",
    "analyse_counts",
    "build_body",
    "certify",
    "check_seed_length",
    "expected_raw_bits",
    "harvest_bits",
    "read_seed",
    "scan_log",
]
