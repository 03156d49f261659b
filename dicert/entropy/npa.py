"""NPA semidefinite relaxations for the 2-input 2-output bipartite scenario, dual-certified.

Public primitives for experts. Every number returned as a *bound* is built from a dual
certificate checked in exact rational arithmetic, never from the solver's primal value:

1. The solver (Clarabel, SCS as fallback) solves the **dual** SDP directly, so the dual
   variables are our own variables and no solver sign convention is involved.
2. The floating-point dual matrices are symmetrised and shifted by ``t * I`` until an exact
   rational LDL^T factorisation (``fractions.Fraction``) proves them positive definite.
3. The remaining equality residuals of the dual are computed exactly and charged against the
   primal with the a-priori bound ``|moment| <= q_e`` (every diagonal entry of a moment matrix
   built from +-1 observables equals its normalisation ``q_e``, so ``|Gamma_ij| <= q_e``).
4. The resulting rational upper bound is rounded *up* to a float.

So the returned value upper-bounds the optimum of the relaxation (hence of the quantum value)
whatever the solver's accuracy; a poor solve only makes it looser.

Operators and conventions
-------------------------
Alice measures the +-1 observables ``A_0, A_1`` and Bob ``B_0, B_1`` (outcome bit 0 <-> +1),
with ``A_x^2 = B_y^2 = 1`` and ``[A_x, B_y] = 0``; ``p(ab|xy) = (1 + (-1)^a <A_x> + (-1)^b
<B_y> + (-1)^(a+b) <A_x B_y>)/4``. Bell functionals are 16 coefficients ``c[x][y][a][b]`` over
``p(ab|xy)`` (flattened index ``8x + 4y + 2a + b``, as in the protocol files). The CHSH value is
``S = E00 + E01 + E10 - E11`` with ``E_xy = <A_x B_y>``.

Levels: ``"1"`` uses the operator list {1, A_x, B_y}; ``"1+AB"`` adds the products ``A_x B_y``;
``"2"`` further adds ``A_0 A_1, A_1 A_0, B_0 B_1, B_1 B_0``. Moment matrices are taken real
symmetric: the real part of a feasible complex moment matrix is feasible with the same value
for every functional used here (all are real combinations of moments of Hermitian words), so
the real relaxation is still an upper bound on the quantum value.

Guessing probability (adversary decomposition): the observed box is written as a sum of
sub-normalised boxes ``p = sum_e p_e`` (one per adversary guess ``e``), each with a PSD moment
matrix; the guessing probability is ``max sum_e p_e(a = e | x*)`` (one party) or
``max sum_e p_e(ab = e | x* y*)`` (pair) subject to the constraints on the aggregate box.

References
----------
.. [1] M. Navascues, S. Pironio, A. Acin, "Bounding the set of quantum correlations",
   PRL 98, 010401 (2007); "A convergent hierarchy of semidefinite programs characterizing the
   set of quantum correlations", New J. Phys. 10, 073013 (2008).
.. [2] S. Pironio et al., "Random numbers certified by Bell's theorem", Nature 464,
   1021-1024 (2010), and its Supplementary Information.
.. [3] O. Nieto-Silleras, S. Pironio, J. Silman, "Using complete measurement statistics for
   optimal device-independent randomness evaluation", New J. Phys. 16, 013035 (2014).
.. [4] J.-D. Bancal, L. Sheridan, V. Scarani, "More randomness from the same data",
   New J. Phys. 16, 033011 (2014).
.. [5] B. S. Cirel'son, "Quantum generalizations of Bell's inequality", Lett. Math. Phys. 4,
   93-100 (1980).
.. [6] J. F. Clauser, M. A. Horne, "Experimental consequences of objective local theories",
   PRD 10, 526 (1974); P. H. Eberhard, PRA 47, R747 (1993).
.. [7] S. Boyd, L. Vandenberghe, "Convex Optimization", Cambridge University Press (2004),
   sec. 5.9 (weak duality for conic programs).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import warnings
from collections.abc import Sequence
from fractions import Fraction

import numpy as np

from dicert.errors import ParameterError, SolverError

# re-exported: every name that lived here keeps its import path
from dicert.entropy._npa_words import (  # noqa: F401
    IDENTITY,
    LEVELS,
    MomentStructure,
    Word,
    _a,
    _ab,
    _b,
    _canonical,
    _operators,
    _product,
    _reduce,
    moment_structure,
)


#: Value just below 2*sqrt(2) used as the largest CHSH constraint: float(2*sqrt(2)) is about
#: 1e-16 ABOVE the true Tsirelson bound, which would make the constraint infeasible.
CHSH_CEILING = math.nextafter(2.0 * math.sqrt(2.0), 0.0)

NPA_REFERENCES = (
    "Navascues, Pironio, Acin, PRL 98, 010401 (2007); New J. Phys. 10, 073013 (2008)",
    "Pironio et al., Nature 464, 1021 (2010)",
    "Nieto-Silleras, Pironio, Silman, New J. Phys. 16, 013035 (2014)",
    "Bancal, Sheridan, Scarani, New J. Phys. 16, 033011 (2014)",
)


# ---------------------------------------------------------------------------------------------
# Bell functionals and correlators (pure numpy)
# ---------------------------------------------------------------------------------------------


def chsh_coefficients() -> np.ndarray:
    """CHSH as 16 coefficients over p(ab|xy): S = sum_xy (-1)^(xy) [P(a=b|xy) - P(a!=b|xy)].

    Returns an array of shape (2, 2, 2, 2) indexed [x, y, a, b] (Clauser, Horne, Shimony,
    Holt, PRL 23, 880 (1969)).
    """
    c = np.zeros((2, 2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    c[x, y, a, b] = (-1.0) ** (x * y) * (1.0 if a == b else -1.0)
    return c


def ch_eberhard_coefficients() -> np.ndarray:
    """The CH/Eberhard functional J = P(00|00) - P(01|01) - P(10|10) - P(00|11).

    Outcome 0 plays the role of "click" (+) and 1 of "no click" (0); local bound J <= 0,
    and for every no-signalling box S = 2 + 4 J (Clauser and Horne 1974; Eberhard 1993).
    """
    c = np.zeros((2, 2, 2, 2))
    c[0, 0, 0, 0] = 1.0
    c[0, 1, 0, 1] = -1.0
    c[1, 0, 1, 0] = -1.0
    c[1, 1, 0, 0] = -1.0
    return c


def _as_coefficients(coefficients) -> np.ndarray:
    c = np.asarray(coefficients, dtype=float)
    if c.size != 16:
        raise ParameterError(
            f"coefficients: expected 16 numbers c[x][y][a][b] (index 8x + 4y + 2a + b), got {c.size}"
        )
    c = c.reshape(2, 2, 2, 2)
    if not np.all(np.isfinite(c)):
        raise ParameterError("coefficients: every coefficient must be a finite number")
    return c


def functional_moments(coefficients) -> dict[Word, Fraction]:
    """Rewrite sum c[x,y,a,b] p(ab|xy) as an exact linear form in the moments.

    Exact (rational) because every float is a rational and the change of basis has
    coefficients +-1/4.
    """
    c = _as_coefficients(coefficients)
    out: dict[Word, Fraction] = {}

    def add(w: Word, v: Fraction) -> None:
        out[w] = out.get(w, Fraction(0)) + v

    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    v = Fraction(float(c[x, y, a, b])) / 4
                    if v == 0:
                        continue
                    sa, sb = (1 - 2 * a), (1 - 2 * b)
                    add(IDENTITY, v)
                    add(_a(x), sa * v)
                    add(_b(y), sb * v)
                    add(_ab(x, y), sa * sb * v)
    return {w: v for w, v in out.items() if v != 0}


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Correlators:
    """Full correlators of a 2-input 2-output box (outcome bit 0 <-> +1).

    ``alice[x] = <A_x>``, ``bob[y] = <B_y>``, ``joint[x][y] = <A_x B_y>`` (dimensionless).
    """

    alice: tuple[float, float]
    bob: tuple[float, float]
    joint: tuple[tuple[float, float], tuple[float, float]]

    @property
    def chsh(self) -> float:
        """S = E00 + E01 + E10 - E11."""
        e = self.joint
        return e[0][0] + e[0][1] + e[1][0] - e[1][1]

    def probabilities(self) -> np.ndarray:
        """p(ab|xy) as an array (2, 2, 2, 2) indexed [x, y, a, b]."""
        p = np.zeros((2, 2, 2, 2))
        for x in (0, 1):
            for y in (0, 1):
                for a in (0, 1):
                    for b in (0, 1):
                        sa, sb = 1 - 2 * a, 1 - 2 * b
                        p[x, y, a, b] = (
                            1 + sa * self.alice[x] + sb * self.bob[y] + sa * sb * self.joint[x][y]
                        ) / 4
        return p


def correlators_from_counts(counts, *, rounds: str = "test") -> Correlators:
    """Observed correlators from trial counts.

    Parameters
    ----------
    counts : array_like of int, shape (2, 2, 2, 2, 2) indexed [t, x, y, a, b], or (2, 2, 2, 2)
        indexed [x, y, a, b]. Logs without a test flag file every trial under t = 1.
    rounds : {"test", "all"}
        Use only test rounds (t = 1, the default) or all rounds.

    Marginals pool the other party's settings: ``<A_x> = sum_{y,a,b} (-1)^a N(xyab) / N(x)``.
    """
    n = np.asarray(counts)
    if n.shape == (2, 2, 2, 2, 2):
        if rounds == "test":
            n = n[1]
        elif rounds == "all":
            n = n.sum(axis=0)
        else:
            raise ParameterError(f"rounds: expected 'test' or 'all', got {rounds!r}")
    if n.shape != (2, 2, 2, 2):
        raise ParameterError(f"counts: expected shape (2,2,2,2,2) or (2,2,2,2), got {n.shape}")
    if np.any(n < 0):
        raise ParameterError("counts: negative count")
    n = n.astype(np.float64)
    sgn = np.array([1.0, -1.0])
    nxy = n.sum(axis=(2, 3))
    for x in (0, 1):
        for y in (0, 1):
            if nxy[x, y] == 0:
                raise ParameterError(
                    f"counts: no {rounds} rounds with settings x={x}, y={y}; correlators undefined"
                )
    joint = np.einsum("xyab,a,b->xy", n, sgn, sgn) / nxy
    alice = np.einsum("xyab,a->x", n, sgn) / n.sum(axis=(1, 2, 3))
    bob = np.einsum("xyab,b->y", n, sgn) / n.sum(axis=(0, 2, 3))
    return Correlators(
        alice=(float(alice[0]), float(alice[1])),
        bob=(float(bob[0]), float(bob[1])),
        joint=((float(joint[0, 0]), float(joint[0, 1])), (float(joint[1, 0]), float(joint[1, 1]))),
    )


# ---------------------------------------------------------------------------------------------
# Problem description and certificate
# ---------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True)
class _Constraint:
    form: dict  # Word -> Fraction, a linear form on the AGGREGATE box
    lo: float | None
    hi: float | None
    name: str


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class NpaCertificate:
    """An exactly verified upper bound on the maximum of an NPA relaxation.

    Fields
    ------
    upper_bound : float
        Certified upper bound (rounded up from an exact rational value).
    solver_value : float
        The solver's own (uncertified) optimum of the dual problem, for information.
    margin : float
        ``upper_bound - solver_value`` (what the repair and rounding cost; >= 0 up to noise).
    residual_l1 : float
        Largest l1 norm of the exact dual-equality residuals charged to the bound.
    psd_shift : float
        Largest eigenvalue shift ``t`` added to a dual matrix to make it provably PSD.
    slope : dict
        Dual multipliers of the constraints ``name -> nu`` (``d bound / d lo`` is ``-nu`` for a
        lower-bounded constraint): with ``offset`` they give an affine upper bound valid for ANY
        constraint value, see :meth:`bound_at`.
    offset : float
        Rounded-up constant part of the affine bound (see :meth:`bound_at`).
    """

    upper_bound: float
    solver_value: float
    margin: float
    residual_l1: float
    psd_shift: float
    solver: str
    status: str
    level: str
    boxes: int
    slope: dict
    offset: float
    constraint_values: dict

    def bound_at(self, lower_values: dict) -> float:
        """Re-evaluate the certificate with other lower-bound constraint values.

        The dual certificate does not depend on the right-hand sides, so for one constraint
        "functional >= s" the bound ``offset - nu * s`` is valid for every s (weak duality [7]).
        Only lower-bounded constraints may be changed; evaluated exactly and rounded up.
        """
        total = Fraction(self.offset)
        for name, value in lower_values.items():
            total -= Fraction(self.slope[name]) * Fraction(float(value))
        return _round_up(total)


def _round_up(q: Fraction) -> float:
    f = float(q)
    if Fraction(f) < q:
        f = math.nextafter(f, math.inf)
    return f


def _exactly_positive_definite(rows: list[list[Fraction]]) -> bool:
    """True iff the symmetric rational matrix is positive definite, decided exactly.

    Scales to integers and runs fraction-free (Bareiss) elimination: after step k the pivot
    is the (k+1)-th leading principal minor, and a symmetric matrix is positive definite iff
    all of them are positive (Sylvester's criterion).
    """
    n = len(rows)
    den = 1
    for r in rows:
        for v in r:
            den = math.lcm(den, v.denominator)
    m = [[v.numerator * (den // v.denominator) for v in r] for r in rows]
    prev = 1
    for k in range(n):
        piv = m[k][k]
        if piv <= 0:
            return False
        mk = m[k]
        for i in range(k + 1, n):
            mi = m[i]
            f = mi[k]
            for j in range(k + 1, n):
                mi[j] = (mi[j] * piv - f * mk[j]) // prev
        prev = piv
    return True


def _certify_psd(z: np.ndarray) -> tuple[list[list[Fraction]], float]:
    """Symmetrise ``z`` and shift it by t*I until it is provably positive definite."""
    z = 0.5 * (z + z.T)
    d = z.shape[0]
    scale = max(1.0, float(np.max(np.abs(z))))
    eig = float(np.linalg.eigvalsh(z)[0])
    t = max(0.0, -eig) + 64.0 * d * np.finfo(float).eps * scale
    for _ in range(40):
        rows = [[Fraction(float(z[i, j])) for j in range(d)] for i in range(d)]
        ft = Fraction(t)
        for i in range(d):
            rows[i][i] += ft
        if _exactly_positive_definite(rows):
            return rows, t
        t = 2.0 * t + 1e-300
    raise SolverError("could not repair the dual matrix to an exactly PSD certificate", "psd-repair")


def _signature(level: str, objectives: list[dict], constraints: list[_Constraint]) -> tuple:
    objs = tuple(tuple(sorted(o.items())) for o in objectives)
    cons = tuple(
        (tuple(sorted(c.form.items())), c.lo is not None, c.hi is not None) for c in constraints
    )
    return (level, objs, cons)


@functools.lru_cache(maxsize=32)
def _dual_problem(signature: tuple):
    """Build (once per problem shape) the parametrised dual SDP; right-hand sides are parameters.

    Caching the compiled problem matters for curves and tables: cvxpy's compilation costs more
    than the interior-point solve of these small SDPs.
    """
    import cvxpy as cp
    import scipy.sparse as sp

    level, objs, cons_sig = signature
    struct = moment_structure(level)
    d, nm, ne = struct.size, struct.n_moments, len(objs)
    idx = struct.index
    adj = sp.csr_matrix(struct.adjoint_map())

    def vec(items) -> np.ndarray:
        v = np.zeros(nm)
        for w, c in items:
            v[idx[w]] += float(c)
        return v

    a_lo = np.array([vec(f) for f, lo, _ in cons_sig if lo]).reshape(-1, nm)
    a_hi = np.array([vec(f) for f, _, hi in cons_sig if hi]).reshape(-1, nm)
    n_lo, n_hi = a_lo.shape[0], a_hi.shape[0]
    lam0 = cp.Variable()
    nu_lo = cp.Variable(n_lo, nonneg=True) if n_lo else None
    nu_hi = cp.Variable(n_hi, nonneg=True) if n_hi else None
    p_lo = cp.Parameter(n_lo) if n_lo else None
    p_hi = cp.Parameter(n_hi) if n_hi else None
    zs = [cp.Variable((d, d), symmetric=True) for _ in range(ne)]
    e0 = np.zeros(nm)
    e0[0] = 1.0
    cons = []
    for e in range(ne):
        r = vec(objs[e]) - lam0 * e0 + adj @ cp.vec(zs[e], order="C")
        if nu_lo is not None:
            r = r + a_lo.T @ nu_lo
        if nu_hi is not None:
            r = r - a_hi.T @ nu_hi
        cons += [r == 0, zs[e] >> 0]
    obj = lam0
    if nu_lo is not None:
        obj = obj - p_lo @ nu_lo
    if nu_hi is not None:
        obj = obj + p_hi @ nu_hi
    prob = cp.Problem(cp.Minimize(obj), cons)
    return prob, zs, nu_lo, nu_hi, p_lo, p_hi


def _solve_dual(
    struct: MomentStructure,
    objectives: list[dict],
    constraints: list[_Constraint],
    solver: str,
):
    """Solve the dual SDP; return (Z list, nu_lo, nu_hi, value, status) in floats."""
    import cvxpy as cp

    prob, zs, nu_lo, nu_hi, p_lo, p_hi = _dual_problem(
        _signature(struct.level, objectives, constraints)
    )
    if p_lo is not None:
        p_lo.value = np.array([c.lo for c in constraints if c.lo is not None], dtype=float)
    if p_hi is not None:
        p_hi.value = np.array([c.hi for c in constraints if c.hi is not None], dtype=float)
    if solver == "CLARABEL":
        opts = dict(tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10, max_iter=400)
    elif solver == "SCS":
        opts = dict(eps_abs=1e-9, eps_rel=1e-9, max_iters=200000)
    else:
        opts = {}
    try:
        with warnings.catch_warnings():
            # "solution may be inaccurate": irrelevant, the certificate is checked exactly
            warnings.simplefilter("ignore")
            # no warm start: results must not depend on earlier calls (determinism)
            prob.solve(solver=solver, warm_start=False, **opts)
    except (cp.error.SolverError, ValueError, ArithmeticError) as exc:
        return None, None, None, math.nan, f"solver-error: {exc}"
    status = str(prob.status)
    if zs[0].value is None or prob.value is None:
        return None, None, None, math.nan, status
    return (
        [np.array(z.value, dtype=float) for z in zs],
        np.array(nu_lo.value, dtype=float) if nu_lo is not None else np.zeros(0),
        np.array(nu_hi.value, dtype=float) if nu_hi is not None else np.zeros(0),
        float(prob.value),
        status,
    )


def solve_certified(
    objectives: list[dict],
    constraints: list[_Constraint],
    *,
    level: str = "1+AB",
    solvers: Sequence[str] = ("CLARABEL", "SCS"),
) -> NpaCertificate:
    """Certified upper bound on ``max sum_e objectives[e](m_e)`` over NPA decompositions.

    Each ``objectives[e]`` is a linear form (Word -> Fraction) on the moments of sub-box
    ``e``; the sub-boxes have PSD moment matrices, normalisations summing to 1, and their sum
    satisfies each constraint ``lo <= form <= hi``. Expert primitive; the guessing and Bell
    functions below are the usual entry points.

    Raises
    ------
    SolverError
        If no solver returns a usable certificate (status attached), or the constraints are
        infeasible (the dual is unbounded).
    """
    struct = moment_structure(level)
    for c in constraints:
        for v in (c.lo, c.hi):
            if v is not None and not math.isfinite(v):
                raise ParameterError(f"{c.name}: constraint value must be finite, got {v!r}")
    last_status = "not-run"
    for solver in solvers:
        zs, nu_lo, nu_hi, value, status = _solve_dual(struct, objectives, constraints, solver)
        last_status = status
        if status in ("infeasible", "unbounded", "infeasible_inaccurate", "unbounded_inaccurate"):
            if status.startswith("unbounded"):
                raise SolverError(
                    "the constraints admit no quantum box at this NPA level (observed statistics "
                    "outside the quantum set, e.g. a statistical fluctuation); use a CHSH bound "
                    "or a tolerance",
                    status,
                )
            continue
        if zs is None or status not in ("optimal", "optimal_inaccurate"):
            continue
        cert = _certificate(struct, objectives, constraints, zs, nu_lo, nu_hi, value, solver, status)
        if math.isfinite(cert.upper_bound):
            return cert
    raise SolverError("no NPA solver produced a usable dual certificate", last_status)


def _certificate(struct, objectives, constraints, zs, nu_lo, nu_hi, value, solver, status):
    idx = struct.index
    nm = struct.n_moments
    cons_lo = [c for c in constraints if c.lo is not None]
    cons_hi = [c for c in constraints if c.hi is not None]
    # dual multipliers: exact rationals of the (clipped) floats
    nlo = [Fraction(max(0.0, float(v))) for v in nu_lo]
    nhi = [Fraction(max(0.0, float(v))) for v in nu_hi]
    # the part of the residual common to all sub-boxes: sum_j (nu_lo - nu_hi) a_j
    common = [Fraction(0)] * nm
    for nu, c in zip(nlo, cons_lo, strict=True):
        for w, v in c.form.items():
            common[idx[w]] += nu * v
    for nu, c in zip(nhi, cons_hi, strict=True):
        for w, v in c.form.items():
            common[idx[w]] -= nu * v
    worst = None
    worst_res = Fraction(0)
    max_shift = 0.0
    for e, obj in enumerate(objectives):
        rows, t = _certify_psd(zs[e])
        max_shift = max(max_shift, t)
        r = common[:]
        for w, v in obj.items():
            r[idx[w]] += v
        for k, pos in enumerate(struct.positions):
            s = Fraction(0)
            for i, j in pos:
                s += rows[i][j]
            r[k] += s
        # c^T m <= D + sum_e q_e (r_e0 + sum_{k>=1} |r_ek|), and sum_e q_e = 1, q_e >= 0
        res_abs = sum((abs(x) for x in r[1:]), Fraction(0))
        term = r[0] + res_abs
        worst_res = max(worst_res, res_abs)
        worst = term if worst is None else max(worst, term)
    const = worst
    for nu, c in zip(nhi, cons_hi, strict=True):
        const += nu * Fraction(float(c.hi))
    lower_part = Fraction(0)
    for nu, c in zip(nlo, cons_lo, strict=True):
        lower_part += nu * Fraction(float(c.lo))
    ub = _round_up(const - lower_part)
    return NpaCertificate(
        upper_bound=ub,
        solver_value=value,
        margin=ub - value,
        residual_l1=float(worst_res),
        psd_shift=max_shift,
        solver=solver,
        status=status,
        level=struct.level,
        boxes=len(objectives),
        slope={c.name: float(nu) for nu, c in zip(nlo, cons_lo, strict=True)},
        offset=_round_up(const),
        constraint_values={c.name: [c.lo, c.hi] for c in constraints},
    )


# ---------------------------------------------------------------------------------------------
# Public entry points
# ---------------------------------------------------------------------------------------------


def _check_level(level: str) -> None:
    if level not in LEVELS:
        raise ParameterError(f"level: expected one of {', '.join(LEVELS)}, got {level!r}")


def max_bell_value(coefficients, *, level: str = "1") -> NpaCertificate:
    """Certified upper bound on the quantum maximum of a Bell functional.

    Parameters
    ----------
    coefficients : array_like, 16 numbers c[x][y][a][b] over p(ab|xy)
    level : {"1", "1+AB", "2"}

    Returns
    -------
    NpaCertificate
        ``upper_bound`` >= the maximum of sum c p(ab|xy) over quantum boxes. For CHSH this
        is 2*sqrt(2) up to the certificate margin [5].

    References
    ----------
    Navascues, Pironio, Acin (2007, 2008) [1]; Cirel'son (1980) [5].
    """
    _check_level(level)
    return solve_certified([functional_moments(coefficients)], [], level=level)


def _box_constraints(
    *,
    bell: tuple[np.ndarray, float] | None,
    correlators: Correlators | None,
    tolerance: float,
) -> list[_Constraint]:
    cons: list[_Constraint] = []
    if bell is not None:
        coeffs, value = bell
        value = float(value)
        if not math.isfinite(value):
            raise ParameterError(f"bell value must be finite, got {value!r}")
        cons.append(_Constraint(functional_moments(coeffs), value, None, "bell"))
    if correlators is not None:
        if not (tolerance >= 0.0 and math.isfinite(tolerance)):
            raise ParameterError(f"tolerance: expected a finite number >= 0, got {tolerance!r}")
        items = [(f"<A{x}>", _a(x), correlators.alice[x]) for x in (0, 1)]
        items += [(f"<B{y}>", _b(y), correlators.bob[y]) for y in (0, 1)]
        items += [
            (f"<A{x}B{y}>", _ab(x, y), correlators.joint[x][y]) for x in (0, 1) for y in (0, 1)
        ]
        for name, w, v in items:
            v = float(v)
            if not (math.isfinite(v) and -1.0 <= v <= 1.0):
                raise ParameterError(f"correlators: {name} must lie in [-1, 1], got {v!r}")
            lo, hi = v - tolerance, v + tolerance
            if tolerance > 0.0:  # widen by one ulp so float rounding never narrows the interval
                lo, hi = math.nextafter(lo, -math.inf), math.nextafter(hi, math.inf)
            cons.append(_Constraint({w: Fraction(1)}, lo, hi, name))
    return cons


def guessing_probability(
    *,
    parties: str = "A",
    inputs: tuple[int, int] = (0, 0),
    bell: tuple[object, float] | None = None,
    chsh: float | None = None,
    correlators: Correlators | None = None,
    tolerance: float = 0.0,
    level: str = "1+AB",
) -> NpaCertificate:
    """Certified upper bound on an adversary's probability of guessing the outcome(s).

    Parameters
    ----------
    parties : {"A", "AB"}
        Guess Alice's outcome for input ``x*`` or the pair for inputs ``(x*, y*)``.
    inputs : (int, int)
        ``(x*, y*)``; ``y*`` is ignored for ``parties="A"``.
    bell : (coefficients, value), optional
        Constrain a Bell functional (16 coefficients c[x][y][a][b]) to be >= value.
    chsh : float, optional
        Shorthand for ``bell=(chsh_coefficients(), chsh)``; clamped to at most
        :data:`CHSH_CEILING` (an observed value above Tsirelson's bound is a fluctuation).
    correlators : Correlators, optional
        Constrain the full correlators to the observed values (within ``tolerance``) [3, 4].
    level : {"1", "1+AB", "2"}

    Returns
    -------
    NpaCertificate
        ``upper_bound`` is a valid bound on the guessing probability; ``-log2`` of it a valid
        lower bound on the min-entropy against quantum side information, given the constraint.

    References
    ----------
    Pironio et al. (2010) [2]; Nieto-Silleras, Pironio, Silman (2014) [3]; Bancal, Sheridan,
    Scarani (2014) [4].
    """
    _check_level(level)
    if parties not in ("A", "AB"):
        raise ParameterError(f"parties: expected 'A' or 'AB', got {parties!r}")
    x0, y0 = int(inputs[0]), int(inputs[1])
    if x0 not in (0, 1) or y0 not in (0, 1):
        raise ParameterError(f"inputs: expected bits (x*, y*), got {inputs!r}")
    if chsh is not None:
        if bell is not None:
            raise ParameterError("give either chsh or bell, not both")
        s = float(chsh)
        if not math.isfinite(s):
            raise ParameterError(f"chsh: expected a finite number, got {chsh!r}")
        bell = (chsh_coefficients(), min(s, CHSH_CEILING))
    cons = _box_constraints(bell=bell, correlators=correlators, tolerance=tolerance)
    if parties == "A":
        objectives = [
            {IDENTITY: Fraction(1, 2), _a(x0): Fraction(1 - 2 * e, 2)} for e in (0, 1)
        ]
    else:
        objectives = []
        for ea in (0, 1):
            for eb in (0, 1):
                sa, sb = 1 - 2 * ea, 1 - 2 * eb
                objectives.append(
                    {
                        IDENTITY: Fraction(1, 4),
                        _a(x0): Fraction(sa, 4),
                        _b(y0): Fraction(sb, 4),
                        _ab(x0, y0): Fraction(sa * sb, 4),
                    }
                )
    return solve_certified(objectives, cons, level=level)


def min_entropy_from_guessing(p_guess: float) -> float:
    """-log2(p_guess) rounded DOWN (a few ulps), clamped to >= 0; p_guess above 1 gives 0."""
    if not (p_guess > 0.0):
        raise SolverError("certified guessing probability is not positive", "invalid-certificate")
    if p_guess >= 1.0:
        return 0.0
    h = -math.log2(p_guess)
    return max(0.0, h - 4.0 * math.ulp(h))


__all__ = [
    "CHSH_CEILING",
    "LEVELS",
    "NPA_REFERENCES",
    "Correlators",
    "MomentStructure",
    "NpaCertificate",
    "ch_eberhard_coefficients",
    "chsh_coefficients",
    "correlators_from_counts",
    "functional_moments",
    "guessing_probability",
    "max_bell_value",
    "min_entropy_from_guessing",
    "moment_structure",
    "solve_certified",
]
