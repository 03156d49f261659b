"""Accumulation and streaming: :class:`PefAccumulator` scores a stream of trial codes,
:func:`certify_pef` / :func:`certify_pef_counts` wrap it into a
:class:`~dicert.finite.result.FiniteSizeResult`, :func:`follow_log` reads a growing log.

Part of :mod:`dicert.finite.pef` (see its docstring for the method and references).
"""

from __future__ import annotations

import math
import time
from collections.abc import Iterator
from typing import Any

import numpy as np

from dicert.errors import ParameterError, ProtocolError, SolverError
from dicert.finite.pef.models import (
    BLOCK_TABLES_LISTED_MAX,
    REFERENCES,
    box_model,
    counts_by_setting,
    fit_box,
)
from dicert.finite.pef.construction import Pef, build_pef, trivial_pef
from dicert.finite.pef.params import PefParams, SUB_BLOCK


def _scan_exact(codes: np.ndarray, table: np.ndarray, base_counts: np.ndarray,
                threshold: float, prior: tuple[float, float] | None = None) -> int:
    """First index i with log2 T (base_counts + codes[:i+1]) >= threshold + allowance, else -1.

    Candidates come from a float64 running sum with a rounding band; each is confirmed from
    the exact counts (math.fsum), so the answer does not depend on summation order. ``prior``
    is the (score, allowance) of earlier blocks scored with other tables (see :func:`_combine`).
    """
    s0, _ = _combine(prior, base_counts, table)
    if s0 == -math.inf:
        return -1
    with np.errstate(invalid="ignore"):
        run = s0 + np.cumsum(table[codes])
    band = _band(s0, codes.size, table)
    for i in np.flatnonzero(run >= threshold - band):
        cnt = base_counts + np.bincount(codes[: i + 1], minlength=256)
        s, allowance = _combine(prior, cnt, table)
        if s - allowance >= threshold:
            return int(i)
    return -1


