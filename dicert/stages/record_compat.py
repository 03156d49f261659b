"""Reading records of earlier formats: the one place that maps the member names of a
``dicert-record/1``, ``/2`` or ``/3`` record to today's (``dicert-record/4``) vocabulary.

``dicert-record/3`` renamed record members so that each quantity has one name (see the
README's glossary): :data:`RENAMED` lists every member moved since ``/1`` and ``/2``,
:func:`upgrade_body` applies it (and rebuilds the error budget) to a record body.
``dicert-record/4`` gave ``estimate.chsh_estimate`` its glossary meaning, the weighted
(martingale) estimate that the lower bound belongs to; ``/3`` had written the ratio estimate
under that name and the weighted one as ``chsh_martingale`` (:data:`RENAMED_FROM_3`). The record's digest and signature are always
checked on the record as written; only the numbers are then compared under today's names.
verify, ``verify --chain``, ``report``, ``publish`` and the demo read records through
:func:`upgrade_body`; the beacon site's browser checker needs only the digest members, whose
names did not change.
"""

from __future__ import annotations

import copy
import math
from collections.abc import Mapping
from typing import Any

#: Record format written today.
CURRENT_FORMAT = "dicert-record/4"

#: Members moved since dicert-record/1 and /2: old dotted path -> new name (same parent).
#: Paths under ``estimate_blocks.blocks`` apply to every block.
RENAMED = {
    "estimate.chsh": "chsh_ratio_estimate",
    "estimate.chsh_martingale": "chsh_estimate",
    "estimate.chsh_lower": "chsh_lower_bound",
    "estimate.eps": "eps_est",
    "estimate.test_trials": "test_rounds",
    "estimate_blocks.blocks.chsh": "chsh_estimate",
    "estimate_blocks.blocks.chsh_lower": "chsh_lower_bound",
    "estimate_blocks.blocks.chsh_upper": "chsh_upper_bound",
    "entropy.single_round.min_entropy_per_round_at_chsh":
        "single_round_bound_bits_at_chsh_ratio_estimate",
    "entropy.single_round.min_entropy_per_round_at_chsh_lower":
        "single_round_bound_bits_at_chsh_lower_bound",
    "entropy.single_round.von_neumann_per_round_at_chsh":
        "von_neumann_bound_bits_at_chsh_ratio_estimate",
    "entropy.single_round.von_neumann_per_round_at_chsh_lower":
        "von_neumann_bound_bits_at_chsh_lower_bound",
    "entropy.finite_size.min_entropy_bits": "certified_min_entropy_bits",
    "entropy.finite_size.eps": "error_parameters",
    "entropy.finite_size.details.harvest_rounds": "harvest_select",
    "harvest.rounds": "select",
    "log.scope": "coverage",
    "extractor.seed_bits_used": "seed_bits",
}

#: Members moved by dicert-record/4, applied to a /3 record in this order (the ratio estimate
#: first leaves ``chsh_estimate`` free for the weighted one).
RENAMED_FROM_3 = {
    "estimate.chsh_estimate": "chsh_ratio_estimate",
    "estimate.chsh_martingale": "chsh_estimate",
    "entropy.single_round.single_round_bound_bits_at_chsh_estimate":
        "single_round_bound_bits_at_chsh_ratio_estimate",
    "entropy.single_round.von_neumann_bound_bits_at_chsh_estimate":
        "von_neumann_bound_bits_at_chsh_ratio_estimate",
}

#: Members a record of an earlier format lacks (recomputed values verify leaves out for it):
#: the single-round values at the weighted estimate, added by /4.
ADDED_BY_4 = ("entropy.single_round.single_round_bound_bits_at_chsh_estimate",
              "entropy.single_round.von_neumann_bound_bits_at_chsh_estimate")

#: Texts the record states in words: what /1 and /2 wrote -> what /3 writes (no number moves).
SINGLE_ROUND_NOTE = ("informational values at the estimated CHSH value; the certified quantity "
                     "is entropy.finite_size.certified_min_entropy_bits")
LEGACY_SINGLE_ROUND_NOTE = ("informational values at the estimated CHSH value; the certified "
                            "quantity is entropy.finite_size.min_entropy_bits")
HARVEST_ORDER = (
    "trials in log order; select 'all' = every trial, 'generation' = trials with t = 0; per "
    "trial a (parties A) or a then b (parties AB); packed big-endian with numpy.packbits "
    "(first bit = MSB of byte 0), last byte zero-padded; raw_sha256 is over the packed bytes")
LEGACY_HARVEST_ORDER = (
    "trials in log order; rounds 'all' = every trial, 'generation' = trials with t = 0; per "
    "trial a (parties A) or a then b (parties AB); packed big-endian with numpy.packbits "
    "(first bit = MSB of byte 0), last byte zero-padded; raw_sha256 is over the packed bytes")
BUDGET_MEANING = ("soundness error: the sum of the terms; P(accept) x distance from ideal of "
                  "(output, seed, settings, side information) <= total")
LEGACY_TEXT = {LEGACY_SINGLE_ROUND_NOTE: SINGLE_ROUND_NOTE, LEGACY_HARVEST_ORDER: HARVEST_ORDER}

#: What each error term is, by protocol key (the error budget's ``meaning``).
TERM_MEANINGS = {
    "eps_est": "error of the CHSH estimate's confidence bound (martingale, Azuma-Hoeffding)",
    "eps_ea": "entropy accumulation: floor on the acceptance probability",
    "eps_s": "smoothing parameter of the min-entropy (purified distance)",
    "eps_pe": "error of the probability estimate",
    "eps_ext": "extractor error (leftover hash lemma, Toeplitz hashing)",
}
#: The second eps_s term: a purified-distance smoothing costs 2 eps_s in trace distance.
SECOND_SMOOTHING = ("smoothing again: the leftover hash lemma applied to the smooth "
                    "min-entropy costs 2 eps_s in trace distance (Tomamichel, Schaffner, Smith "
                    "& Renner, IEEE Trans. Inf. Theory 57, 5524 (2011))")


