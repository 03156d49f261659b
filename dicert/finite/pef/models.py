"""Box models and settings models of the PEF analysis: the vertices of the no-signalling
polytope and of its Tsirelson-cut subset, settings distributions, and anticipated boxes.

Part of :mod:`dicert.finite.pef` (see its docstring for the method and references).
"""

from __future__ import annotations

import dataclasses
import functools
import itertools
import math
import time
import warnings
from typing import Any

import numpy as np

from dicert.errors import ParameterError, SolverError


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
    0, (sqrt2-1)/2, 2-sqrt2, (3-sqrt2)/2, 1 (from our own enumeration, checked again below); each snapped vertex
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

    Raw frequencies signal slightly and make rate predictions optimistic; Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)
    recommend fitting into the model by minimising the KL divergence from the frequencies.
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
