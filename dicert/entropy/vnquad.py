r"""Von Neumann entropy bounds by Gauss-Radau quadrature, dual-certified (one party or the pair).

Bounds H(A | X=0, E) ("A") and H(AB | X=0, Y=0, E) ("AB") for CHSH devices against an adversary
holding quantum side information, as an **affine function of the CHSH win probability w valid
for every quantum strategy**: ``H >= offset + slope * w``. Method of Brown, Fawzi & Fawzi [BFF]
(Quantum 8, 1445 (2024), arXiv:2106.13692), with per-node SDPs and exactly checked duals.

Derivation ("[BFF]" marks a step that is theirs, sections as in arXiv:2106.13692; their
theorem and equation numbers were not re-checked against the published version, so every step
is also re-derived here, "[D]", and tested numerically on random states in the tests)
----------------------------------------------------------------------------------------------
1. Integral representation. ln x = int_0^1 f_t(x) dt with f_t(x) = (x - 1)/(t (x - 1) + 1);
   H(A|E) ln 2 = -D(rho_AE || 1_A (x) rho_E) ln 2 = <rho^1/2, ln(Delta) rho^1/2> with the
   relative modular operator Delta (X -> sigma X rho^-1), sigma = 1_A (x) rho_E ([BFF] sec. 2).
2. Quadrature in the valid direction. For the m-point Gauss-Radau rule on [0, 1] with the right
   end point t_m = 1 fixed (:mod:`dicert.entropy.quadrature`) the error is
   int - Q_m = -c_m d^(2m-1)/dt^(2m-1) f_t(x) |_(t=xi) with c_m > 0, and
   d^(2m-1) f_t / dt^(2m-1) = -(2m-1)! (x - 1)^(2m) / (t (x - 1) + 1)^(2m) <= 0, so
   r_m(x) := sum_i w_i f_(t_i)(x) <= ln x for every x > 0. (The error term of [AS] 25.4.31,
   E = 2^(2m-1) m ((m-1)!)^4 / ((2m-1)!)^3 f^(2m-1)(xi) for the fixed node at -1, changes sign
   under the reflection to the fixed node +1 because 2m - 1 is odd; [BFF] sec. 2 choose the
   Radau rule with the fixed node at t = 1 for this reason. Checked numerically in the tests.)
   Functional calculus on Delta then gives H ln 2 >= sum_i w_i <rho^1/2, f_(t_i)(Delta)
   rho^1/2>.
3. Variational form of each node ([BFF] sec. 2, re-derived [D]): for t in (0, 1],
   <rho^1/2, f_t(Delta) rho^1/2> = (1/t) (1 + inf_Z { Tr rho (Z + Z* + (1 - t) Z* Z)
   + t Tr sigma Z Z* }); for a classical-quantum rho the optimal Z is block diagonal,
   Z = sum_a |a><a| (x) Z_a, and in the device picture the infimum reads
   sum_a < M_a (x) (Z_a + Z_a* + (1 - t) Z_a* Z_a) + t 1 (x) Z_a Z_a* >, M_a Alice's
   projector (M_a N_b for the pair), Z_a on Eve's system.
4. The node t_m = 1 is dropped (as in [BFF]'s statement of the bound). Valid because its term is
   >= 0 [D]: it equals w_m (1 - sum_a Tr rho_E^-1 rho_a^2) and rho_a <= rho_E gives
   Tr rho_E^-1 rho_a^2 <= Tr rho_a. Hence (Brown, Fawzi & Fawzi, Quantum 8, 1445 (2024))

       H ln 2 >= sum_{i<m} (w_i / t_i) (1 + inf_i),

   i.e. H >= c_m + sum_{i<m} w_i/(t_i ln 2) inf_i with c_m = sum_{i<m} w_i/(t_i ln 2).
5. One SDP per node [D]: the infimum of a sum is at least the sum of the infima, so each node
   is relaxed separately (each may use its own strategy; valid, slightly looser).
6. Relaxation: real NPA-type moment matrices, one block per outcome a holding the operators
   {1, A_x, B_y, A_x B_y} and {Z_a, Z_a*, A_x Z_a, A_x Z_a*, B_y Z_a, B_y Z_a*} (level "z1";
   "z2" also adds A_x B_y Z_a, A_x B_y Z_a*), blocks sharing the moments of the device
   operators. Alice's and Bob's +-1 observables square to 1 and commute with each other and
   with Eve's Z's (no further relation on Z). Real parts of a complex moment matrix are
   feasible with the same value of every self-adjoint objective, so the real relaxation is a
   relaxation.
7. Certificate [D]: the dual gives nu >= 0 and PSD matrices Y_a; with the exact residual
   r = c - nu a - sum_a Gamma_a^*(Y_a) (c the objective, a the win-probability form),
   objective(y) = r_0 + nu w(y) + sum_a <Y_a, Gamma_a(y)> + sum_(k>=1) r_k y_k for every
   moment vector y. Each Y_a is symmetrised and shifted by s I until an exact rational
   factorisation proves it positive definite (:func:`dicert.entropy.npa._certify_psd`), the
   residual is computed exactly in rationals, and |y_k| <= alpha^(number of Z letters of
   word k) at the minimiser (alpha from :func:`z_norm_bound`) charges it:
   inf_i >= lambda_i + nu_i w with lambda_i = r_0 - sum_k |r_k| alpha^(deg k), for EVERY
   strategy whatever its win probability w (affine in w, valid for all w). No primal value
   and no unrepaired solver number reaches the bound. Nodes and weights are exact rationals (rounded
   from 60-digit values); the final division by ln 2 is done in mpmath and rounded down, with
   a 1e-12 safety term that covers the rounding of the nodes.

Cost and tightness (measured on the 2-core build machine, shared; w = 0.85, m = 8)
-----------------------------------------------------------------------------------
- one party, "z1" (2 blocks of 19, 129 moments): 0.879 bits (G = 0.9185), 2 s, 140 MB peak;
- one party, "z2" (2 x 27, 185 moments): 0.911 bits, 4.5 s, 164 MB;
- pair, "z2" (4 x 27, 353 moments): 1.315 bits, 14 s (7 SDPs, about 2 s each), 200 MB;
  m = 12 gives the same value (the quadrature has converged); "z1" is unbounded for the pair
  (the moment <A_0 B_0 Z* Z> is then unconstrained); device level 2 and Eve words Z Z*, Z* Z
  in the operator list move single nodes by < 0.02 at 3-10 times the cost; one joint SDP
  over all nodes (28 blocks) gives 1.351 (uncertified, 12 s).
- explicit attacks at w = 0.85: the noisy maximally entangled state gives 1.534, a partially
  entangled two-qubit state found by local search 1.376 (tests' numpy model), so the
  certified 1.315 is within 0.06 of the infimum there.

References
----------
.. [BFF] P. Brown, H. Fawzi, O. Fawzi, "Device-independent lower bounds on the conditional von
   Neumann entropy", Quantum 8, 1445 (2024), arXiv:2106.13692.
.. [NPA] M. Navascues, S. Pironio, A. Acin, New J. Phys. 10, 073013 (2008).
.. [AS] M. Abramowitz, I. Stegun, Handbook of Mathematical Functions (1964), 25.4.31.
.. [BRC23] R. Bhavsar, S. Ragy, R. Colbeck, arXiv:2103.07504 (two-sided CHSH randomness;
   explicit attacks, for comparison).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import warnings
from fractions import Fraction

import numpy as np

from dicert.entropy.npa import _reduce
from dicert.errors import ParameterError, SolverError

ZLEVELS = ("z1", "z2")
DEFAULT_NODES = 8
DEFAULT_ZLEVEL = "z2"
#: Safety subtracted from every certified offset (covers rounding of nodes and weights).
SAFETY = 1e-12
REFERENCE = ("P. Brown, H. Fawzi, O. Fawzi, Quantum 8, 1445 (2024), arXiv:2106.13692 "
             "(Gauss-Radau quadrature bound on the conditional von Neumann entropy)")

Word = tuple  # (alice letters, bob letters, eve letters)
ID: Word = ((), (), ())


def _adj_e(e: tuple) -> tuple:
    return tuple(x ^ 1 for x in reversed(e))


def _adj(w: Word) -> Word:
    return (tuple(reversed(w[0])), tuple(reversed(w[1])), _adj_e(w[2]))


def _canon(w: Word) -> Word:
    return min(w, _adj(w))


def _prod(parties: str, wi: Word, wj: Word) -> tuple[int, Word]:
    """Sign and canonical word of O_i^dagger O_j."""
    a = _reduce(tuple(reversed(wi[0])) + wj[0])
    b = _reduce(tuple(reversed(wi[1])) + wj[1])
    e = _adj_e(wi[2]) + wj[2]
    return 1, _canon((a, b, e))


def _block_ops(parties: str, j: int, zlevel: str) -> list[Word]:
    """Operators of block j: the device operators {1, A_x, B_y, A_x B_y} and Eve's Z_j, Z_j*,
    alone and times A_x and B_y (level "z1"); "z2" adds A_x B_y Z_j and A_x B_y Z_j*."""
    z, zs = (2 * j,), (2 * j + 1,)
    ops: list[Word] = [ID, ((0,), (), ()), ((1,), (), ()), ((), (0,), ()), ((), (1,), ())]
    ops += [((x,), (y,), ()) for x in (0, 1) for y in (0, 1)]
    for e in (z, zs):
        ops += [((), (), e)] + [((x,), (), e) for x in (0, 1)] + [((), (y,), e) for y in (0, 1)]
    if zlevel == "z2":
        for e in (z, zs):
            ops += [((x,), (y,), e) for x in (0, 1) for y in (0, 1)]
    return ops


@dataclasses.dataclass(frozen=True, slots=True)
class _Structure:
    parties: str
    zlevel: str
    blocks: tuple  # per block: tuple of operator words
    words: tuple
    index: dict
    positions: tuple  # per moment: tuple of (block, i, j, sign): Gamma_b[i, j] = sign * y_k


@functools.lru_cache(maxsize=8)
def _structure(parties: str, zlevel: str) -> _Structure:
    nb = 2 if parties == "A" else 4
    blocks = tuple(tuple(_block_ops(parties, j, zlevel)) for j in range(nb))
    index: dict = {ID: 0}
    words: list = [ID]
    pos: dict = {0: []}
    for b, ops in enumerate(blocks):
        for i, wi in enumerate(ops):
            for j, wj in enumerate(ops):
                sign, w = _prod(parties, wi, wj)
                if w not in index:
                    index[w] = len(words)
                    words.append(w)
                    pos[index[w]] = []
                pos[index[w]].append((b, i, j, sign))
    assert all(sg == 1 for _, i, j, sg in pos[0]) and all(i == j for _, i, j, _ in pos[0])
    return _Structure(parties=parties, zlevel=zlevel, blocks=blocks, words=tuple(words),
                      index=index, positions=tuple(tuple(pos[k]) for k in range(len(words))))


def _win_form() -> dict:
    """w = 1/2 + S/8 as an exact linear form in the moments."""
    from dicert.entropy.npa import chsh_coefficients, functional_moments

    out = {ID: Fraction(1, 2)}
    for (aw, bw), v in functional_moments(chsh_coefficients()).items():
        w = _canon((aw, bw, ()))
        out[w] = out.get(w, Fraction(0)) + v / 8
    return out


def _projector_terms(parties: str, j: int) -> list[tuple[Word, Fraction]]:
    """M_a = (1 + s A_0)/2 (one party) or M_a N_b (pair, inputs (0, 0)) as device words."""
    if parties == "A":
        s = 1 - 2 * j
        return [(((), ()), Fraction(1, 2)), (((0,), ()), Fraction(s, 2))]
    a, b = divmod(j, 2)
    sa, sb = 1 - 2 * a, 1 - 2 * b
    return [(((), ()), Fraction(1, 4)), (((0,), ()), Fraction(sa, 4)),
            (((), (0,)), Fraction(sb, 4)), (((0,), (0,)), Fraction(sa * sb, 4))]


def _objective(struct: _Structure, t: Fraction) -> dict:
    """Node objective sum_a <M_a (Z_a + Z_a* + (1-t) Z_a* Z_a) + t Z_a Z_a*> as a form."""
    out: dict = {}

    def add(w, v):
        w = _canon(w)
        out[w] = out.get(w, Fraction(0)) + v

    for j in range(len(struct.blocks)):
        z, zs = 2 * j, 2 * j + 1
        for (aw, bw), c in _projector_terms(struct.parties, j):
            add((aw, bw, (z,)), c)
            add((aw, bw, (zs,)), c)
            add((aw, bw, (zs, z)), (1 - t) * c)
        add(((), (), (z, zs)), t)
    return {w: v for w, v in out.items() if v != 0}


def _vec(struct: _Structure, form: dict) -> np.ndarray:
    v = np.zeros(len(struct.words))
    for w, c in form.items():
        v[struct.index[w]] += float(c)
    return v


@functools.lru_cache(maxsize=8)
def _dual_problem(parties: str, zlevel: str):
    """Parametrised dual SDP (compiled once per structure): maximise lambda + nu w0 subject to
    c - lambda e_0 - nu a = sum_b adj_b(Y_b), Y_b >= eps I (eps = 0 in use), nu >= 0."""
    import cvxpy as cp
    import scipy.sparse as sp

    struct = _structure(parties, zlevel)
    nm = len(struct.words)
    sizes = [len(ops) for ops in struct.blocks]
    rows = [[] for _ in sizes]
    cols = [[] for _ in sizes]
    vals = [[] for _ in sizes]
    for k, pos in enumerate(struct.positions):
        for b, i, j, sg in pos:
            rows[b].append(k)
            cols[b].append(i * sizes[b] + j)
            vals[b].append(float(sg))
    adj = [sp.csr_matrix((vals[b], (rows[b], cols[b])), shape=(nm, d * d))
           for b, d in enumerate(sizes)]
    a = _vec(struct, _win_form())
    e0 = np.zeros(nm)
    e0[0] = 1.0
    c = cp.Parameter(nm)
    w0 = cp.Parameter()
    eps = cp.Parameter(nonneg=True)
    lam = cp.Variable()
    nu = cp.Variable(nonneg=True)
    ys = [cp.Variable((d, d), symmetric=True) for d in sizes]
    r = c - lam * e0 - nu * a
    for b, y in enumerate(ys):
        r = r - adj[b] @ cp.vec(y, order="C")
    cons = [r == 0] + [y - eps * np.eye(d) >> 0 for y, d in zip(ys, sizes, strict=True)]
    prob = cp.Problem(cp.Maximize(lam + nu * w0), cons)
    return prob, c, w0, eps, lam, nu, ys


def z_norm_bound(t: Fraction) -> Fraction:
    """A rational upper bound on ||Z_a|| at a minimiser of node t: 1/(2 sqrt(t (1 - t))) [D].

    Derivation: for a state rho_E on Eve's (finite-dimensional) system and rho_a =
    Tr_Q[(M_a (x) 1) psi] <= rho_E, the node objective is a convex quadratic in Z_a whose
    stationary point solves the Sylvester equation t rho_E Z + (1 - t) Z rho_a = -rho_a, i.e.
    Z = -int_0^inf exp(-s t rho_E) rho_a exp(-s (1-t) rho_a) ds (restricted to supp rho_E,
    which never increases the objective). Cauchy-Schwarz under the integral and rho_a <= rho_E
    give |<u, Z v>| <= (1/(2t))^(1/2) (1/(2(1-t)))^(1/2) for unit u, v. So the infimum over
    Z equals the infimum over ||Z|| <= this bound, and every moment of a word with k letters Z
    or Z* (and +-1 observables) has modulus <= bound^k at the minimiser. Checked numerically
    against scipy.linalg.solve_sylvester in the tests.
    """
    t = Fraction(t)
    q = 4 * t * (1 - t)
    # rational r >= 1/sqrt(q): round sqrt(q) down, then invert
    root = Fraction(math.isqrt(int(q * 10**36)), 10**18)
    while root * root > q:  # pragma: no cover - isqrt rounds down already
        root -= Fraction(1, 10**18)
    return 1 / root


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class NodeCertificate:
    """An exactly verified affine lower bound ``inf_t >= lam + nu * w`` for one node t.

    ``lam`` and ``nu`` are exact rationals, valid for every quantum strategy whatever its win
    probability w. ``solver_value`` is the solver's own dual objective at ``w0`` (information
    only); ``charge`` what the exact residuals cost (charged with :func:`z_norm_bound`);
    ``psd_shift`` the largest shift added to a dual block to make it provably positive
    definite.
    """

    t: Fraction
    w0: float
    lam: Fraction
    nu: Fraction
    solver_value: float
    solver: str
    status: str
    charge: float
    psd_shift: float
    matrix_sizes: tuple[int, ...]

    def value_at(self, w: float) -> float:
        return float(self.lam + self.nu * Fraction(float(w)))


def _certify_node(struct: _Structure, cform: dict, t: Fraction, ys: list[np.ndarray],
                  nu: float) -> tuple[Fraction, Fraction, Fraction, float]:
    """Exact (lambda, nu, charge, shift) from a float dual solution (module docstring, 7)."""
    from dicert.entropy.npa import _certify_psd

    nm = len(struct.words)
    nu_q = Fraction(max(0.0, float(nu)))
    target = [Fraction(0)] * nm
    for w, v in cform.items():
        target[struct.index[w]] += v
    for w, v in _win_form().items():
        target[struct.index[w]] -= nu_q * v
    mats, shift = [], 0.0
    for y in ys:
        rows, sh = _certify_psd(y)
        mats.append(rows)
        shift = max(shift, sh)
    alpha = z_norm_bound(t)
    charge = Fraction(0)
    lam = None
    for k in range(nm):
        s = Fraction(0)
        for b, i, j, sg in struct.positions[k]:
            s += sg * mats[b][i][j]
        r = target[k] - s
        if k == 0:
            lam = r
        elif r != 0:
            charge += abs(r) * alpha ** len(struct.words[k][2])
    return lam - charge, nu_q, charge, shift


def solve_node(t: Fraction, w0: float, *, parties: str = "AB", zlevel: str = DEFAULT_ZLEVEL,
               solvers=("CLARABEL", "SCS")) -> NodeCertificate:
    """Certified affine lower bound on the infimum of node ``t`` (see the module docstring).

    ``w0`` is the win probability at which the dual is optimised (the bound holds for all w).
    """
    import cvxpy as cp

    if parties not in ("A", "AB"):
        raise ParameterError(f"parties: expected 'A' or 'AB', got {parties!r}")
    if zlevel not in ZLEVELS:
        raise ParameterError(f"level: expected one of {', '.join(ZLEVELS)}, got {zlevel!r}")
    t = Fraction(t)
    if not (0 < t < 1):
        raise ParameterError(f"node t must lie in (0, 1), got {float(t)!r}")
    struct = _structure(parties, zlevel)
    cform = _objective(struct, t)
    prob, c, w0p, epsp, lam, nu, ys = _dual_problem(parties, zlevel)
    c.value = _vec(struct, cform)
    w0p.value = float(w0)
    epsp.value = 0.0
    last = "not-run"
    best = None
    for solver in solvers:
        opts = (dict(tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10, max_iter=400)
                if solver == "CLARABEL" else dict(eps_abs=1e-9, eps_rel=1e-9, max_iters=200000))
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                prob.solve(solver=solver, warm_start=False, **opts)
        except (cp.error.SolverError, ValueError, ArithmeticError) as exc:
            last = f"solver-error: {exc}"
            continue
        last = str(prob.status)
        if ys[0].value is None or prob.status not in ("optimal", "optimal_inaccurate"):
            continue
        lam_q, nu_q, charge, shift = _certify_node(
            struct, cform, t, [np.array(y.value, dtype=float) for y in ys], float(nu.value))
        cert = NodeCertificate(t=t, w0=float(w0), lam=lam_q, nu=nu_q,
                               solver_value=float(prob.value), solver=solver, status=last,
                               charge=float(charge), psd_shift=shift,
                               matrix_sizes=tuple(len(o) for o in struct.blocks))
        if best is None or cert.value_at(w0) > best.value_at(w0):
            best = cert
        if best.solver_value - best.value_at(w0) < 1e-3:
            break
    if best is None:
        raise SolverError("no solver produced a usable dual certificate", last)
    return best


# --------------------------------------------------------------------------- assembling a bound


@functools.lru_cache(maxsize=2)
def _inv_ln2_bracket() -> tuple[Fraction, Fraction]:
    """Rationals lo <= 1/ln 2 <= hi (mpmath, 50 digits, widened by 1e-45)."""
    import mpmath

    with mpmath.workdps(50):
        v = Fraction(mpmath.nstr(1 / mpmath.log(2), 48, min_fixed=-1, max_fixed=1))
    return v - Fraction(1, 10**45), v + Fraction(1, 10**45)


def _round_down(q: Fraction) -> float:
    f = float(q)
    if Fraction(f) > q:
        f = math.nextafter(f, -math.inf)
    return f


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class QuadratureBound:
    """``H >= offset + slope * w`` (bits) for EVERY quantum strategy with CHSH win probability w.

    ``parties`` "A" (H(A|X=0,E)) or "AB" (H(AB|X=0,Y=0,E)); ``w0`` where the duals were
    optimised; ``nodes`` the quadrature size m (m - 1 SDPs, node t_m = 1 dropped); ``level``
    the relaxation ("z1"/"z2", module docstring item 6); ``node_bounds`` per node
    (t, lambda, nu, solver value, charge) as floats for the record.
    """

    parties: str
    w0: float
    offset: float
    slope: float
    nodes: int
    level: str
    node_bounds: tuple = ()

    def at(self, w: float) -> float:
        """The line at w (may be negative; clamp at 0 for an entropy value)."""
        return self.offset + self.slope * float(w)


def certified_line(w0: float, *, parties: str = "AB", nodes: int = DEFAULT_NODES,
                   level: str = DEFAULT_ZLEVEL) -> QuadratureBound:
    """Solve the m - 1 node SDPs at ``w0`` and assemble the certified affine bound (bits).

    H ln 2 >= sum_{i<m} (w_i/t_i) (1 + lambda_i + nu_i w) exactly (module docstring); the
    division by ln 2 uses a rational bracket of 1/ln 2 and rounds so that the float line lies
    below the exact one on [0, 1], minus :data:`SAFETY`.
    """
    from dicert.entropy.quadrature import radau_nodes

    w0 = float(w0)
    if not (0.0 <= w0 <= 1.0):
        raise ParameterError(f"win probability must lie in [0, 1], got {w0!r}")
    t, wts = radau_nodes(nodes)
    a_exact = Fraction(0)
    b_exact = Fraction(0)
    per = []
    for ti, wi in zip(t[:-1], wts[:-1], strict=True):
        cert = solve_node(ti, w0, parties=parties, zlevel=level)
        c = wi / ti
        a_exact += c * (1 + cert.lam)
        b_exact += c * cert.nu
        per.append({"t": float(ti), "weight": float(wi), "lambda": float(cert.lam),
                    "nu": float(cert.nu), "solver_value": cert.solver_value,
                    "charge": cert.charge, "solver": cert.solver})
    lo, hi = _inv_ln2_bracket()
    slope = float(b_exact * lo)
    d_lo = b_exact * lo - Fraction(slope)
    base = a_exact * (lo if a_exact >= 0 else hi)
    offset = _round_down(base + min(Fraction(0), d_lo) - Fraction(SAFETY))
    return QuadratureBound(parties=parties, w0=w0, offset=offset, slope=slope, nodes=nodes,
                           level=level, node_bounds=tuple(per))


# --------------------------------------------------------------------------- shipped table

TABLE_FORMAT = "dicert-vn-quadrature-table/1"
TABLE_FILE = "entropy_vn_quadrature_table.json"


def table_grid(points: int) -> list[float]:
    """Win probabilities from 3/4 to just below w*, uniform in sqrt(w* - w)."""
    from dicert.entropy.npa import CHSH_CEILING

    w_top = 0.5 + CHSH_CEILING / 8.0
    umax = math.sqrt(w_top - 0.75)
    out = [w_top - (umax * (1.0 - k / (points - 1))) ** 2 for k in range(points)]
    out[0], out[-1] = 0.75, w_top
    return out


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class VnTable:
    """Certified lines ``offset_k + slope_k w`` per parties; each is valid for every w."""

    lines: dict  # parties -> tuple of (w0, offset, slope)
    nodes: int
    level: str
    sha256: str
    meta: dict

    def bound(self, w: float, parties: str = "AB") -> tuple[float, int]:
        """max_k (offset_k + slope_k w), clamped below at 0, and the active line index."""
        if parties not in self.lines:
            raise ParameterError(f"parties: expected one of {sorted(self.lines)}, got {parties!r}")
        w = float(w)
        if not math.isfinite(w):
            raise ParameterError(f"win probability must be finite, got {w!r}")
        from dicert.entropy.analytic import W_QUANTUM

        w = min(w, W_QUANTUM)
        vals = [off + sl * w for _, off, sl in self.lines[parties]]
        k = int(np.argmax(vals))
        # exact evaluation of the chosen line, rounded down
        _, off, sl = self.lines[parties][k]
        v = _round_down(Fraction(off) + Fraction(sl) * Fraction(w))
        return max(0.0, v), k


def _table_path():
    from importlib import resources
    from pathlib import Path

    return Path(str(resources.files("dicert").joinpath("data", TABLE_FILE)))


@functools.lru_cache(maxsize=2)
def load_vn_table(path: str | None = None) -> VnTable:
    """Load the shipped quadrature table (or one at ``path``); cached."""
    import hashlib
    import json
    from pathlib import Path

    p = Path(path) if path is not None else _table_path()
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise ParameterError(f"{p}: quadrature table missing; rebuild it with "
                             "`python -m dicert.entropy.vnquad`") from None
    try:
        d = json.loads(raw)
        if d.get("format") != TABLE_FORMAT:
            raise ValueError(f"format {d.get('format')!r}, expected {TABLE_FORMAT!r}")
        lines = {}
        for parties, rows in d["lines"].items():
            got = tuple((float(r["w0"]), float(r["offset"]), float(r["slope"])) for r in rows)
            if not got or any(sl < 0 or not (math.isfinite(off) and math.isfinite(sl))
                              for _, off, sl in got):
                raise ValueError(f"lines.{parties}: empty, non-finite or negative slope")
            lines[parties] = got
        nodes, level = int(d["nodes"]), str(d["level"])
    except (ValueError, KeyError, TypeError) as exc:
        raise ParameterError(f"{p}: invalid quadrature table: {exc}") from None
    return VnTable(lines=lines, nodes=nodes, level=level,
                   sha256=hashlib.sha256(raw).hexdigest(), meta=dict(d.get("meta", {})))


def build_vn_table(points_ab: int = 20, points_a: int = 10, nodes: int = DEFAULT_NODES,
                   level: str = "z2", progress=None) -> dict:
    """Solve and certify the node SDPs on the grids; return the JSON document."""
    import cvxpy

    from dicert import __version__

    lines = {}
    for parties, pts in (("AB", points_ab), ("A", points_a)):
        rows = []
        for k, w0 in enumerate(table_grid(pts)):
            qb = certified_line(w0, parties=parties, nodes=nodes, level=level)
            rows.append({"w0": w0, "offset": qb.offset, "slope": qb.slope,
                         "value_at_w0": qb.at(w0)})
            if progress is not None:
                progress(parties, k, pts, qb)
        lines[parties] = rows
    return {
        "format": TABLE_FORMAT,
        "nodes": nodes,
        "level": level,
        "lines": lines,
        "meta": {
            "description": (
                "Certified affine lower bounds H >= offset + slope * w (bits) on "
                "H(AB|X=0,Y=0,E) (AB) and H(A|X=0,E) (A) for every quantum strategy with "
                "CHSH win probability w; each line is valid for all w. Gauss-Radau "
                f"quadrature with m = {nodes} nodes (t_m = 1 dropped), one dual-certified SDP "
                f"per node, relaxation {level}."),
            "reference": REFERENCE,
            "generator": "python -m dicert.entropy.vnquad",
            "dicert_version": __version__,
            "cvxpy_version": cvxpy.__version__,
        },
    }


def write_vn_table(path=None, **kw):
    """Build the table and write it atomically (default: the packaged data file)."""
    import json
    from pathlib import Path

    from dicert._io import atomic_write_bytes

    p = Path(path) if path is not None else _table_path()

    def progress(parties, k, n, qb):
        print(f"{parties} {k + 1}/{n} w0={qb.w0:.6f} H>={qb.at(qb.w0):.6f} slope={qb.slope:.4f}",
              flush=True)

    doc = build_vn_table(progress=progress, **kw)
    atomic_write_bytes(p, (json.dumps(doc, indent=1, sort_keys=True) + "\n").encode())
    load_vn_table.cache_clear()
    return p


__all__ = [
    "DEFAULT_NODES",
    "REFERENCE",
    "NodeCertificate",
    "QuadratureBound",
    "TABLE_FORMAT",
    "VnTable",
    "build_vn_table",
    "certified_line",
    "load_vn_table",
    "solve_node",
    "table_grid",
    "write_vn_table",
    "z_norm_bound",
]


if __name__ == "__main__":  # pragma: no cover
    print(f"wrote {write_vn_table()}")