def budget_terms(error_parameters: Mapping[str, float], smoothing_eps: float,
                 eps_ext: float) -> list[dict]:
    """The error budget's terms, named by their protocol keys (sorted, then ``eps_ext``).

    Every term of the soundness error entropy_error + 2 smoothing_eps + eps_ext appears: the
    method's parameters (the smoothing parameter ``eps_s`` twice), then ``eps_ext``.
    """
    terms = []
    for name, value in sorted(error_parameters.items()):  # records hold members sorted
        terms.append({"name": str(name), "value": float(value),
                      "meaning": TERM_MEANINGS.get(str(name), "error parameter of the method")})
        if name == "eps_s" and float(smoothing_eps) > 0.0:
            terms.append({"name": "eps_s", "value": float(value), "meaning": SECOND_SMOOTHING})
    terms.append({"name": "eps_ext", "value": float(eps_ext), "meaning": TERM_MEANINGS["eps_ext"]})
    return terms


def error_budget(error_parameters: Mapping[str, float], smoothing_eps: float, eps_ext: float,
                 total: float) -> dict:
    """The record's ``error_budget``; refuses a total its terms do not sum to."""
    terms = budget_terms(error_parameters, smoothing_eps, eps_ext)
    s = math.fsum(t["value"] for t in terms)
    if not math.isclose(s, float(total), rel_tol=1e-12, abs_tol=0.0):
        raise ValueError(f"error budget: the terms sum to {s!r}, the total is {total!r}")
    return {"terms": terms, "total": float(total), "meaning": BUDGET_MEANING}


def _move(d: Any, path: list[str], new: str) -> None:
    """Rename the member at ``path`` (a list of keys) to ``new``, in place, if present."""
    if not isinstance(d, dict):
        return
    head, rest = path[0], path[1:]
    if not rest:
        if head in d and new not in d:
            d[new] = d.pop(head)
        return
    sub = d.get(head)
    if isinstance(sub, list):
        for item in sub:
            _move(item, rest, new)
    else:
        _move(sub, rest, new)


def _legacy_budget(body: dict) -> None:
    """``eps`` = {terms: {name: value}, smoothing_eps, entropy_error, total, form} ->
    ``error_budget`` and ``soundness_error``. Duplicates that disagree with the finite-size
    section are kept (so that the comparison with the recomputation names them)."""
    eps = body.pop("eps", None)
    if not isinstance(eps, dict):
        return
    fs = body.get("entropy", {}).get("finite_size", {}) if isinstance(
        body.get("entropy"), dict) else {}
    terms = eps.get("terms")
    params = fs.get("error_parameters") if isinstance(fs, dict) else None
    budget: dict[str, Any]
    try:
        eps_ext = terms["eps_ext"]
        budget = {"terms": budget_terms(params, eps.get("smoothing_eps", 0.0), eps_ext),
                  "total": eps.get("total"), "meaning": BUDGET_MEANING}
        if {k: v for k, v in terms.items() if k != "eps_ext"} != dict(params):
            budget["legacy_terms"] = terms
    except (KeyError, TypeError, AttributeError, ValueError):
        budget = {"legacy": eps}  # malformed: compared as is, and refused there
    else:
        for k in ("smoothing_eps", "entropy_error"):
            if not isinstance(fs, dict) or eps.get(k) != fs.get(k):
                budget[f"legacy_{k}"] = eps.get(k)
    body["error_budget"] = budget
    body["soundness_error"] = eps.get("total")


def drop_added_members(expected: dict, fmt: Any) -> None:
    """Remove from a recomputed body (in place) the members a record of format ``fmt`` lacks
    because a later format added them (:data:`ADDED_BY_4`)."""
    if fmt == CURRENT_FORMAT:
        return
    for dotted in ADDED_BY_4:
        parent, _, leaf = dotted.rpartition(".")
        sub: Any = expected
        for part in parent.split("."):
            sub = sub.get(part) if isinstance(sub, dict) else None
        if isinstance(sub, dict):
            sub.pop(leaf, None)


def upgrade_body(record: Mapping[str, Any]) -> dict:
    """A record (or body) of any supported format, with today's member names.

    ``format`` stays as written (verify says what older formats lack); a ``dicert-record/4``
    record is returned as a copy, unchanged.
    """
    body = copy.deepcopy(dict(record))
    if body.get("format") == CURRENT_FORMAT:
        return body
    if body.get("format") == "dicert-record/3":
        for old, new in RENAMED_FROM_3.items():
            _move(body, old.split("."), new)
        return body
    for old, new in RENAMED.items():
        _move(body, old.split("."), new)
    _legacy_budget(body)
    sr = body.get("entropy", {}).get("single_round") if isinstance(body.get("entropy"), dict) \
        else None
    if isinstance(sr, dict) and sr.get("note") in LEGACY_TEXT:
        sr["note"] = LEGACY_TEXT[sr["note"]]
    hv = body.get("harvest")
    if isinstance(hv, dict) and hv.get("order") in LEGACY_TEXT:
        hv["order"] = LEGACY_TEXT[hv["order"]]
    return body


__all__ = ["ADDED_BY_4", "CURRENT_FORMAT", "RENAMED", "RENAMED_FROM_3", "budget_terms",
           "drop_added_members",
           "error_budget", "upgrade_body"]