class PefAccumulator:
    """Streaming PEF certification: feed trial codes, learn when the target is reached.

    The accumulator keeps exact integer counts of the 256 possible byte codes; the certified
    quantity log2 T is recomputed from the counts with ``math.fsum`` (so no rounding error
    accumulates over billions of trials) and an explicit rounding allowance is subtracted
    before comparing with the threshold. A compiled per-trial scan finds the exact first trial
    at which the threshold is crossed (candidates within a small rounding band are confirmed
    from the exact counts).

    Trials before ``calibration_trials`` (calibration = "prefix") are counted for fitting the
    anticipated box and are NOT analysed; the PEF is built from them alone when the last of
    them arrives. A trial whose (t, x, y) the settings model cannot produce gets factor 0.

    With calibration = "adaptive" every trial is analysed, in blocks of ``block_trials``. The
    PEF of block 0 comes from the rule ``initial``; that of block k >= 1 is built (same beta,
    model, lam and settings) for the maximum-likelihood box of the trials of the blocks before
    k (all of them, or the last ``fit_window_blocks``), when the first trial of block k
    arrives: it depends only on the past, as the probability estimate requires
    (Knill, Zhang & Bierhorst 2020, the factor of trial i fixed before trial i). The exact
    counts of each block are kept; log2 T is the sum over blocks of counts x that block's
    log2 F table (math.fsum per block and over the blocks, with the rounding allowances
    added). :attr:`pef` is the PEF of the current block. If the solver fails on a re-fit, the
    previous block's PEF is kept (it also depends only on the past); the block records say so.

    Parameters
    ----------
    params : PefParams
    design : SettingsDesign or None
        Test-round probability and generation settings (None: uniform, every round a test).
    pef : Pef, optional
        Use this PEF (it must have the power ``params.beta``) instead of building one (under
        calibration = "adaptive": for the first block, instead of the rule ``initial``).
    """

    def __init__(self, params: PefParams, design: Any = None, *, pef: Pef | None = None) -> None:
        self.params = params
        self.settings = params.settings_model(design)
        self.threshold = params.threshold_log2
        self._cal_counts = np.zeros(256, dtype=np.int64)
        self._counts = np.zeros(256, dtype=np.int64)  # the current block's trials
        self.trials_seen = 0
        self.success_index: int | None = None
        self.calibration_box: np.ndarray | None = None
        self.pef: Pef | None = None
        # calibration = "adaptive": the closed blocks (exact counts, scores, records).
        self._adaptive = params.calibration == "adaptive"
        self._prior: tuple[float, float] | None = None
        self._closed_trials = 0
        self._closed_outside = 0
        self._closed_scores: list[float] = []
        self._closed_allowances: list[float] = []
        self._block_counts: list[np.ndarray] = []
        self._blocks: list[dict] = []
        if pef is not None:
            if abs(pef.beta - params.beta) > 0.0:
                raise ParameterError(f"PEF power {pef.beta} differs from params.beta "
                                     f"{params.beta}")
            self.pef = pef
            self._cal_needed = 0
            if self._adaptive:
                self._start_block(pef, None, "initial: PEF given by the caller", None)
        elif params.calibration == "prefix":
            self._cal_needed = params.calibration_trials
        elif self._adaptive:
            self._cal_needed = 0
            box = params.anticipated_box()
            if box is None:
                first = trivial_pef(self.settings, params.beta, model=params.model)
            else:
                first = build_pef(box, self.settings, params.beta, model=params.model,
                                  lam=params.lam)
            self._start_block(first, box, f"initial: {params.initial}", None)
        else:
            self._cal_needed = 0
            self.calibration_box = params.anticipated_box()
            self.pef = build_pef(self.calibration_box, self.settings, params.beta,
                                 model=params.model, lam=params.lam)

    # ------------------------------------------------------------------ state
    @property
    def calibration_trials(self) -> int:
        return int(self._cal_counts[:32].sum())

    @property
    def analysis_trials(self) -> int:
        return self._closed_trials + int(self._counts.sum())

    @property
    def succeeded(self) -> bool:
        return self.success_index is not None

    @property
    def dead(self) -> bool:
        """True once a trial outside the settings model was analysed (success impossible)."""
        return self._closed_outside > 0 or (self.pef is not None and bool(np.any(
            self._counts[~np.isfinite(self.pef.log2_table)] > 0)))

    @property
    def done(self) -> bool:
        """No further trial can change the outcome (success, n_max reached, or dead)."""
        return self.succeeded or self.analysis_trials >= self.params.n_max or self.dead

    def log2_t(self) -> tuple[float, float]:
        """(log2 T over the analysed trials, rounding allowance), from the exact counts."""
        if self.pef is None:
            return 0.0, 0.0
        return _combine(self._prior, self._counts, self.pef.log2_table)

    # ------------------------------------------------------------------ feeding
    def update(self, codes: Any) -> bool:
        """Consume trial codes (uint8 array or LogChunk); True once the target is reached.

        Trials after the success trial or beyond n_max are ignored (the caller may stop
        reading as soon as :attr:`done` is True).
        """
        c = getattr(codes, "codes", codes)
        c = np.ascontiguousarray(np.asarray(c, dtype=np.uint8).ravel())
        pos = 0
        while pos < c.size and not self.done:
            if self._cal_needed > 0:
                take = min(self._cal_needed, c.size - pos)
                self._cal_counts += np.bincount(c[pos:pos + take], minlength=256)
                self._cal_needed -= take
                self.trials_seen += take
                pos += take
                if self._cal_needed == 0:
                    self._calibrate()
                continue
            # Slices of at most 2^20 trials: early stopping wastes at most one slice of counting.
            take = min(c.size - pos, self.params.n_max - self.analysis_trials, 1 << 20)
            if self._adaptive:
                in_block = int(self._counts.sum())
                if in_block >= self.params.block_trials:
                    self._next_block()
                    in_block = 0
                take = min(take, self.params.block_trials - in_block)
            self._analyse(c[pos:pos + take])
            pos += take
        return self.succeeded

    def _calibrate(self) -> None:
        if np.any(self._cal_counts[32:]):
            raise ParameterError("calibration trials contain invalid codes (above 31)")
        n_zc = counts_by_setting(self._cal_counts[:32])
        self.calibration_box = fit_box(n_zc, self.params.model)
        self.pef = build_pef(self.calibration_box, self.settings, self.params.beta,
                             model=self.params.model, lam=self.params.lam)

    def _start_block(self, pef: Pef, box: np.ndarray | None, source: str,
                     fit: tuple[int, int] | None) -> None:
        self.pef = pef
        self.calibration_box = box
        self._blocks.append({"first_trial": self.trials_seen, "source": source,
                             "fit_first_trial": None if fit is None else fit[0],
                             "fit_trials": 0 if fit is None else fit[1], "pef": pef})

    def _next_block(self) -> None:
        """Close the current block and build the next block's PEF from earlier trials only."""
        p = self.params
        table = self.pef.log2_table
        s, a = _score(self._counts, table)
        self._blocks[-1]["score"] = s
        self._closed_scores.append(s)
        self._closed_allowances.append(a)
        self._closed_outside += int(self._counts[~np.isfinite(table)].sum())
        self._closed_trials += int(self._counts.sum())
        self._block_counts.append(self._counts[:32].copy())
        if all(math.isfinite(v) for v in self._closed_scores):
            ps = math.fsum(self._closed_scores)
            # fsum is correctly rounded: its error is below 2^-53 of the sum of magnitudes.
            pa = (math.fsum(self._closed_allowances)
                  + math.fsum(abs(v) for v in self._closed_scores) * 2.0 ** -52)
            self._prior = (ps, pa)
        else:
            self._prior = (-math.inf, 0.0)
        window = p.fit_window_blocks
        used = self._block_counts[-window:] if window else self._block_counts
        fit_counts = np.sum(used, axis=0)
        fit = (int(self._blocks[len(self._blocks) - len(used)]["first_trial"]),
               int(fit_counts.sum()))
        try:
            box = fit_box(counts_by_setting(fit_counts), p.model)
            pef = build_pef(box, self.settings, p.beta, model=p.model, lam=p.lam)
            source = "fit"
        except SolverError as exc:
            # Keeping the previous PEF is sound: it too depends only on earlier trials.
            pef, box = self.pef, self.calibration_box
            source = f"previous block's PEF (re-fit failed: {exc})"
        self._counts = np.zeros(256, dtype=np.int64)
        self._start_block(pef, box, source, fit)

    def _block_records(self) -> list[dict]:
        """Per-block audit entries (no timings, so records stay deterministic)."""
        listed = len(self._blocks) <= BLOCK_TABLES_LISTED_MAX
        out = []
        for k, b in enumerate(self._blocks):
            pef = b["pef"]
            current = k == len(self._blocks) - 1
            if current:
                score = _score(self._counts, pef.log2_table)[0]
                trials = int(self._counts.sum())
            else:
                score = b["score"]
                trials = int(self._block_counts[k].sum())
            entry = {
                "index": k, "first_trial": b["first_trial"], "trials": trials,
                "source": b["source"], "fit_first_trial": b["fit_first_trial"],
                "fit_trials": b["fit_trials"], "factors_sha256": factors_digest(pef.factors),
                "max_row_value": pef.max_row_value, "rows_checked": pef.rows_checked,
                "solver_status": str(pef.solver.get("status")),
                "log2_t_block": score if math.isfinite(score) else "-inf",
            }
            if listed:
                entry["factors"] = [[float(v) for v in row] for row in pef.factors]
            out.append(entry)
        return out

    def _analyse(self, block: np.ndarray) -> None:
        from dicert._kernels import count_blocks

        table = self.pef.log2_table
        cnt, or_all = count_blocks(block, SUB_BLOCK)
        if or_all > 31:
            bad = int(np.flatnonzero(block > 31)[0])
            raise ParameterError(f"trial {self.trials_seen + bad}: code {int(block[bad])} is "
                                 "not a trial code (above 31)")
        t32 = table[:32]
        finite = np.isfinite(t32)
        tf = np.where(finite, t32, 0.0)
        forbidden = cnt[:, ~finite].sum(axis=1) > 0
        score = cnt @ tf
        gain = cnt @ np.maximum(tf, 0.0)  # bounds the rise of log2 T inside a sub-block
        s0, _ = _combine(self._prior, self._counts, table)
        if s0 == -math.inf:
            starts = np.full(cnt.shape[0], -np.inf)
        else:
            starts = s0 + np.concatenate([[0.0], np.cumsum(score)[:-1]])
        band = _band(s0 if math.isfinite(s0) else 0.0, block.size, table)
        thr = self.threshold
        cand = (starts + gain >= thr - band) | forbidden
        # Everything before the first candidate sub-block is counted in one go.
        idx = np.flatnonzero(cand)
        done_sub = 0
        for k in idx:
            k = int(k)
            self._counts[:32] += cnt[done_sub:k].sum(axis=0)
            lo, hi = k * SUB_BLOCK, min(block.size, (k + 1) * SUB_BLOCK)
            sub = block[lo:hi]
            hit = _scan_exact(sub, table, self._counts, thr, self._prior)
            if hit >= 0:
                self._counts += np.bincount(sub[: hit + 1], minlength=256)
                self.success_index = self.trials_seen + lo + hit
                self.trials_seen += lo + hit + 1
                return
            self._counts[:32] += cnt[k]
            done_sub = k + 1
            if forbidden[k]:
                # log2 T is now -inf for good: the run can no longer succeed.
                self.trials_seen += hi
                return
        self._counts[:32] += cnt[done_sub:].sum(axis=0)
        self.trials_seen += block.size

    # ------------------------------------------------------------------ result
    # long: the docstring is 15 lines; the body assembles the finite-size result and its
    # details in one place, so the record's fields can be read together
    def result(self, *, complete: bool = True):
        """The :class:`~dicert.finite.result.FiniteSizeResult` of the run so far.

        ``accepted`` only on success. The extractor must then be run on the outcomes (a, b) of
        the analysed trials ``harvest_first_trial .. harvest_last_trial`` (inclusive, 0-based
        trial indices of the log), 2 bits per trial, with min-entropy ``certified_min_entropy_bits`` =
        sigma_target - 1 (the -1 makes the sub-normalised success branch a normalised source
        for any extractor, Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)).

        Under calibration = "adaptive" the details also hold ``blocks``: per block its
        ``index``, ``first_trial``, ``trials``, ``source`` (how its PEF was fixed),
        ``fit_first_trial`` and ``fit_trials`` (the earlier trials it was fitted to),
        ``factors_sha256`` (:func:`factors_digest`), ``max_row_value``, ``rows_checked``,
        ``solver_status``, ``log2_t_block`` (its share of log2 T) and, when the run has at most
        :data:`BLOCK_TABLES_LISTED_MAX` blocks, ``factors``; ``pef`` is the last block's PEF.
        """
        from dicert.finite.result import FiniteSizeResult

        p = self.params
        log2t, allowance = self.log2_t()
        accepted = self.succeeded
        first = p.calibration_trials if p.calibration == "prefix" else 0
        if self.pef is None:
            reason = "fewer trials than the calibration prefix"
        elif accepted:
            reason = "target reached"
        elif self.dead:
            reason = "a trial outside the settings model (factor 0)"
        elif self.analysis_trials >= p.n_max:
            reason = "n_max analysis trials without reaching the target"
        else:
            reason = "log ended before the target was reached"
        if log2t == -math.inf:
            h_now = 0.0
        else:
            h_now = max(0.0, (log2t - allowance - math.log2(1.0 / p.eps_pe)) / p.beta)
        details: dict[str, Any] = {
            "params": p.to_dict(),
            "threshold_log2": self.threshold,
            "log2_t": log2t if math.isfinite(log2t) else "-inf",
            "rounding_allowance_log2": allowance,
            "trials_seen": self.trials_seen,
            "calibration_trials_used": self.calibration_trials,
            "analysis_trials": self.analysis_trials,
            "success_trial_index": self.success_index,
            "harvest_first_trial": first if accepted else None,
            "harvest_last_trial": self.success_index,
            "harvest_bits": 2 * self.analysis_trials if accepted else 0,
            "sigma_target_bits": p.sigma_target_bits,
            "extractor_min_entropy_rule": "sigma_target - 1 (normalised-source extractor)",
            "certified_at_end_bits_info": h_now,
            "outcome": reason,
            "codes_outside_model": self._closed_outside
            + (int(self._counts[~np.isfinite(self.pef.log2_table)].sum())
               if self.pef is not None else 0),
            "pef": None if self.pef is None else self.pef.to_dict(),
            "calibration_box": None if self.calibration_box is None
            else [[float(v) for v in row] for row in self.calibration_box],
            "log_complete": complete,
        }
        if self._adaptive:
            blocks = self._block_records()
            details["blocks_total"] = len(blocks)
            details["block_factor_tables"] = (
                "listed" if len(blocks) <= BLOCK_TABLES_LISTED_MAX else
                f"SHA-256 digests only (more than {BLOCK_TABLES_LISTED_MAX} blocks)")
            details["blocks"] = blocks
        assumptions = [
            "classical side information only (no quantum memory correlated with the devices)",
            box_model(p.model).assumption,
            "the settings of each trial are drawn from the declared distribution (within the "
            "declared bias bounds), independently of the devices, of the adversary and of all "
            "earlier trials, and revealed only at the trial",
            "later settings carry no information about earlier outcomes given earlier settings "
            "and the side information",
            "no trial was dropped or post-selected; the trial definition was fixed in advance",
            "beta, eps_pe, sigma_target, n_max and the calibration rule were fixed before the "
            "analysis trials; the PEF depends only on the calibration trials"
            if not self._adaptive else
            "beta, eps_pe, sigma_target, n_max and the PEF-update rule (calibration = adaptive: "
            "block_trials, initial, fit_window_blocks) were fixed before the analysis trials; "
            "the PEF of each block depends only on the trials before that block",
            "soundness: P(success) x distance(output, uniform) <= eps_pe + eps_ext",
        ]
        return FiniteSizeResult(
            method="pef", side_information="classical", accepted=accepted,
            certified_min_entropy_bits=max(0.0, p.sigma_target_bits - 1.0) if accepted else 0.0,
            eps={"eps_pe": p.eps_pe}, smoothing_eps=0.0, entropy_error=p.eps_pe,
            assumptions=tuple(assumptions), references=REFERENCES, details=details)


