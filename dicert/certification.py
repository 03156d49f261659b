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
Harvested trials are taken in log order (trial index 0, 1, ...). ``select = "all"`` harvests
every trial; ``select = "generation"`` only trials with t = 0. Per harvested trial the bits
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
are not certified; :func:`dicert.verification.verify` hashes only the prefix. Text, npz and
multi-file logs are always read to the end (``scope = "whole"``, ``stopped_early = false``
even when the PEF run was decided earlier; the success trial is in the finite-size details).
Every reader stops at the same trial however the bytes arrive (a trial outside the settings
model stops the run at that very trial).

Exit codes of the CLI: 0 certified, 3 aborted, 5 withheld, 2 bad input, 1 verification failure.
"""

from __future__ import annotations

import contextlib
import dataclasses
import os
import time
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from dicert._display import displayed
from dicert.errors import DicertError, LogFormatError, ParameterError
from dicert.stages.scan import (  # noqa: F401 (also re-exported: the old import paths)
    Clock,
    MAX_BLOCK_POINTS,
    FollowSpec,
    LogScan,
    Progress,
    _BitSink,
    _BlockTally,
    _HeaderTap,
    _PefFeed,
    _check_design_flag,
    _open_log_file,
    _scan_binary_pef,
    _scan_whole,
    _single_binary,
    expected_raw_bits,
    group_blocks,
    harvest_bits,
    read_seed,
    scan_log,
)
from dicert.stages.analysis import (  # noqa: F401 (also re-exported: the old import paths)
    Analysis,
    _certify_counts,
    _chain_seed_digests,
    _estimate_eps,
    _not_run,
    analyse_counts,
    check_seed_length,
    checked_analysis,
    design_report,
    input_problems_of,
    log_end_note,
    screened,
    withhold,
)
from dicert.stages.record import (  # noqa: F401 (also re-exported: the old import paths)
    ASSUMPTIONS,
    CAUTION,
    HARVEST_ORDER,
    _blocks_section,
    _extractor_convention,
    _now,
    _single_round,
    _split_timing,
    build_body,
)
from dicert.stages.chaining import (  # noqa: F401 (also re-exported: the old import paths)
    _append_pulse,
    _check_chain,
    _operator_trust,
    pulse_name,
)

if TYPE_CHECKING:
    from dicert.protocol import Protocol

#: Exit code of ``dicert certify`` when the protocol aborts (a normal, recorded outcome).
EXIT_ABORTED = 3
#: Exit code when the output screens failed grossly: record written, bits withheld.
EXIT_WITHHELD = 5
#: Name of the raw-randomness output file inside ``out_dir``.
BITS_NAME = "random.bits"
#: Name of the audit record inside ``out_dir``.
RECORD_NAME = "record.json"


# --------------------------------------------------------------------------- results


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class CertifyResult:
    """Outcome of :func:`certify`.

    ``status`` is "certified", "aborted" or "withheld"; ``soundness_error`` is the sum of the
    error budget's terms, in "P(accept) x distance" form; ``bits_file`` is None when no bits
    were produced. The names of earlier versions (``min_entropy_bits``, ``error``,
    ``log_scope``) remain as read-only aliases.
    """

    status: str
    output_bits: int
    bits_file: Path | None
    record_file: Path
    chain_file: Path | None
    certified_min_entropy_bits: float
    soundness_error: float
    raw_bits: int
    trials: int
    abort_reason: str | None
    record_sha256: str
    record: dict
    log_coverage: str = "whole"
    stopped_early: bool = False
    stop_trial_index: int | None = None
    success_trial_index: int | None = None
    ended_by: str = "end-of-log"

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("status", self.status), ("output_bits", self.output_bits),
                ("certified_min_entropy_bits", self.certified_min_entropy_bits),
                ("soundness_error", self.soundness_error), ("trials", self.trials)]
        if full:
            rows += [("raw_bits", self.raw_bits), ("log_coverage", self.log_coverage),
                     ("ended_by", self.ended_by), ("abort_reason", self.abort_reason),
                     ("bits_file", self.bits_file), ("record_file", self.record_file),
                     ("chain_file", self.chain_file), ("record_sha256", self.record_sha256)]
        return rows

    # Deprecated names of earlier versions (read-only).
    min_entropy_bits = property(lambda self: self.certified_min_entropy_bits)
    error = property(lambda self: self.soundness_error)
    log_scope = property(lambda self: self.log_coverage)

    @property
    def certified(self) -> bool:
        return self.status == "certified"

    @property
    def exit_code(self) -> int:
        if self.certified:
            return 0
        return EXIT_WITHHELD if self.status == "withheld" else EXIT_ABORTED


# --------------------------------------------------------------------------- recipe


def _load(protocol: Protocol | str | os.PathLike[str] | Mapping[str, Any]) -> Protocol:
    from dicert.protocol import Protocol, load_protocol

    if isinstance(protocol, Protocol):
        return protocol
    return load_protocol(protocol)


# long: docstring (about 85 lines: every parameter); the body is the stages in order.
def certify(log: Any, protocol: Protocol | str | os.PathLike[str], seed: bytes | str | os.PathLike[str],
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
    for PEFs (Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)).

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
    run = read_inputs(protocol, seed, out_dir, key=key, chain=chain, trusted_keys=trusted_keys,
                      protocol_change=protocol_change)
    timings["setup"] = time.perf_counter() - t0
    with contextlib.ExitStack() as held:
        state = lock_outputs(held, run, force=force, protocol_change=protocol_change)
        return _certify_locked(
            log=log, run=run, state=state, protocol_change=protocol_change, force=force,
            clock=clock, progress=progress, follow=follow, poll_s=poll_s,
            idle_timeout_s=idle_timeout_s, timings=timings, started=started,
            allow_mixed_inputs=allow_mixed_inputs, allow_seed_reuse=allow_seed_reuse,
            scheduler=scheduler)


# --------------------------------------------------------------------------- stages of certify


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class RunInputs:
    """What certify has read and checked before it takes any lock."""

    proto: Protocol
    seed: Any  # dicert._seed.SeedInput: opened and checked, read only in chunks
    signer: Any  # Ed25519 private key or None
    out: Path
    chain_dir: Path | None
    trust: Any  # dicert.audit.trust.TrustSet (with a chain) or None

    @property
    def seed_label(self) -> str:
        return self.seed.label

    @property
    def seed_sha(self) -> str:
        """SHA-256 of the whole seed (streamed on first use, then kept)."""
        return self.seed.sha256


def read_inputs(protocol: Protocol | str | os.PathLike[str], seed: bytes | str | os.PathLike[str],
                out_dir: str | os.PathLike[str], *, key: Any = None,
                chain: str | os.PathLike[str] | None = None, trusted_keys: Any = None,
                protocol_change: str | None = None) -> RunInputs:
    """Stage 0: load the protocol, seed and key, and check the output and chain paths."""
    from dicert._seed import open_seed

    proto = _load(protocol)
    # The seed file is only opened and checked here; it is hashed and screened after the log
    # scan (or before, with a chain) by streaming, and the extractor reads only the bytes it
    # uses, so memory does not grow with the seed.
    seed_in = open_seed(seed)
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
    return RunInputs(proto=proto, seed=seed_in, signer=signer, out=out, chain_dir=chain_dir,
                     trust=trust)


def lock_outputs(held: contextlib.ExitStack, run: RunInputs, *, force: bool,
                 protocol_change: str | None) -> Any:
    """Take the locks for the whole run (chain first), clean up, check the chain and --out.

    Returns the chain's state (:func:`dicert.audit.chain.chain_state`) or None.
    """
    from dicert import _outputs as outputs

    state = None
    out, chain_dir = run.out, run.chain_dir
    if chain_dir is not None:
        outputs.make_public_dir(chain_dir)
        held.enter_context(outputs.held_lock(chain_dir / outputs.CHAIN_LOCK_NAME))
        outputs.recover_chain(chain_dir)
        state = _check_chain(chain_dir, run.trust, run.signer, run.seed_sha, run.seed_label,
                             run.proto, protocol_change)
    try:
        out.parent.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise outputs.output_error(out.parent, exc) from None
    held.enter_context(outputs.held_lock(outputs.out_lock_path(out)))
    outputs.clean_stale(out)
    outputs.sweep_siblings(out)
    _check_out(out, force)
    return state


def check_scan(scan: LogScan, proto: Protocol, log: Any, state: Any,
               chain_dir: Path | None) -> None:
    """Refuse a scan with no trials, generation rounds under gamma = 1, or a reused log."""
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
            f"{log}: this log (SHA-256 {scan.sha256}) already fed pulse "
            f"{state.logs_used[scan.sha256]} of {chain_dir}; every pulse needs fresh "
            "trials")


def extract_stage(analysis: Analysis, scan: LogScan, sink: _BitSink, run: RunInputs, *,
                  scheduler: Any, temp_dir: Path) -> Any:
    """Stage 4: Toeplitz extraction of a certified run (None otherwise)."""
    if analysis.status != "certified":
        return None
    check_seed_length(run.seed, run.seed_label, scan.raw_bits, analysis.output_bits)
    from dicert.extract import extract_toeplitz

    extraction = extract_toeplitz(sink.data(), run.seed.for_extractor(), analysis.output_bits,
                                  n_bits=scan.raw_bits, scheduler=scheduler,
                                  temp_dir=temp_dir)
    if extraction.m_bits != analysis.output_bits:  # pragma: no cover - defensive
        raise DicertError("extractor returned a different output length")
    run.seed.check_unchanged(extraction)
    return extraction


def seal_stage(*, run: RunInputs, scan: LogScan, analysis: Analysis, extraction: Any,
               state: Any, inputs: Any, screens: Any, protocol_change: str | None,
               volatile: dict) -> tuple[dict, bytes, str]:
    """Stage 5: the record body, signed; returns (record, its bytes, its SHA-256)."""
    publish = extraction is not None and analysis.status == "certified"
    chain_info = None
    if state is not None:
        link = state.next_link()
        chain_info = (int(link["pulse_index"]), link["previous_record_sha256"])
    body = build_body(protocol=run.proto, scan=scan, analysis=analysis,
                      seed_sha256=run.seed_sha, seed_bytes=len(run.seed),
                      extraction=extraction, chain_info=chain_info, volatile=volatile,
                      inputs=inputs, screens=screens)
    # The record names its bits file (next to it); verify checks it by default.
    body["bits_file"] = BITS_NAME if publish else None
    if protocol_change is not None:
        body["protocol_change"] = {"previous_protocol_sha256": state.protocol_sha256,
                                   "reason": protocol_change.strip()}
    from dicert.audit.record import record_bytes, record_digest, seal_record

    record = seal_record(body, run.signer)
    return record, record_bytes(record), record_digest(record)


def write_stage(out: Path, bits: bytes | None, rec_bytes: bytes) -> Path:
    """Write the bits (if any) and the record into a fresh folder next to ``out``."""
    from dicert import _outputs as outputs

    stage = outputs.new_stage(out)
    try:
        if bits is not None:
            outputs.write_public_file(stage / BITS_NAME, bits)
        outputs.write_public_file(stage / RECORD_NAME, rec_bytes)
        outputs.fsync_dir(stage)
    except OSError as exc:
        outputs.remove_tree(stage)
        raise outputs.output_error(exc.filename or stage, exc) from None
    except BaseException:
        outputs.remove_tree(stage)
        raise
    return stage


def commit_stage(stage: Path, out: Path, *, chain_dir: Path | None, record: dict,
                 rec_sha: str, force: bool) -> Path | None:
    """Stage 6: put the written folder in place; with a chain, link the pulse first (the
    commit point). Returns the pulse file in the chain, or None. Removes ``stage`` on a
    failure before the commit point."""
    from dicert import _outputs as outputs

    try:
        outputs.fault_point("after-stage-write")
        if chain_dir is None:
            outputs.publish_stage(stage, out, replace=force)
            return None
        pulse = pulse_name(int(record["pulse_index"]))
        stage = outputs.hand_to_journal(stage, out)
        journal = outputs.write_journal(chain_dir, stage=stage, out=out, pulse=pulse,
                                        record_sha256=rec_sha, replace=force)
        chain_file = _append_pulse(chain_dir, record, journal)
    except BaseException:
        outputs.remove_tree(stage)
        raise
    # Committed: from here the journal owns the staging folder; should anything fail
    # now, the next certify --chain on this chain puts it in place.
    outputs.fault_point("after-chain-append")
    try:
        outputs.publish_stage(stage, out, replace=force)
    except DicertError as exc:
        raise DicertError(f"{exc} (pulse {pulse} is in the chain; the next certify "
                          f"--chain on {chain_dir} completes {out})") from None
    os.unlink(journal)
    outputs.fsync_dir(chain_dir)
    return chain_file


def _certify_locked(*, log: Any, run: RunInputs, state: Any, protocol_change: str | None,
                    force: bool, clock: Clock | None, progress: Progress | None, follow: bool,
                    poll_s: float, idle_timeout_s: float | None, timings: dict[str, float],
                    started: str, allow_mixed_inputs: bool = False,
                    allow_seed_reuse: bool = False, scheduler: Any = None) -> CertifyResult:
    """The run itself, with the locks held: the stages in order (see :func:`certify`)."""
    from dicert import _outputs as outputs
    from dicert.logs import open_log

    proto, out = run.proto, run.out
    spec = FollowSpec(poll_s=poll_s, idle_timeout_s=idle_timeout_s) if follow else None
    if spec is None and not (proto.method == "pef" and _single_binary(log) is not None):
        # (the binary PEF reader checks this from the header it reads)
        _check_design_flag(proto, open_log(log).has_test_flag, log)
    t1 = time.perf_counter()
    spill = outputs.new_spill_dir(out)  # private (0700): raw bits never sit in --out
    try:
        from dicert.cluster import scheduler_from_env

        scheduler = scheduler_from_env(scheduler)
        scan, sink = scan_log(log, proto.harvest.parties, proto.harvest.select,
                              spill_dir=spill, progress=progress, protocol=proto, follow=spec,
                              scheduler=scheduler)
        timings["scan"] = time.perf_counter() - t1
        outputs.fault_point("after-scan")
        try:
            t2 = time.perf_counter()
            check_scan(scan, proto, log, state, run.chain_dir)
            analysis, inputs = checked_analysis(
                scan, proto, log=log, seed_bytes=run.seed, seed_label=run.seed_label,
                chain_dir=run.chain_dir, allow_mixed_inputs=allow_mixed_inputs,
                allow_seed_reuse=allow_seed_reuse)
            timings["analysis"] = time.perf_counter() - t2
            t3 = time.perf_counter()
            extraction = extract_stage(analysis, scan, sink, run, scheduler=scheduler,
                                       temp_dir=spill)
            timings["extraction"] = time.perf_counter() - t3
            analysis, screens = screened(extraction, analysis, proto, scan, sink.data())
            outputs.fault_point("after-extract")
        finally:
            sink.discard()
        t4 = time.perf_counter()
        publish = extraction is not None and analysis.status == "certified"
        volatile = {"timestamps": {"started": started, "finished": _now(clock)},
                    "timings_s": {k: round(v, 6) for k, v in timings.items()}}
        record, rec_bytes, rec_sha = seal_stage(
            run=run, scan=scan, analysis=analysis, extraction=extraction, state=state,
            inputs=inputs, screens=screens, protocol_change=protocol_change, volatile=volatile)
        # Build the complete output folder next to --out, then commit it in one step.
        stage = write_stage(out, bytes(extraction.output) if publish else None, rec_bytes)
        timings["write"] = time.perf_counter() - t4
        chain_file = commit_stage(stage, out, chain_dir=run.chain_dir, record=record,
                                  rec_sha=rec_sha, force=force)
    finally:
        outputs.remove_tree(spill)
    return CertifyResult(
        status=analysis.status, output_bits=analysis.output_bits,
        bits_file=out / BITS_NAME if publish else None,
        record_file=out / RECORD_NAME,
        chain_file=chain_file, certified_min_entropy_bits=analysis.certified_min_entropy_bits,
        soundness_error=analysis.total_error, raw_bits=scan.raw_bits, trials=scan.trials,
        abort_reason=analysis.abort_reason, record_sha256=rec_sha, record=record,
        log_coverage=scan.scope, stopped_early=scan.stopped_early,
        stop_trial_index=scan.stop_trial_index,
        success_trial_index=_success_index(analysis.finite), ended_by=scan.ended_by,
    )


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

