"""Probability estimation factors (PEFs): certified randomness from small Bell violations.

A PEF with power ``beta`` for a model ``Pi`` of trial distributions is a non-negative function
``F(c, z)`` of the outcome pair ``c = 2a + b`` and the settings pair ``z = 2x + y`` with

    sum_{c,z} F(c,z) nu(c,z) nu(c|z)^beta <= 1        for every nu in Pi.

The running product ``T`` of PEFs over the analysis trials gives, for any stopping time, the
probability estimate ``P(nu(C|Z,e) >= (eps T)^(-1/beta)) <= eps``; a run *succeeds* at the first
trial where ``log2 T >= beta * sigma_target + log2(1/eps_PE)``, and then the outcomes of the
analysis trials up to that one carry ``sigma_target`` bits of min-entropy (classical side
information), with soundness stated as ``P(success) x distance <= eps_PE + eps_ext``.

This package has four layers, one module each, from primitives to the one-call recipe
(:mod:`~dicert.finite.pef.params` holds the protocol-fixed parameters):

- ``models``: the vertices of the no-signalling polytope (24) and of the polytope cut from it
  by the eight Tsirelson bounds (80), and settings models (uniform, biased product, spot-checking,
  bias-bounded boxes of settings distributions);
- ``construction`` (and validation): :func:`build_pef` solves the exponential-cone program
  for the best PEF at an anticipated distribution and then *makes it valid* independently of
  the solver: every vertex row is evaluated in float64, ``F`` is rescaled, mixed with the
  trivial PEF, shrunk by a margin and finally re-checked in 40-digit arithmetic against the
  exact vertex entries;
- ``accumulation`` (and streaming): :class:`PefAccumulator` scores a stream of trial codes
  (one table look-up per trial, exact first-crossing index), :func:`follow_log` reads a
  growing log, :func:`certify_pef` wraps the accumulator into the shared
  :class:`~dicert.finite.result.FiniteSizeResult`; the PEF is fixed once (calibration
  "prefix", "isotropic", "table") or re-fitted before every block of trials from the earlier
  trials only (calibration "adaptive", which follows drifting conditions);
- ``planning``: :func:`plan_pef` (beta by grid search, expected trials, completeness), plus the
  diagnostics :func:`asymptotic_rate` (h_inf) and :func:`statistical_strength` (D_LR).

Conventions: the trial code is ``(t<<4)|(x<<3)|(y<<2)|(a<<1)|b``; within one test flag ``t``
the code is ``4z + c``. Boxes are arrays ``nu[z, c] = nu(c|z)`` of shape (4, 4). All logs are
base 2 (bits).

References
----------
.. [1] E. Knill, Y. Zhang, P. Bierhorst, "Generation of quantum randomness by probability
   estimation with classical side information", Phys. Rev. Research 2, 033465 (2020),
   arXiv:1709.06159.
.. [2] Y. Zhang, E. Knill, P. Bierhorst, "Certifying quantum randomness by probability
   estimation", Phys. Rev. A 98, 040304(R) (2018).
.. [3] P. Bierhorst, Y. Zhang, "Tsirelson polytopes and randomness generation",
   arXiv:2003.12636 (2020).
.. [4] W. van Dam, R. D. Gill, P. D. Grunwald, "The statistical strength of nonlocality
   proofs", IEEE Trans. Inf. Theory 51, 2812 (2005).
.. [5] J. Ville, "Etude critique de la notion de collectif", Gauthier-Villars (1939)
   (maximal inequality for non-negative supermartingales).
"""

from __future__ import annotations

from dicert.finite.pef.models import (  # noqa: F401
    BLOCK_TABLES_LISTED_MAX,
    BoxModel,
    CALIBRATIONS,
    DEFAULT_BLOCK_TRIALS,
    INITIAL_RULES,
    LN2,
    MODELS,
    REFERENCES,
    ROW_CHECK_SLACK,
    ROW_MARGIN,
    SQRT2,
    SettingsModel,
    _EXACT_FLOATS,
    _EXACT_NAMES,
    _as_box,
    _box_affine,
    _check_bias,
    _check_prob,
    _corners,
    _exact_mp,
    _model_is_consistent,
    _snap,
    _solve,
    box_from_chsh,
    box_model,
    chsh_functionals,
    counts_by_setting,
    fit_box,
    isotropic_box,
    local_deterministic_boxes,
    pr_boxes,
    product_settings,
    settings_from_design,
    spot_settings,
    tsirelson_box,
    uniform_settings,
)
from dicert.finite.pef.construction import (  # noqa: F401
    Pef,
    _log2_table,
    _moments,
    _row_max_mp,
    build_pef,
    make_valid,
    optimal_factors,
    pef_rows,
    trivial_pef,
    validate_pef,
)
from dicert.finite.pef.params import (  # noqa: F401
    ADAPTIVE_KEYS,
    PefParams,
    SUB_BLOCK,
)
from dicert.finite.pef.accumulation import (  # noqa: F401
    PefAccumulator,
    _band,
    _combine,
    _scan_exact,
    _score,
    certify_pef,
    certify_pef_counts,
    factors_digest,
    follow_log,
)
from dicert.finite.pef.planning import (  # noqa: F401
    PefPlan,
    __all__,
    _entropy_bits,
    asymptotic_rate,
    completeness_probability,
    plan_pef,
    statistical_strength,
    trials_for_probability,
)

__all__ = [
    "ADAPTIVE_KEYS",
    "BLOCK_TABLES_LISTED_MAX",
    "BoxModel",
    "CALIBRATIONS",
    "DEFAULT_BLOCK_TRIALS",
    "INITIAL_RULES",
    "LN2",
    "MODELS",
    "Pef",
    "PefAccumulator",
    "PefParams",
    "PefPlan",
    "REFERENCES",
    "ROW_CHECK_SLACK",
    "ROW_MARGIN",
    "SQRT2",
    "SUB_BLOCK",
    "SettingsModel",
    "asymptotic_rate",
    "box_from_chsh",
    "box_model",
    "build_pef",
    "certify_pef",
    "certify_pef_counts",
    "chsh_functionals",
    "completeness_probability",
    "counts_by_setting",
    "factors_digest",
    "fit_box",
    "follow_log",
    "isotropic_box",
    "local_deterministic_boxes",
    "make_valid",
    "optimal_factors",
    "pef_rows",
    "plan_pef",
    "pr_boxes",
    "product_settings",
    "settings_from_design",
    "spot_settings",
    "statistical_strength",
    "trials_for_probability",
    "trivial_pef",
    "tsirelson_box",
    "uniform_settings",
    "validate_pef",
]