def _combine(prior: tuple[float, float] | None, counts: np.ndarray,
             table: np.ndarray) -> tuple[float, float]:
    """(log2 T, allowance) of earlier blocks ``prior`` (their fsum and its allowance) plus the
    current block's counts scored with ``table``; ``prior`` None means no earlier block."""
    s, a = _score(counts, table)
    if prior is None:
        return s, a
    ps, pa = prior
    if s == -math.inf or ps == -math.inf:
        return -math.inf, 0.0
    # One more correctly rounded addition: error below 2^-53 (|ps| + |s|).
    return math.fsum((ps, s)), pa + a + (abs(ps) + abs(s)) * 2.0 ** -52


def factors_digest(factors: Any) -> str:
    """SHA-256 (hex) of a PEF's factor table: the 16 float64 values F[z, c] (z = 2x + y,
    c = 2a + b, row-major) as little-endian IEEE 754 bytes."""
    import hashlib

    f = np.ascontiguousarray(np.asarray(factors, dtype="<f8").reshape(4, 4))
    return hashlib.sha256(f.tobytes()).hexdigest()


def _score(counts: np.ndarray, table: np.ndarray) -> tuple[float, float]:
    """sum_code counts*log2F with fsum, and a bound on its rounding error (both in bits)."""
    nz = np.flatnonzero(counts)
    if nz.size == 0:
        return 0.0, 0.0
    vals = table[nz]
    if np.any(~np.isfinite(vals)):
        return -math.inf, 0.0
    terms = counts[nz].astype(np.float64) * vals
    # Each product has relative error <= 2^-53 (counts < 2^53 are exact) and fsum is correctly
    # rounded; 2^-48 of the absolute sum bounds all of it generously.
    return math.fsum(terms.tolist()), float(np.sum(np.abs(terms))) * 2.0 ** -48 + 1e-300


