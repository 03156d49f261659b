"""Probability estimation factors (PEFs): certified randomness from small Bell violations.

A PEF with power ``beta`` for a model ``Pi`` of trial distributions is a non-negative function
``F(c, z)`` of the outcome pair ``c = 2a + b`` and the settings pair ``z = 2x + y`` with

    sum_{c,z} F(c,z) nu(c,z) nu(c|z)^beta <= 1        for every nu in Pi.

The running product ``T`` of PEFs over the analysis trials gives, for any stopping time, the
probability estimate ``P(nu(C|Z,e) >= (eps T)^(-1/beta)) <= eps``; a run *succeeds* at the first
trial where ``log2 T >= beta * sigma_target + log2(1/eps_PE)``, and then the outcomes of the
analysis trials up to that one carry ``sigma_target`` bits of min-entropy (classical side
information), with soundness stated as ``P(success) x distance <= eps_PE + eps_ext``.

This module has four layers, from primitives to the one-call recipe:

- models: the vertices of the no-signalling polytope (24) and of the polytope cut from it by the
  eight Tsirelson bounds (80), and settings models (uniform, biased product, spot-checking,
  bias-bounded boxes of settings distributions);
- construction: :func:`build_pef` solves the exponential-cone program for the best PEF at an
  anticipated distribution and then *makes it valid* independently of the solver: every vertex
  row is evaluated in float64, ``F`` is rescaled, mixed with the trivial PEF, shrunk by a margin
  and finally re-checked in 40-digit arithmetic against the exact vertex entries;
- certification: :class:`PefAccumulator` scores a stream of trial codes (one table look-up per
  trial, exact first-crossing index), :func:`certify_pef` wraps it into the shared
  :class:`~dicert.finite.result.FiniteSizeResult`; the PEF is fixed once (calibration
  "prefix", "isotropic", "table") or re-fitted before every block of trials from the earlier
  trials only (calibration "adaptive", which follows drifting conditions);
- planning: :func:`plan_pef` (beta by grid search, expected trials, completeness), plus the
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

import dataclasses
import functools
import itertools
import math
import time
import warnings
from collections.abc import Iterable, Iterator, Mapping
from typing import Any

import numpy as np

from dicert.errors import ParameterError, ProtocolError, SolverError

SQRT2 = math.sqrt(2.0)
LN2 = math.log(2.0)

#: Box models: no-signalling polytope, or the polytope cut from it by the Tsirelson bounds.
MODELS = ("ns", "tsirelson")
#: How the anticipated distribution (and hence the PEF) is fixed before the analysis trials;
#: "adaptive" re-fits it before every block of analysis trials from all earlier trials.
CALIBRATIONS = ("prefix", "isotropic", "table", "adaptive")
#: The PEF of the first block under calibration = "adaptive": the trivial PEF F = 1 (the first
#: block only trains the next one), or one built for an anticipated isotropic box or table.
INITIAL_RULES = ("trivial", "isotropic", "table")
#: Default block length of calibration = "adaptive". One re-fit (maximum-likelihood box plus a
#: validated PEF) costs ~30-100 ms while scoring runs at several hundred M trials/s, so blocks of
#: 10^7 trials keep the amortised rate above 100 M trials/s (see dicert.benchmarks.pef).
DEFAULT_BLOCK_TRIALS = 10_000_000
#: Under calibration = "adaptive" the result lists every block's factor table when the run
#: has at most this many blocks; beyond it only the tables' SHA-256 digests are listed.
BLOCK_TABLES_LISTED_MAX = 64

#: Margin by which every vertex row of a produced PEF stays below 1 (relative). The float64
#: evaluation of a row of 16 non-negative terms is accurate to ~1e-15, and the settings
#: probabilities are declared floats; 1e-12 covers both with three orders of magnitude to spare.
ROW_MARGIN = 1e-12
#: Every row must be <= 1 - ROW_CHECK_SLACK in the 40-digit re-check.
ROW_CHECK_SLACK = 1e-13

REFERENCES = (
    "E. Knill, Y. Zhang, P. Bierhorst, Phys. Rev. Research 2, 033465 (2020), arXiv:1709.06159",
    "Y. Zhang, E. Knill, P. Bierhorst, Phys. Rev. A 98, 040304(R) (2018)",
)

# Exact entries of the model vertices, indexed by a small integer code (see _VALUE_CODES).
_EXACT_NAMES = ("0", "1/2", "1", "(sqrt2-1)/2", "2-sqrt2", "(3-sqrt2)/2")
_EXACT_FLOATS = np.array([0.0, 0.5, 1.0, (SQRT2 - 1.0) / 2.0, 2.0 - SQRT2, (3.0 - SQRT2) / 2.0])


def _exact_mp(mp):
    r2 = mp.sqrt(2)
    return [mp.mpf(0), mp.mpf(1) / 2, mp.mpf(1), (r2 - 1) / 2, 2 - r2, (3 - r2) / 2]


# =========================================================================== box models


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BoxModel:
    """A polytope of 2-input 2-output boxes given by its vertices.

    ``vertices[k, z, c]`` is nu_k(c|z); ``codes`` holds the same entries as indices into the
    exact values ``0, 1/2, 1, (sqrt2-1)/2, 2-sqrt2, (3-sqrt2)/2`` (used by the high-precision
    validity check).
    """

    name: str
    vertices: np.ndarray
    codes: np.ndarray
    assumption: str

    @property
    def n_vertices(self) -> int:
        return int(self.vertices.shape[0])


def local_deterministic_boxes() -> np.ndarray:
    """The 16 local deterministic boxes, shape (16, 4, 4), indexed by (a0, a1, b0, b1)."""
    out = np.zeros((16, 4, 4))
    for k, (a0, a1, b0, b1) in enumerate(itertools.product((0, 1), repeat=4)):
        a, b = (a0, a1), (b0, b1)
        for x, y in itertools.product((0, 1), repeat=2):
            out[k, 2 * x + y, 2 * a[x] + b[y]] = 1.0
    return out


def pr_boxes() -> np.ndarray:
    """The 8 PR boxes, shape (8, 4, 4): 1/2 where a^b = xy ^ al*x ^ be*y ^ ga, indexed (al,be,ga)."""
    out = np.zeros((8, 4, 4))
    for k, (al, be, ga) in enumerate(itertools.product((0, 1), repeat=3)):
        for x, y, a, b in itertools.product((0, 1), repeat=4):
            if (a ^ b) == ((x * y) ^ (al * x) ^ (be * y) ^ ga):
                out[k, 2 * x + y, 2 * a + b] = 0.5
    return out


def _box_affine() -> tuple[np.ndarray, np.ndarray]:
    """Affine map theta (8) -> p (16) covering the no-signalling subspace.

    theta = (P(a=1|x=0), P(a=1|x=1), P(b=1|y=0), P(b=1|y=1), P(11|xy) for z = 0..3).
    """
    m = np.zeros((16, 8))
    c0 = np.zeros(16)
    for x, y in itertools.product((0, 1), repeat=2):
        z = 2 * x + y
        j = 4 + z
        m[4 * z + 3, j] = 1.0
        m[4 * z + 2, x] = 1.0
        m[4 * z + 2, j] = -1.0
        m[4 * z + 1, 2 + y] = 1.0
        m[4 * z + 1, j] = -1.0
        m[4 * z + 0, [x, 2 + y]] = -1.0
        m[4 * z + 0, j] = 1.0
        c0[4 * z] = 1.0
    return m, c0


def chsh_functionals() -> np.ndarray:
    """The 8 CHSH expressions as weights on p(ab|xy), shape (8, 4, 4).

    Row 2k + (0|1) is +/-(sum_z E_z - 2 E_k), E_z the correlator of settings z.
    """
    corr = np.array([1.0, -1.0, -1.0, 1.0])
    out = np.zeros((8, 4, 4))
    for k in range(4):
        for i, sig in enumerate((1.0, -1.0)):
            for z in range(4):
                out[2 * k + i, z] = sig * (-1.0 if z == k else 1.0) * corr
    return out


def _snap(values: np.ndarray) -> np.ndarray:
    diff = np.abs(values[..., None] - _EXACT_FLOATS)
    idx = np.argmin(diff, axis=-1)
    if float(np.max(np.min(diff, axis=-1))) > 1e-7:
        raise SolverError("vertex enumeration produced an entry outside the expected exact set")
    return idx


@functools.cache
def box_model(name: str) -> BoxModel:
    """The box model ``"ns"`` (24 vertices) or ``"tsirelson"`` (80 vertices).

    The Tsirelson polytope is NS intersected with the eight constraints CHSH <= 2 sqrt 2; its
    vertices are enumerated with Qhull's half-space intersection and snapped to the exact values
    0, (sqrt2-1)/2, 2-sqrt2, (3-sqrt2)/2, 1 (the list in the methods note); each snapped vertex
    is then re-checked (no-signalling, positivity, every CHSH bound) and the count must be 80.

    References
    ----------
    .. [1] P. Bierhorst, Y. Zhang, arXiv:2003.12636 (2020).
    """
    if name == "ns":
        verts = np.concatenate([local_deterministic_boxes(), pr_boxes()])
        return BoxModel(name="ns", vertices=verts, codes=_snap(verts),
                        assumption="the devices obey no-signalling (a box in the no-signalling "
                                   "polytope, 24 vertices) in every trial given the past")
    if name == "tsirelson":
        from scipy.spatial import HalfspaceIntersection

        m, c0 = _box_affine()
        halfspaces = [np.hstack([-m, -c0[:, None]])]  # p >= 0
        for w in chsh_functionals().reshape(8, 16):
            halfspaces.append(np.hstack([w @ m, [w @ c0 - 2.0 * SQRT2]])[None, :])
        hs = HalfspaceIntersection(np.vstack(halfspaces), np.array([0.5] * 4 + [0.25] * 4))
        boxes = np.clip(hs.intersections @ m.T + c0, 0.0, None)
        codes = np.unique(_snap(boxes.reshape(-1, 4, 4)).reshape(-1, 16), axis=0)
        codes = codes.reshape(-1, 4, 4)
        verts = _EXACT_FLOATS[codes]
        if verts.shape[0] != 80 or not _model_is_consistent(codes):
            raise SolverError(f"Tsirelson polytope enumeration gave {verts.shape[0]} vertices, "
                              "expected 80")
        return BoxModel(name="tsirelson", vertices=verts, codes=codes,
                        assumption="the devices are quantum (every trial's box lies in the "
                                   "no-signalling polytope cut by the Tsirelson bounds, 80 "
                                   "vertices) given the past; side information stays classical")
    raise ParameterError(f"model must be one of {MODELS}, got {name!r}")


def _model_is_consistent(codes: np.ndarray) -> bool:
    """Check snapped vertices exactly (40 digits): normalised, no-signalling, CHSH <= 2 sqrt 2."""
    import mpmath

    with mpmath.workdps(40):
        vals = _exact_mp(mpmath.mp)
        chsh = chsh_functionals()
        bound = 2 * mpmath.sqrt(2) + mpmath.mpf(10) ** -30
        tol = mpmath.mpf(10) ** -30
        for v in codes:
            p = [[vals[int(v[z, c])] for c in range(4)] for z in range(4)]
            for z in range(4):
                if abs(mpmath.fsum(p[z]) - 1) > tol:
                    return False
            for x in range(2):  # Alice's marginal independent of y
                for a in range(2):
                    m0 = p[2 * x][2 * a] + p[2 * x][2 * a + 1]
                    m1 = p[2 * x + 1][2 * a] + p[2 * x + 1][2 * a + 1]
                    if abs(m0 - m1) > tol:
                        return False
            for y in range(2):
                for b in range(2):
                    m0 = p[y][b] + p[y][2 + b]
                    m1 = p[2 + y][b] + p[2 + y][2 + b]
                    if abs(m0 - m1) > tol:
                        return False
            for w in chsh:
                s = mpmath.fsum(int(w[z, c]) * p[z][c] for z in range(4) for c in range(4))
                if s > bound:
                    return False
    return True


# =========================================================================== settings


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SettingsModel:
    """The settings distribution(s) a PEF must be valid for.

    ``vertices`` (K, 4): the settings distributions s(z) at the corners of the allowed set
    (K = 1 when it is known exactly); the PEF inequality is checked at every (settings vertex,
    box vertex) pair, which suffices because the left side is multilinear in the settings
    parameters and convex in the box. ``nominal`` (4,) is the distribution used for the
    objective and for planning. ``allowed`` (2, 4) says which (test flag t, z) combinations the
    protocol can produce; a trial outside them gets factor 0 (the run can then never succeed).
    """

    kind: str
    vertices: np.ndarray
    nominal: np.ndarray
    allowed: np.ndarray
    description: dict

    def to_dict(self) -> dict:
        return {"kind": self.kind, **self.description,
                "vertices": [[float(v) for v in row] for row in self.vertices],
                "nominal": [float(v) for v in self.nominal]}


def _check_prob(name: str, val: float) -> float:
    val = float(val)
    if not (0.0 < val < 1.0) or not math.isfinite(val):
        raise ParameterError(f"{name} must lie in (0, 1), got {val!r}")
    return val


def _check_bias(name: str, bias: float, p: float) -> float:
    bias = float(bias)
    if not (0.0 <= bias < min(p, 1.0 - p)) or not math.isfinite(bias):
        raise ParameterError(f"{name} must lie in [0, {min(p, 1 - p):g}), got {bias!r}")
    return bias


def _corners(p: float, bias: float) -> tuple[float, ...]:
    return (p,) if bias == 0.0 else (p - bias, p + bias)


def spot_settings(q: float = 1.0, generation: tuple[int, int] = (0, 0), *, p_x0: float = 0.5,
                  p_y0: float = 0.5, bias_x: float = 0.0, bias_y: float = 0.0) -> SettingsModel:
    """Spot-checking settings: test round with probability q, test settings a biased product.

    s(z) = (1 - q)[z = generation] + q sA(x) sB(y), with sA(0) in [p_x0 - bias_x, p_x0 + bias_x]
    and sB(0) likewise (bias-bounded, partly known settings). q = 1 gives (biased) product
    settings; q = 1 with p = 1/2 and zero bias gives uniform settings.
    """
    q = float(q)
    if not (0.0 < q <= 1.0) or not math.isfinite(q):
        raise ParameterError(f"q (test-round probability) must lie in (0, 1], got {q!r}")
    p_x0, p_y0 = _check_prob("p_x0", p_x0), _check_prob("p_y0", p_y0)
    bias_x, bias_y = _check_bias("bias_x", bias_x, p_x0), _check_bias("bias_y", bias_y, p_y0)
    gen = (int(generation[0]), int(generation[1]))
    if gen not in ((0, 0), (0, 1), (1, 0), (1, 1)):
        raise ParameterError(f"generation settings must be a pair of bits, got {generation!r}")
    z0 = 2 * gen[0] + gen[1]

    def dist(pa: float, pb: float) -> np.ndarray:
        s = q * np.outer([pa, 1.0 - pa], [pb, 1.0 - pb]).ravel()
        s[z0] += 1.0 - q
        return s

    verts = np.array([dist(pa, pb) for pa in _corners(p_x0, bias_x)
                      for pb in _corners(p_y0, bias_y)])
    allowed = np.zeros((2, 4), dtype=bool)
    allowed[1, :] = True
    if q < 1.0:
        allowed[0, z0] = True
    if q == 1.0 and p_x0 == 0.5 and p_y0 == 0.5 and bias_x == 0.0 and bias_y == 0.0:
        kind = "uniform"
    elif q == 1.0:
        kind = "product"
    else:
        kind = "spot-checking"
    desc = {"q": q, "generation": list(gen), "p_x0": p_x0, "p_y0": p_y0, "bias_x": bias_x,
            "bias_y": bias_y}
    return SettingsModel(kind=kind, vertices=verts, nominal=dist(p_x0, p_y0), allowed=allowed,
                         description=desc)


def uniform_settings() -> SettingsModel:
    """Uniform settings s(z) = 1/4, every trial a test trial."""
    return spot_settings(1.0)


def product_settings(p_x0: float, p_y0: float, *, bias_x: float = 0.0,
                     bias_y: float = 0.0) -> SettingsModel:
    """Biased product settings s(x, y) = sA(x) sB(y), optionally only known to within a bias."""
    return spot_settings(1.0, p_x0=p_x0, p_y0=p_y0, bias_x=bias_x, bias_y=bias_y)


def settings_from_design(design: Any, *, p_x0: float = 0.5, p_y0: float = 0.5,
                         bias_x: float = 0.0, bias_y: float = 0.0) -> SettingsModel:
    """The settings model of a :class:`dicert.estimate.SettingsDesign` (gamma, generation)."""
    gamma = 1.0 if design is None else float(design.gamma)
    gen = (0, 0) if design is None else tuple(design.generation)
    return spot_settings(gamma, gen, p_x0=p_x0, p_y0=p_y0, bias_x=bias_x, bias_y=bias_y)


# =========================================================================== distributions


def tsirelson_box() -> np.ndarray:
    """The Tsirelson box rho(ab|xy) = (1 + (-1)^(a+b+xy)/sqrt2)/4, shape (4, 4)."""
    return isotropic_box(1.0)


def isotropic_box(visibility: float) -> np.ndarray:
    """v * Tsirelson box + (1 - v) * uniform noise; CHSH = 2 sqrt2 v."""
    v = float(visibility)
    if not (0.0 <= v <= 1.0):
        raise ParameterError(f"visibility must lie in [0, 1], got {v!r}")
    out = np.zeros((4, 4))
    for x, y, a, b in itertools.product((0, 1), repeat=4):
        out[2 * x + y, 2 * a + b] = (1.0 + v * (-1.0) ** (a + b + x * y) / SQRT2) / 4.0
    return out


def box_from_chsh(chsh: float) -> np.ndarray:
    """The isotropic box with the given CHSH value (clamped into [0, 2 sqrt2])."""
    return isotropic_box(min(max(float(chsh), 0.0), 2.0 * SQRT2) / (2.0 * SQRT2))


def _as_box(rho: Any, name: str = "rho") -> np.ndarray:
    r = np.asarray(rho, dtype=float)
    if r.shape == (16,):
        r = r.reshape(4, 4)
    if r.shape == (2, 2, 2, 2):
        r = r.reshape(4, 4)
    if r.shape != (4, 4) or not np.all(np.isfinite(r)) or np.any(r < 0):
        raise ParameterError(f"{name} must be a (4, 4) array of conditional probabilities "
                             "rho[2x+y, 2a+b] >= 0")
    sums = r.sum(axis=1)
    if np.any(np.abs(sums - 1.0) > 1e-6):
        raise ParameterError(f"{name}: each row (settings z) must sum to 1, got {sums.tolist()}")
    return r / sums[:, None]


def counts_by_setting(counts: Any) -> np.ndarray:
    """Fold a (2,2,2,2,2) [t,x,y,a,b] count array (or 32 codes) into n[z, c], shape (4, 4)."""
    c = np.asarray(counts, dtype=np.int64).reshape(2, 16).sum(axis=0)
    return c.reshape(4, 4)


def fit_box(counts_zc: Any, model: str = "ns") -> np.ndarray:
    """Maximum-likelihood box inside the model's polytope for counts n[z, c].

    Raw frequencies signal slightly and make rate predictions optimistic; the methods note
    recommends fitting into the model by minimising the KL divergence from the frequencies.
    Settings with no trials get the uniform box's row (only the objective is affected).
    """
    import cvxpy as cp

    n = np.asarray(counts_zc, dtype=float).reshape(4, 4)
    if np.any(n < 0) or n.sum() <= 0:
        raise ParameterError("calibration counts must be non-negative and not all zero")
    verts = box_model(model).vertices.reshape(-1, 16)
    w = cp.Variable(verts.shape[0], nonneg=True)
    nu = verts.T @ w
    mask = n.ravel() > 0
    scale = n.sum()
    obj = cp.Maximize((n.ravel()[mask] / scale) @ cp.log(nu[mask]))
    prob = cp.Problem(obj, [cp.sum(w) == 1])
    _solve(prob, "box fit")
    if w.value is None:
        raise SolverError("fitting the calibration box failed", prob.status)
    wv = np.clip(w.value, 0.0, None)
    box = (verts.T @ (wv / wv.sum())).reshape(4, 4)
    box = np.clip(box, 0.0, None)
    return box / box.sum(axis=1, keepdims=True)


# =========================================================================== construction


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Pef:
    """A validated probability estimation factor.

    Attributes
    ----------
    beta : float
        The power.
    model : str
        "ns" or "tsirelson".
    settings : SettingsModel
        Settings distributions it is valid for.
    factors : ndarray (4, 4)
        F[z, c] (float64), the values actually used.
    log2_table : ndarray (256,)
        log2 F by trial code (t<<4 | 4z + c), rounded down; -inf for codes outside the model.
    max_row_value : float
        Largest vertex row sum_{z,c} s(z) F(z,c) nu(c|z)^(1+beta), re-checked in 40 digits.
    rows_checked : int
        Number of (settings vertex, box vertex) rows checked.
    expected_log2 : float
        E_rho[log2 F] at the anticipated distribution (bits per trial), NaN if none given.
    sd_log2 : float
        Standard deviation of log2 F under rho (bits).
    lam : float
        Weight of the trivial PEF mixed in.
    solver : dict
        Solver name, status, tolerances, wall time.
    """

    beta: float
    model: str
    settings: SettingsModel
    factors: np.ndarray
    log2_table: np.ndarray
    max_row_value: float
    rows_checked: int
    expected_log2: float
    sd_log2: float
    lam: float
    solver: dict

    @property
    def rate(self) -> float:
        """Log-prob rate E_rho[log2 F] / beta (bits of certified min-entropy per trial)."""
        return self.expected_log2 / self.beta

    def to_dict(self) -> dict:
        return {"beta": self.beta, "model": self.model, "settings": self.settings.to_dict(),
                "factors": [[float(v) for v in row] for row in self.factors],
                "max_row_value": self.max_row_value, "rows_checked": self.rows_checked,
                "expected_log2_factor": self.expected_log2, "sd_log2_factor": self.sd_log2,
                "lam": self.lam, "solver": dict(self.solver)}


def pef_rows(model: str | BoxModel, settings: SettingsModel, beta: float) -> np.ndarray:
    """Coefficient matrix of the PEF inequality: row . F[z,c] <= 1, one row per vertex pair."""
    bm = box_model(model) if isinstance(model, str) else model
    powv = bm.vertices ** (1.0 + beta)  # exact zeros stay zero
    rows = settings.vertices[:, None, :, None] * powv[None, :, :, :]
    return rows.reshape(-1, 16)


def _solve(prob, what: str, tol: float = 1e-12) -> dict:
    """Solve with CLARABEL at tight tolerances, loosening (with a warning) if needed."""
    t0 = time.perf_counter()
    status = None
    for tl in (tol, 1e-9, 1e-7):
        try:
            with warnings.catch_warnings():
                # "optimal_inaccurate" is recorded in the status; validity never depends on it.
                warnings.simplefilter("ignore", UserWarning)
                prob.solve(solver="CLARABEL", tol_gap_abs=tl, tol_gap_rel=tl, tol_feas=tl,
                           tol_ktratio=max(tl, 1e-10), max_iter=400)
            status = prob.status
        except Exception as exc:  # solver errors: retry looser
            status = f"error: {type(exc).__name__}"
            continue
        if status in ("optimal", "optimal_inaccurate"):
            if tl != tol:
                warnings.warn(f"{what}: solver needed a looser tolerance {tl:g} "
                              "(validity is enforced afterwards; only optimality may suffer)",
                              RuntimeWarning, stacklevel=3)
            return {"solver": "CLARABEL", "status": status, "tolerance": tl,
                    "seconds": time.perf_counter() - t0}
    raise SolverError(f"{what}: convex solver failed", str(status))


def _row_max_mp(factors: np.ndarray, bm: BoxModel, settings: SettingsModel, beta: float):
    """Largest vertex row evaluated in 40-digit arithmetic from the exact vertex entries."""
    import mpmath

    with mpmath.workdps(40):
        vals = _exact_mp(mpmath.mp)
        b1 = mpmath.mpf(float(beta)) + 1
        powv = [mpmath.mpf(0) if i == 0 else mpmath.power(v, b1) for i, v in enumerate(vals)]
        f = [[mpmath.mpf(float(factors[z, c])) for c in range(4)] for z in range(4)]
        best = mpmath.mpf("-inf")
        for s in settings.vertices:
            sm = [mpmath.mpf(float(v)) for v in s]
            # Per box vertex: sum_z s(z) sum_c F(z,c) nu(c|z)^(1+beta)
            for code in bm.codes:
                tot = mpmath.fsum(sm[z] * f[z][c] * powv[int(code[z, c])]
                                  for z in range(4) for c in range(4) if code[z, c] != 0)
                best = max(best, tot)
        return best


def validate_pef(factors: Any, beta: float, model: str, settings: SettingsModel) -> float:
    """Check the PEF inequality at every vertex pair in 40-digit arithmetic; return the max row.

    Raises :class:`~dicert.errors.ParameterError` if any row exceeds 1 or any factor is negative
    or not finite. This is the check :func:`build_pef` relies on; it does not trust any solver.
    """
    f = np.asarray(factors, dtype=float).reshape(4, 4)
    if not np.all(np.isfinite(f)) or np.any(f < 0):
        raise ParameterError("PEF factors must be finite and non-negative")
    m = _row_max_mp(f, box_model(model), settings, beta)
    if m > 1:
        raise ParameterError(f"not a PEF: a vertex row reaches {float(m)!r} > 1")
    return float(m)


def _log2_table(factors: np.ndarray, settings: SettingsModel) -> np.ndarray:
    """log2 F by trial code, each entry rounded down by two ulps (never above the true value)."""
    table = np.full(256, -np.inf)
    with np.errstate(divide="ignore"):
        lf = np.log2(factors.ravel())
    lf = np.nextafter(np.nextafter(lf, -np.inf), -np.inf)
    for t in range(2):
        for z in range(4):
            if settings.allowed[t, z]:
                table[16 * t + 4 * z: 16 * t + 4 * z + 4] = lf[4 * z: 4 * z + 4]
    return table


def _moments(factors: np.ndarray, rho: np.ndarray | None, s: np.ndarray) -> tuple[float, float]:
    if rho is None:
        return float("nan"), float("nan")
    joint = (s[:, None] * rho).ravel()
    with np.errstate(divide="ignore", invalid="ignore"):
        lf = np.log2(factors.ravel())
    mask = joint > 0
    if np.any(~np.isfinite(lf[mask])):
        return float("-inf"), float("inf")
    mu = float(math.fsum(joint[mask] * lf[mask]))
    var = float(math.fsum(joint[mask] * (lf[mask] - mu) ** 2))
    return mu, math.sqrt(max(var, 0.0))


def optimal_factors(rho: Any, settings: SettingsModel, beta: float, *, model: str = "ns",
                    tol: float = 1e-12) -> tuple[np.ndarray, dict]:
    """Raw solver output: argmax_F E_rho[log2 F] s.t. every vertex row <= 1 (NOT yet validated).

    The variable is G with F = 1 + beta G and the objective is divided by beta, so that the
    program stays well scaled when beta is small and F is close to 1.
    """
    import cvxpy as cp

    rho = _as_box(rho)
    a = pef_rows(model, settings, beta)
    joint = (settings.nominal[:, None] * rho).ravel()
    mask = joint > 0
    g = cp.Variable(16)
    fvar = 1.0 + beta * g
    rhs = (1.0 - a.sum(axis=1)) / beta
    obj = cp.Maximize(joint[mask] @ cp.log(fvar[mask]) / beta)
    prob = cp.Problem(obj, [a @ g <= rhs, fvar >= 0])
    info = _solve(prob, f"PEF optimisation (beta={beta:g})", tol)
    if g.value is None:
        raise SolverError("PEF optimisation returned no solution", prob.status)
    return np.clip(1.0 + beta * np.asarray(g.value), 0.0, None).reshape(4, 4), info


def make_valid(factors: Any, beta: float, model: str, settings: SettingsModel, *,
               lam: float = 0.0, rho: Any = None, solver: dict | None = None) -> Pef:
    """Turn candidate factors into a valid PEF, independently of how they were obtained.

    Steps (methods note, pitfalls 1 and 3): clip negatives; evaluate every vertex row in
    float64 and divide by the largest (the rows are homogeneous in F, so this is exact); mix with
    the trivial PEF, F' = (1 - lam) F + lam (the PEFs of a given power form a convex set and
    F = 1 is one); divide by the float64 row maximum times (1 + ROW_MARGIN); re-check every row
    in 40-digit arithmetic against the exact vertex entries, which must stay below
    1 - ROW_CHECK_SLACK.
    """
    beta = float(beta)
    if not (0.0 < beta <= 16.0) or not math.isfinite(beta):
        raise ParameterError(f"beta must lie in (0, 16], got {beta!r}")
    lam = float(lam)
    if not (0.0 <= lam < 1.0):
        raise ParameterError(f"lam must lie in [0, 1), got {lam!r}")
    f = np.clip(np.nan_to_num(np.asarray(factors, dtype=float).reshape(4, 4), nan=0.0,
                              posinf=0.0), 0.0, None)
    a = pef_rows(model, settings, beta)
    m = float(np.max(a @ f.ravel()))
    if not m > 0.0:
        f = np.ones((4, 4))
        m = float(np.max(a @ f.ravel()))
    f = f / m
    if lam > 0.0:
        f = (1.0 - lam) * f + lam
    m = float(np.max(a @ f.ravel()))
    f = f / (m * (1.0 + ROW_MARGIN))
    bm = box_model(model)
    mp_max = _row_max_mp(f, bm, settings, beta)
    shrink = 0
    while mp_max > 1 - ROW_CHECK_SLACK:
        shrink += 1
        if shrink > 5:
            raise SolverError("could not make the PEF valid within the margin")
        f = f / (1.0 + 1e-9 * 10 ** shrink)
        mp_max = _row_max_mp(f, bm, settings, beta)
    rho_box = None if rho is None else _as_box(rho)
    mu, sd = _moments(f, rho_box, settings.nominal)
    return Pef(beta=beta, model=bm.name, settings=settings, factors=f,
               log2_table=_log2_table(f, settings), max_row_value=float(mp_max),
               rows_checked=int(a.shape[0]), expected_log2=mu, sd_log2=sd, lam=lam,
               solver=dict(solver or {"solver": "none", "status": "given"}))


def build_pef(rho: Any, settings: SettingsModel | None = None, beta: float = 0.01, *,
              model: str = "ns", lam: float = 0.0, tol: float = 1e-12) -> Pef:
    """Construct the PEF maximising E_rho[log2 F] and make it provably valid.

    Parameters
    ----------
    rho : array (4, 4)
        Anticipated box rho[z, c] = rho(c|z), e.g. fitted from calibration data
        (:func:`fit_box`); it affects only optimality, never validity.
    settings : SettingsModel
        Settings distribution(s); default uniform.
    beta : float
        The power (> 0). Smaller beta: rate closer to h_inf but a larger finite-size penalty
        log2(1/eps_PE)/beta.
    model : "ns" | "tsirelson"
        Box model; "tsirelson" adds the assumption that the devices are quantum.
    lam : float
        Weight of the trivial PEF mixed in (1e-3 avoids zero factors at small cost).

    Returns
    -------
    Pef
        With ``max_row_value`` re-checked in 40 digits; the solver's own feasibility report is
        never used.

    References
    ----------
    .. [1] E. Knill, Y. Zhang, P. Bierhorst, Phys. Rev. Research 2, 033465 (2020).
    .. [2] Y. Zhang, E. Knill, P. Bierhorst, Phys. Rev. A 98, 040304(R) (2018).
    """
    settings = uniform_settings() if settings is None else settings
    beta = float(beta)
    if not (0.0 < beta <= 16.0) or not math.isfinite(beta):
        raise ParameterError(f"beta must lie in (0, 16], got {beta!r}")
    raw, info = optimal_factors(rho, settings, beta, model=model, tol=tol)
    return make_valid(raw, beta, model, settings, lam=lam, rho=rho, solver=info)


def trivial_pef(settings: SettingsModel | None = None, beta: float = 0.01, *,
                model: str = "ns") -> Pef:
    """The trivial PEF F = 1 (every vertex row is at most 1, fact (b) of the methods note),
    passed through :func:`make_valid` like any other, hence shrunk by the row margin.

    Scoring a trial with it leaves log2 T unchanged (up to the ~1e-12 bit margin), so under
    calibration = "adaptive" with initial = "trivial" the first block only trains the next.
    """
    settings = uniform_settings() if settings is None else settings
    return make_valid(np.ones((4, 4)), beta, model, settings, lam=0.0,
                      solver={"solver": "none", "status": "trivial PEF"})


# =========================================================================== diagnostics


def _entropy_bits(p: np.ndarray) -> float:
    p = p[p > 0]
    return float(-np.sum(p * np.log2(p)))


def asymptotic_rate(rho: Any, settings: SettingsModel | None = None, *,
                    model: str = "ns") -> float:
    """h_inf(rho): least average H(C|Z) over decompositions of rho into model vertices (bits).

    An LP over vertex weights (scipy.optimize.linprog, HiGHS). It upper-bounds every log-prob
    rate r(beta) (Jensen), and r(beta) -> h_inf as beta -> 0. ``rho`` must lie in the model
    (fit it first with :func:`fit_box` if it comes from data).
    """
    from scipy.optimize import linprog

    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    verts = box_model(model).vertices
    cost = np.array([sum(settings.nominal[z] * _entropy_bits(v[z]) for z in range(4))
                     for v in verts])
    a_eq = np.vstack([verts.reshape(-1, 16).T, np.ones((1, verts.shape[0]))])
    b_eq = np.concatenate([rho.ravel(), [1.0]])
    res = linprog(cost, A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
    if res.status != 0:
        raise ParameterError("rho is not a mixture of the model's vertices (fit it with fit_box)")
    return float(res.fun)


def statistical_strength(rho: Any, settings: SettingsModel | None = None) -> float:
    """D_LR(rho) = min over local boxes nu of sum_z s(z) KL(rho(.|z) || nu(.|z)), in bits.

    The statistical strength of van Dam, Gill and Grunwald (2005); it bounds g(beta) for every
    beta, and log2(1/eps_PE)/D_LR is the least number of trials before any randomness can be
    certified.

    References
    ----------
    .. [1] W. van Dam, R. D. Gill, P. D. Grunwald, IEEE Trans. Inf. Theory 51, 2812 (2005).
    """
    import cvxpy as cp

    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    joint = (settings.nominal[:, None] * rho).ravel()
    mask = joint > 0
    ld = local_deterministic_boxes().reshape(16, 16)
    w = cp.Variable(16, nonneg=True)
    nu = ld.T @ w
    prob = cp.Problem(cp.Maximize(joint[mask] @ cp.log(nu[mask])), [cp.sum(w) == 1])
    _solve(prob, "statistical strength")
    wv = np.clip(w.value, 0.0, None)
    nuv = ld.T @ (wv / wv.sum())
    # Evaluate the divergence at the (feasible) solver point: an upper estimate of the minimum.
    return float(math.fsum(joint[mask] * np.log2(rho.ravel()[mask] / nuv[mask])))


# =========================================================================== certification


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PefParams:
    """Everything a PEF analysis fixes before the analysis trials (the protocol's [analysis]).

    Attributes
    ----------
    beta : float
        PEF power.
    eps_pe : float
        Error of the probability estimate.
    sigma_target_bits : float
        Min-entropy wanted; success when log2 T >= beta sigma_target + log2(1/eps_pe).
    n_max : int
        Most analysis trials before the run aborts.
    model : str
        "ns" or "tsirelson".
    lam : float
        Weight of the trivial PEF mixed in.
    calibration : str
        "prefix" (the first ``calibration_trials`` trials of the log fix the PEF and are not
        analysed), "isotropic" (an anticipated isotropic box with CHSH ``calibration_chsh``),
        "table" (an anticipated box ``calibration_table``, 16 numbers p(ab|xy) in code order),
        or "adaptive" (every trial is analysed; the trials are split into blocks of
        ``block_trials`` and the PEF of block k is built from the maximum-likelihood box of
        the trials before block k, never from block k itself; the first block uses the rule
        ``initial``).
    calibration_trials : int
        For "prefix".
    calibration_chsh : float | None
        For "isotropic", and for "adaptive" with initial = "isotropic".
    calibration_table : tuple | None
        For "table", and for "adaptive" with initial = "table".
    block_trials : int
        For "adaptive": trials per block (default :data:`DEFAULT_BLOCK_TRIALS`); 0 otherwise.
    initial : str | None
        For "adaptive": the PEF of the first block, "trivial" (F = 1: the block scores
        nothing and only trains the next one; default), "isotropic" or "table".
    fit_window_blocks : int
        For "adaptive": fit block k's box to the trials of the last ``fit_window_blocks``
        blocks before it (0, the default: all trials before block k).
    p_x0, p_y0, bias_x, bias_y : float
        Test-round settings probabilities P(x=0), P(y=0) and the bounds on their deviation
        (partly known settings); the test-round probability and generation settings come from
        the protocol's [settings].
    """

    beta: float
    eps_pe: float
    sigma_target_bits: float
    n_max: int
    model: str = "ns"
    lam: float = 1e-3
    calibration: str = "prefix"
    calibration_trials: int = 0
    calibration_chsh: float | None = None
    calibration_table: tuple[float, ...] | None = None
    p_x0: float = 0.5
    p_y0: float = 0.5
    bias_x: float = 0.0
    bias_y: float = 0.0
    block_trials: int = 0
    initial: str | None = None
    fit_window_blocks: int = 0

    def __post_init__(self) -> None:
        d = dataclasses.asdict(self)
        for key in ADAPTIVE_KEYS:  # left at the dataclass default: use the rule's default
            if d[key] in (None, 0):
                del d[key]
        checked = PefParams.from_mapping(d, "PefParams")
        for key in ADAPTIVE_KEYS:
            object.__setattr__(self, key, getattr(checked, key))

    @property
    def threshold_log2(self) -> float:
        """beta * sigma_target + log2(1/eps_pe), the success threshold on log2 T."""
        return self.beta * self.sigma_target_bits + math.log2(1.0 / self.eps_pe)

    @classmethod
    def from_mapping(cls, d: Mapping[str, Any], where: str = "") -> PefParams:
        """Validate a mapping (the parsed [analysis] table minus ``method``)."""
        loc = f"{where}: " if where else ""

        def fail(key: str, problem: str) -> ProtocolError:
            return ProtocolError(f"{loc}key '{key}': {problem}")

        allowed = tuple(f.name for f in dataclasses.fields(cls))
        for key in d:
            if key not in allowed:
                raise fail(str(key), f"unknown key (allowed: {', '.join(allowed)})")

        def num(key: str, lo: float, hi: float, *, lo_open=True, hi_open=True, default=None):
            if key not in d or d[key] is None:
                if default is None:
                    raise fail(key, "is required")
                return default
            v = d[key]
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
                raise fail(key, f"expected a finite number, got {v!r}")
            v = float(v)
            if (v <= lo if lo_open else v < lo) or (v >= hi if hi_open else v > hi):
                raise fail(key, f"must lie in {'(' if lo_open else '['}{lo:g}, {hi:g}"
                                f"{')' if hi_open else ']'}, got {v!r}")
            return v

        def integer(key: str, lo: int, default=None) -> int:
            if key not in d or d[key] is None:
                if default is None:
                    raise fail(key, "is required")
                return default
            v = d[key]
            if isinstance(v, bool) or not isinstance(v, int) or v < lo:
                raise fail(key, f"expected an integer >= {lo}, got {v!r}")
            return int(v)

        def choice(key: str, options: tuple[str, ...], default: str) -> str:
            v = d.get(key, default)
            if not isinstance(v, str) or v not in options:
                raise fail(key, f"expected one of {', '.join(map(repr, options))}, got {v!r}")
            return v

        vals: dict[str, Any] = {
            "beta": num("beta", 0.0, 16.0, hi_open=False),
            "eps_pe": num("eps_pe", 0.0, 1.0),
            "sigma_target_bits": num("sigma_target_bits", 0.0, 1e15),
            "n_max": integer("n_max", 1),
            "model": choice("model", MODELS, "ns"),
            "lam": num("lam", 0.0, 1.0, lo_open=False, default=1e-3),
            "calibration": choice("calibration", CALIBRATIONS, "prefix"),
            "calibration_trials": integer("calibration_trials", 0, 0),
            "p_x0": num("p_x0", 0.0, 1.0, default=0.5),
            "p_y0": num("p_y0", 0.0, 1.0, default=0.5),
            "bias_x": num("bias_x", 0.0, 0.5, lo_open=False, default=0.0),
            "bias_y": num("bias_y", 0.0, 0.5, lo_open=False, default=0.0),
            "calibration_chsh": None,
            "calibration_table": None,
            "block_trials": 0,
            "initial": None,
            "fit_window_blocks": 0,
        }
        for key, p in (("bias_x", "p_x0"), ("bias_y", "p_y0")):
            if vals[key] >= min(vals[p], 1.0 - vals[p]):
                raise fail(key, f"must be below min({p}, 1 - {p}) = "
                                f"{min(vals[p], 1 - vals[p]):g}")
        cal = vals["calibration"]
        # The rule that fixes the anticipated box of the (first) PEF.
        anticipated = cal
        if cal == "adaptive":
            vals["initial"] = choice("initial", INITIAL_RULES, "trivial")
            vals["block_trials"] = integer("block_trials", 1, DEFAULT_BLOCK_TRIALS)
            vals["fit_window_blocks"] = integer("fit_window_blocks", 0, 0)
            if vals["lam"] <= 0.0:
                # lam > 0 keeps every factor of a producible trial positive in every block, so
                # the trials with factor 0 are the same (those outside the settings model) for
                # all blocks.
                raise fail("lam", "calibration = \"adaptive\" needs lam > 0 (no zero factors "
                                  "in any block's PEF)")
            anticipated = vals["initial"]
        else:
            for key in ("initial", "block_trials", "fit_window_blocks"):
                if d.get(key) not in (None, 0):
                    raise fail(key, "only used with calibration = \"adaptive\"")
        if cal == "prefix":
            if vals["calibration_trials"] < 1:
                raise fail("calibration_trials", "calibration = \"prefix\" needs a positive "
                                                 "number of calibration trials")
        else:
            if d.get("calibration_trials"):
                raise fail("calibration_trials", "only used with calibration = \"prefix\"")
        if anticipated == "isotropic":
            vals["calibration_chsh"] = num("calibration_chsh", 2.0, 2.0 * SQRT2, hi_open=False)
        elif "calibration_chsh" in d and d["calibration_chsh"] is not None:
            raise fail("calibration_chsh", "only used with calibration = \"isotropic\" (or "
                                           "\"adaptive\" with initial = \"isotropic\")")
        if anticipated == "table":
            tab = d.get("calibration_table")
            if not isinstance(tab, (list, tuple)) or len(tab) != 16:
                raise fail("calibration_table", "expected 16 numbers p(ab|xy), index 8x+4y+2a+b")
            for i, v in enumerate(tab):
                if isinstance(v, bool) or not isinstance(v, (int, float)) or not (v >= 0):
                    raise fail(f"calibration_table[{i}]", f"expected a number >= 0, got {v!r}")
            arr = np.array(tab, dtype=float).reshape(4, 4)
            if np.any(np.abs(arr.sum(axis=1) - 1.0) > 1e-6):
                raise fail("calibration_table", "each group of 4 (one setting pair) must sum to 1")
            vals["calibration_table"] = tuple(float(v) for v in tab)
        elif "calibration_table" in d and d["calibration_table"] is not None:
            raise fail("calibration_table", "only used with calibration = \"table\" (or "
                                            "\"adaptive\" with initial = \"table\")")
        obj = object.__new__(cls)
        for k, v in vals.items():
            object.__setattr__(obj, k, v)
        return obj

    def settings_model(self, design: Any = None) -> SettingsModel:
        return settings_from_design(design, p_x0=self.p_x0, p_y0=self.p_y0, bias_x=self.bias_x,
                                    bias_y=self.bias_y)

    def anticipated_box(self) -> np.ndarray | None:
        """The anticipated box fixed in advance: for "isotropic" and "table", and for
        "adaptive" that of its first block (None for "prefix" and initial = "trivial")."""
        rule = self.initial if self.calibration == "adaptive" else self.calibration
        if rule == "isotropic":
            return box_from_chsh(self.calibration_chsh)
        if rule == "table":
            return _as_box(np.array(self.calibration_table), "calibration_table")
        return None

    def to_dict(self) -> dict:
        """The parameters as plain values; the adaptive keys only under "adaptive" (so the
        records of the fixed calibrations keep their form)."""
        skip = () if self.calibration == "adaptive" else ADAPTIVE_KEYS
        return {f.name: (list(v) if isinstance(v := getattr(self, f.name), tuple) else v)
                for f in dataclasses.fields(self) if f.name not in skip}


#: Keys of :class:`PefParams` used only by calibration = "adaptive".
ADAPTIVE_KEYS = ("block_trials", "initial", "fit_window_blocks")

#: Sub-block length of the scoring pass: counts per sub-block locate the threshold crossing;
#: only sub-blocks that could contain it are scanned trial by trial.
SUB_BLOCK = 4096


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
    def result(self, *, complete: bool = True):
        """The :class:`~dicert.finite.result.FiniteSizeResult` of the run so far.

        ``accepted`` only on success. The extractor must then be run on the outcomes (a, b) of
        the analysed trials ``harvest_first_trial .. harvest_last_trial`` (inclusive, 0-based
        trial indices of the log), 2 bits per trial, with min-entropy ``min_entropy_bits`` =
        sigma_target - 1 (the -1 makes the sub-normalised success branch a normalised source
        for any extractor, methods note section 2 (ii)).

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
            min_entropy_bits=max(0.0, p.sigma_target_bits - 1.0) if accepted else 0.0,
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


# =========================================================================== planning


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PefPlan:
    """What a PEF run at an anticipated distribution needs.

    ``expected_trials`` is the n at which the mean of log2 T reaches the threshold;
    ``trials_for_completeness`` the n at which the success probability reaches
    ``completeness`` in the normal approximation; ``latency_floor_trials`` the least n before
    anything can be certified (log2(1/eps_PE)/D_LR).
    """

    beta: float
    target_bits: float
    eps_pe: float
    model: str
    expected_log2_factor: float
    sd_log2_factor: float
    rate_bits_per_trial: float
    expected_trials: float
    completeness: float
    trials_for_completeness: float
    latency_floor_trials: float
    statistical_strength_bits: float
    asymptotic_rate_bits: float
    grid: tuple[tuple[float, float, float, float], ...]


def completeness_probability(n: float, mu: float, sd: float, threshold: float) -> float:
    """P(success) ~ Phi((n mu - threshold) / (sd sqrt n)) for i.i.d. honest trials."""
    from scipy.stats import norm

    if n <= 0:
        return 0.0
    if sd <= 0:
        return 1.0 if n * mu >= threshold else 0.0
    return float(norm.cdf((n * mu - threshold) / (sd * math.sqrt(n))))


def trials_for_probability(mu: float, sd: float, threshold: float, p: float) -> float:
    """Least n with Phi((n mu - thr)/(sd sqrt n)) >= p (normal approximation); inf if mu <= 0."""
    from scipy.stats import norm

    if not mu > 0:
        return math.inf
    zq = float(norm.ppf(p))
    root = (zq * sd + math.sqrt((zq * sd) ** 2 + 4.0 * mu * threshold)) / (2.0 * mu)
    return root * root


def plan_pef(rho: Any, settings: SettingsModel | None = None, target_bits: float = 512.0,
             eps_pe: float = 2.0 ** -64, *, model: str = "ns", lam: float = 0.0,
             completeness: float = 0.99, betas: Iterable[float] | None = None,
             refine: bool = True) -> PefPlan:
    """Choose beta for a target and report expected trials and completeness.

    Grid search over beta (log-spaced 1e-4 .. 1 unless ``betas`` is given), minimising the
    expected number of trials n(beta) = (beta target + log2(1/eps_pe)) / E_rho[log2 F_beta],
    with a finer grid around the best point when ``refine``. Uses validated PEFs.
    """
    settings = uniform_settings() if settings is None else settings
    rho = _as_box(rho)
    thr_fixed = math.log2(1.0 / eps_pe)
    grid = list(betas) if betas is not None else list(np.logspace(-4, 0, 17))

    def evaluate(b: float):
        pef = build_pef(rho, settings, b, model=model, lam=lam)
        mu = pef.expected_log2
        n = (b * target_bits + thr_fixed) / mu if mu > 0 else math.inf
        return (float(b), mu, pef.sd_log2, n)

    rows = [evaluate(b) for b in grid]
    if refine and betas is None:
        k = min(range(len(rows)), key=lambda i: rows[i][3])
        lo = rows[max(k - 1, 0)][0]
        hi = rows[min(k + 1, len(rows) - 1)][0]
        rows += [evaluate(b) for b in np.geomspace(lo, hi, 9)[1:-1]]
    rows.sort()
    best = min(rows, key=lambda r: r[3])
    b, mu, sd, n_exp = best
    thr = b * target_bits + thr_fixed
    d_lr = statistical_strength(rho, settings)
    try:
        h_inf = asymptotic_rate(rho, settings, model=model)
    except ParameterError:
        h_inf = float("nan")
    return PefPlan(beta=b, target_bits=float(target_bits), eps_pe=float(eps_pe), model=model,
                   expected_log2_factor=mu, sd_log2_factor=sd, rate_bits_per_trial=mu / b,
                   expected_trials=n_exp, completeness=float(completeness),
                   trials_for_completeness=trials_for_probability(mu, sd, thr, completeness),
                   latency_floor_trials=thr_fixed / d_lr if d_lr > 0 else math.inf,
                   statistical_strength_bits=d_lr, asymptotic_rate_bits=h_inf,
                   grid=tuple(rows))


__all__ = [
    "BLOCK_TABLES_LISTED_MAX", "CALIBRATIONS", "DEFAULT_BLOCK_TRIALS", "INITIAL_RULES", "MODELS", "BoxModel", "Pef", "PefAccumulator", "PefParams", "PefPlan",
    "SettingsModel", "asymptotic_rate", "box_from_chsh", "box_model", "build_pef",
    "certify_pef", "certify_pef_counts", "chsh_functionals", "completeness_probability",
    "counts_by_setting", "factors_digest", "fit_box", "follow_log", "isotropic_box", "local_deterministic_boxes", "make_valid",
    "optimal_factors", "pef_rows", "plan_pef", "pr_boxes", "product_settings",
    "settings_from_design", "spot_settings", "statistical_strength", "trials_for_probability",
    "trivial_pef", "tsirelson_box", "uniform_settings", "validate_pef",
]
