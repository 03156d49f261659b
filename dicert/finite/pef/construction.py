"""PEF construction and validation: the exponential-cone program for the best PEF at an
anticipated box, then the solver-independent validity repair and the 40-digit re-check.

Part of :mod:`dicert.finite.pef` (see its docstring for the method and references).
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from dicert.errors import ParameterError, SolverError
from dicert.finite.pef.models import (
    BoxModel,
    ROW_CHECK_SLACK,
    ROW_MARGIN,
    SettingsModel,
    _as_box,
    _exact_mp,
    _solve,
    box_model,
    uniform_settings,
)


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

    Steps (numerical safety, our choice; the PEF condition of Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)): clip negatives; evaluate every vertex row in
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
    """The trivial PEF F = 1 (every vertex row is at most 1, Knill, Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)),
    passed through :func:`make_valid` like any other, hence shrunk by the row margin.

    Scoring a trial with it leaves log2 T unchanged (up to the ~1e-12 bit margin), so under
    calibration = "adaptive" with initial = "trivial" the first block only trains the next.
    """
    settings = uniform_settings() if settings is None else settings
    return make_valid(np.ones((4, 4)), beta, model, settings, lam=0.0,
                      solver={"solver": "none", "status": "trivial PEF"})