def _band(s0: float, n: int, table: np.ndarray) -> float:
    """Bound on the drift of a sequential float64 running sum over n terms from s0."""
    finite = table[np.isfinite(table)]
    big = abs(s0) + n * (float(np.max(np.abs(finite))) if finite.size else 0.0)
    return 2.0 * n * 2.0 ** -52 * big + 1e-9


def certify_pef(trials: Any, params: PefParams, design: Any = None, *,
                pef: Pef | None = None):
    """Certify a run from trial codes with a PEF; returns a FiniteSizeResult.

    ``trials`` is a uint8 code array, a LogChunk, or an iterable of either (read lazily; reading
    stops as soon as the outcome is decided).
    """
    acc = PefAccumulator(params, design, pef=pef)
    if isinstance(trials, np.ndarray) or hasattr(trials, "codes"):
        trials = (trials,)
    for chunk in trials:
        acc.update(chunk)
        if acc.done:
            break
    return acc.result()


def certify_pef_counts(counts: Any, params: PefParams, design: Any = None, *,
                       pef: Pef | None = None):
    """Fixed-length variant from counts only ([t,x,y,a,b] array): success iff log2 T_n reaches
    the threshold after all n trials (a fixed stopping time; needs a fixed calibration)."""
    if (params.calibration == "prefix" and pef is None) or params.calibration == "adaptive":
        raise ProtocolError(f"[analysis] key 'calibration': \"{params.calibration}\" needs the "
                            "trial order; certify from the log instead of counts")
    acc = PefAccumulator(params, design, pef=pef)
    c = np.asarray(counts, dtype=np.int64).reshape(-1)
    if c.size != 32 or np.any(c < 0):
        raise ParameterError("counts must be the (2,2,2,2,2) [t,x,y,a,b] array")
    if c.sum() > params.n_max:
        raise ParameterError(f"{int(c.sum())} trials exceed n_max = {params.n_max}")
    acc._counts[:32] = c
    acc.trials_seen = int(c.sum())
    s, allowance = acc.log2_t()
    if s - allowance >= acc.threshold:
        acc.success_index = acc.trials_seen - 1
    res = acc.result()
    return res


# =========================================================================== following a log


# long: on purpose (about 100 lines): one polling generator; header, growth, trailer and idle
# timeout share the file position and the partial trial carried between polls.
def follow_log(path: Any, poll_s: float = 0.5, *, idle_timeout_s: float | None = None,
               chunk_trials: int = 1 << 20, hasher: Any = None,
               sleep: Any = time.sleep, clock: Any = time.monotonic) -> Iterator[np.ndarray]:
    """Yield the complete trials of a growing binary log (``.btl``) as they are appended.

    Reads the header once, then polls every ``poll_s`` seconds for new bytes. Stops at the
    trailer of a streamed log (checking its count), at the header's count of a complete log,
    or after ``idle_timeout_s`` seconds without growth (None: wait for ever). Each yielded array
    holds uint8 trial codes; invalid bytes raise :class:`~dicert.errors.LogFormatError` naming
    the byte offset. ``hasher`` (e.g. ``hashlib.sha256()``) is updated with every byte consumed,
    header and trailer included, so the digest equals the file's once the trailer is read.

    Use with :class:`PefAccumulator`::

        for codes in follow_log(path, 1.0):
            if acc.update(codes) or acc.done:
                break
    """
    from pathlib import Path

    from dicert.errors import LogFormatError
    from dicert.logs import (
        BINARY_HEADER,
        BINARY_HEADER_SIZE,
        BINARY_MAGIC,
        BINARY_VERSION,
        COUNT_STREAMED,
        FLAG_HAS_T,
        TRAILER,
        TRAILER_MARK,
    )

    path = Path(path)
    last_growth = clock()
    with open(path, "rb") as fh:
        head = b""
        while len(head) < BINARY_HEADER_SIZE:
            more = fh.read(BINARY_HEADER_SIZE - len(head))
            if more:
                head += more
                last_growth = clock()
                continue
            if idle_timeout_s is not None and clock() - last_growth > idle_timeout_s:
                raise LogFormatError(path, f"byte offset {len(head)}",
                                     "truncated header (24 bytes expected)")
            sleep(poll_s)
        magic, version, flags, reserved, count = BINARY_HEADER.unpack(head)
        if magic != BINARY_MAGIC:
            raise LogFormatError(path, "byte offset 0", "wrong magic bytes: not a dicert binary "
                                 "trial log (follow mode needs the binary format)")
        if version != BINARY_VERSION:
            raise LogFormatError(path, "byte offset 8", f"unsupported format version {version}")
        if flags & ~FLAG_HAS_T or any(reserved):
            raise LogFormatError(path, "byte offset 9", "reserved header bits or bytes set")
        if hasher is not None:
            hasher.update(head)
        mask = 0x1F if flags & FLAG_HAS_T else 0x0F
        streamed = count == COUNT_STREAMED
        seen = 0
        offset = BINARY_HEADER_SIZE
        while True:
            want = chunk_trials if streamed else min(chunk_trials, count - seen)
            if not streamed and want == 0:
                return
            data = fh.read(want)
            if not data:
                if idle_timeout_s is not None and clock() - last_growth > idle_timeout_s:
                    return
                sleep(poll_s)
                continue
            last_growth = clock()
            codes = np.frombuffer(data, dtype=np.uint8)
            bad = np.flatnonzero(codes & ~np.uint8(mask))
            end = codes.size
            trailer = None
            if bad.size:
                k = int(bad[0])
                if not (streamed and codes[k] == TRAILER_MARK):
                    raise LogFormatError(path, f"byte offset {offset + k}",
                                         f"invalid trial byte 0x{int(codes[k]):02x}")
                end = k
                trailer = data[k:]
            if end:
                if hasher is not None:
                    hasher.update(data[:end])
                seen += end
                offset += end
                yield codes[:end].copy()
            if trailer is not None:
                while len(trailer) < TRAILER.size:
                    more = fh.read(TRAILER.size - len(trailer))
                    if more:
                        trailer += more
                        continue
                    if idle_timeout_s is not None and clock() - last_growth > idle_timeout_s:
                        raise LogFormatError(path, f"byte offset {offset}", "truncated trailer")
                    sleep(poll_s)
                _, n_trailer = TRAILER.unpack(trailer[:TRAILER.size])
                if n_trailer != seen or len(trailer) > TRAILER.size or fh.read(1):
                    raise LogFormatError(path, f"byte offset {offset}",
                                         f"trailer says {n_trailer} trials but the file holds "
                                         f"{seen}, or bytes follow the trailer")
                if hasher is not None:
                    hasher.update(trailer)
                return
