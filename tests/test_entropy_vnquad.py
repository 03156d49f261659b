"""Gauss-Radau quadrature bounds on the von Neumann entropy (pair and one party).

Sources beside each check. [BFF] = P. Brown, H. Fawzi, O. Fawzi, Quantum 8, 1445 (2024),
arXiv:2106.13692. [AS] = M. Abramowitz, I. Stegun, Handbook of Mathematical Functions (1964),
25.4.31 (Radau integration). [PAM09] = S. Pironio et al., New J. Phys. 11, 045021 (2009).
"""

from __future__ import annotations

import json
import math
from fractions import Fraction

import mpmath
import numpy as np
import pytest
import scipy.linalg
import scipy.special
from typer.testing import CliRunner

from dicert.entropy import bound_entropy
from dicert.entropy.analytic import vn_entropy_win
from dicert.entropy.quadrature import log_quadrature, radau_nodes
from dicert.entropy.vnquad import load_vn_table, z_norm_bound

W_STAR = (2 + math.sqrt(2)) / 4


# ------------------------------------------------------------------ quadrature rule


def test_radau_small_rules_closed_form():
    # 2- and 3-point Radau rules on [-1, 1] with the fixed node at -1 (textbook closed forms,
    # [AS] 25.4.31, from memory): nodes -1, 1/3 with weights 1/2, 3/2; nodes -1, (1 -+ sqrt6)/5
    # with weights 2/9, (16 +- sqrt6)/18. Mapped to [0, 1] and reflected (fixed node at 1).
    t, w = radau_nodes(2)
    assert [float(x) for x in t] == pytest.approx([1 / 3, 1.0], abs=1e-15)
    assert [float(x) for x in w] == pytest.approx([3 / 4, 1 / 4], abs=1e-15)
    t, w = radau_nodes(3)
    s6 = math.sqrt(6)
    # reflected and mapped: t = (4 -+ sqrt6)/10 with weights (16 -+ sqrt6)/36, and 1 with 1/9
    assert [float(x) for x in t] == pytest.approx([(4 - s6) / 10, (4 + s6) / 10, 1.0], abs=1e-15)
    assert [float(x) for x in w] == pytest.approx([(16 - s6) / 36, (16 + s6) / 36, 1 / 9],
                                                  abs=1e-15)


@pytest.mark.parametrize("m", [4, 8, 12])
def test_radau_against_scipy_gauss_jacobi(m):
    # Independent computation: the free Radau nodes on [-1, 1] (fixed node +1) are the
    # Gauss-Jacobi nodes for the weight (1 - x) (alpha = 1, beta = 0), and the Radau weights
    # are the Gauss-Jacobi weights divided by (1 - x_i) (scipy.special.roots_jacobi).
    x, wj = scipy.special.roots_jacobi(m - 1, 1.0, 0.0)
    t, w = radau_nodes(m)
    assert [float(v) for v in t[:-1]] == pytest.approx(list((1 + x) / 2), abs=1e-13)
    assert [float(v) for v in w[:-1]] == pytest.approx(list(wj / (1 - x) / 2), abs=1e-13)
    assert t[-1] == 1 and float(w[-1]) == pytest.approx(1 / m**2, abs=1e-15)


@pytest.mark.parametrize("m", [3, 8])
def test_radau_exact_to_degree_2m_minus_2(m):
    # Defining property ([AS] 25.4.31): exact for polynomials of degree <= 2m - 2, not 2m - 1.
    t, w = radau_nodes(m)
    with mpmath.workdps(50):
        for k in range(2 * m):
            q = mpmath.fsum(mpmath.mpf(wi.numerator) / wi.denominator
                            * (mpmath.mpf(ti.numerator) / ti.denominator) ** k
                            for ti, wi in zip(t, w))
            err = abs(q - mpmath.mpf(1) / (k + 1))
            if k <= 2 * m - 2:
                assert err < mpmath.mpf(10) ** -45
            else:
                assert err > mpmath.mpf(10) ** -10


def test_quadrature_under_approximates_log():
    # The sign of the Radau error with the fixed node at 1 makes r_m(x) <= ln x for x > 0
    # ([BFF] sec. 2; [AS] 25.4.31 error term): checked on a wide grid, and the gap closes
    # as m grows at moderate x.
    for m in (2, 5, 8):
        for x in np.geomspace(1e-6, 1e6, 121):
            assert log_quadrature(float(x), m) <= mpmath.log(float(x)) + mpmath.mpf(10) ** -40
    assert abs(log_quadrature(3.0, 8) - mpmath.log(3.0)) < 1e-4


# ------------------------------------------------------------------ the derivation on cq states


def _random_cq(rng, n_out, d_e):
    g = rng.normal(size=(n_out, d_e, d_e)) + 1j * rng.normal(size=(n_out, d_e, d_e))
    blocks = [x @ x.conj().T for x in g]
    tot = sum(np.trace(b).real for b in blocks)
    return [b / tot for b in blocks]


def _h(rho):
    ev = np.linalg.eigvalsh(rho)
    ev = ev[ev > 1e-14]
    return float(-(ev * np.log2(ev)).sum())


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_node_formula_lower_bounds_conditional_entropy(seed):
    # Independent check of the chain of the module docstring (steps 1-4) on random
    # classical-quantum states, with numpy/scipy only: for each node the infimum over Z_a is
    # attained at the solution of t rho_E Z + (1 - t) Z rho_a = -rho_a
    # (scipy.linalg.solve_sylvester), its norm obeys z_norm_bound, and
    # sum_{i<m} (w_i/t_i)(1 + inf_i) / ln 2 <= H(A|E) (direct entropies), with a small gap.
    rng = np.random.default_rng(seed)
    blocks = _random_cq(rng, 4, 3)
    rho_e = sum(blocks)
    h_ae = sum(_h(b) for b in blocks) - _h(rho_e)  # H(AE) - H(E), blocks sub-normalised
    t, w = radau_nodes(8)
    total = 0.0
    for ti, wi in zip(t[:-1], w[:-1]):
        tf = float(ti)
        val = 0.0
        for ra in blocks:
            z = scipy.linalg.solve_sylvester(tf * rho_e, (1 - tf) * ra, -ra)
            assert np.linalg.norm(z, 2) <= float(z_norm_bound(ti)) + 1e-9
            f = (np.trace(ra @ (z + z.conj().T)) + (1 - tf) * np.trace(ra @ z.conj().T @ z)
                 + tf * np.trace(rho_e @ z @ z.conj().T)).real
            # a random perturbation never does better (convex quadratic, stationary point)
            dz = 1e-3 * (rng.normal(size=z.shape) + 1j * rng.normal(size=z.shape))
            z2 = z + dz
            f2 = (np.trace(ra @ (z2 + z2.conj().T)) + (1 - tf) * np.trace(ra @ z2.conj().T @ z2)
                  + tf * np.trace(rho_e @ z2 @ z2.conj().T)).real
            assert f2 >= f - 1e-12
            val += f
        total += float(wi / ti) * (1 + val)
    bound = total / math.log(2)
    assert bound <= h_ae + 1e-9
    assert bound >= h_ae - 0.1
    # the dropped node t = 1: its term is >= 0 (rho_a <= rho_E)
    inv = np.linalg.inv(rho_e)
    assert 1 - sum(np.trace(inv @ b @ b).real for b in blocks) >= 0


# ------------------------------------------------------------------ explicit attack


def _attack_pair_entropy(s):
    # Eve holds the purification of v |Phi+><Phi+| + (1 - v) I/4, measured with the
    # CHSH-optimal observables A0 = Z, B0 = (Z + X)/sqrt2 (CHSH value S = 2 sqrt2 v); then
    # H(AB|X=0,Y=0,E) = H(ABE) - H(E) with H(E) = H(rho_AB) (pure global state) and the blocks
    # rho_E^{ab} isospectral to sqrt(rho) (P_a x Q_b) sqrt(rho). numpy only.
    v = s / (2 * math.sqrt(2))
    phi = np.array([1.0, 0, 0, 1]) / math.sqrt(2)
    rho = v * np.outer(phi, phi) + (1 - v) * np.eye(4) / 4
    z, x = np.diag([1.0, -1.0]), np.array([[0, 1.0], [1, 0]])
    a0, b0 = z, (z + x) / math.sqrt(2)
    ev, u = np.linalg.eigh(rho)
    sq = u @ np.diag(np.sqrt(np.clip(ev, 0.0, None))) @ u.T
    h_abe = 0.0
    for sa in (1, -1):
        for sb in (1, -1):
            p = np.kron((np.eye(2) + sa * a0) / 2, (np.eye(2) + sb * b0) / 2)
            h_abe += _h(sq @ p @ sq)
    return h_abe - _h(rho)


def test_attack_values_match_methods_note():
    # Cross-check of the attack computation: the methods note's values [C] and, at Tsirelson's
    # bound, 1 + h(cos^2(pi/8)) (common practice: self-testing).
    for s, ref in ((2.2, 0.8551), (2.5, 1.1315), (2.8, 1.5339)):
        assert _attack_pair_entropy(s) == pytest.approx(ref, abs=1e-4)
    c = math.cos(math.pi / 8) ** 2
    h = -(c * math.log2(c) + (1 - c) * math.log2(1 - c))
    assert _attack_pair_entropy(2 * math.sqrt(2)) == pytest.approx(1 + h, abs=1e-9)


def test_pair_table_never_exceeds_attack():
    tab = load_vn_table()
    for s in np.linspace(2.0, 2 * math.sqrt(2) - 1e-9, 41):
        w = 0.5 + s / 8
        h, _ = tab.bound(w, "AB")
        assert h <= _attack_pair_entropy(s) + 1e-9
        # and every line, not only the best one
        for _, off, sl in tab.lines["AB"]:
            assert off + sl * w <= _attack_pair_entropy(s) + 1e-9


def test_pair_table_at_classical_and_tsirelson_points():
    tab = load_vn_table()
    # w = 3/4: a deterministic local strategy wins with 3/4 and has zero entropy, so every
    # valid line is <= 0 there and the bound is 0 (common practice).
    assert tab.bound(0.75, "AB")[0] == 0.0
    for _, off, sl in tab.lines["AB"] + tab.lines["A"]:
        assert off + sl * 0.75 <= 1e-12
    # At Tsirelson's bound the pair carries 1 + h(cos^2(pi/8)) = 1.6009 bits (common
    # practice); the certified bound approaches it from below.
    c = math.cos(math.pi / 8) ** 2
    top = 1 - (c * math.log2(c) + (1 - c) * math.log2(1 - c))
    h = tab.bound(W_STAR, "AB")[0]
    assert 1.50 <= h <= top
    # monotone in w (max of lines with non-negative slopes)
    ws = np.linspace(0.75, W_STAR, 50)
    hs = [tab.bound(float(w), "AB")[0] for w in ws]
    assert all(b >= a for a, b in zip(hs, hs[1:]))


def test_one_party_table_reproduces_g_from_below():
    # One party: G(w) = 1 - h(1/2 + 1/2 sqrt(16 w (w - 1) + 3)) is the exact infimum [PAM09];
    # a valid bound never exceeds it. Stated gap of m = 8 with the node t = 1 dropped: the
    # dropped weight is 1/m^2 = 1/64 nats = 0.0225 bits, plus the relaxation; we accept 0.06
    # (measured: 0.04 at w = 0.85).
    tab = load_vn_table()
    for w in np.linspace(0.76, W_STAR, 30):
        h = tab.bound(float(w), "A")[0]
        g = float(vn_entropy_win(float(w)))
        assert h <= g + 1e-9
        assert h >= g - 0.06


@pytest.mark.slow
def test_one_node_solve_is_certified_and_below_g():
    # A live solve (few nodes): the certified line lies below G everywhere [PAM09] and the
    # exact certificate costs little against the solver's own value.
    from dicert.entropy.vnquad import certified_line, solve_node

    cert = solve_node(Fraction(1, 2), 0.84, parties="A", zlevel="z1")
    assert cert.value_at(0.84) <= cert.solver_value + 1e-12
    assert cert.solver_value - cert.value_at(0.84) < 1e-4
    qb = certified_line(0.84, parties="A", nodes=3, level="z1")
    for w in np.linspace(0.75, W_STAR, 20):
        assert qb.at(float(w)) <= float(vn_entropy_win(float(w))) + 1e-9


def test_recipe_and_cli_pair_vn():
    # `dicert entropy --chsh S --parties AB --measure vn` uses the quadrature table.
    from dicert.cli.app import app

    b = bound_entropy(chsh=2.8, parties="AB", measure="vn")
    tab = load_vn_table()
    assert b.h_vn_bits == tab.bound(0.85, "AB")[0]
    assert b.h_vn_bits > 1.2 and "radau" in b.method
    assert any("Brown" in r for r in b.references)
    r = CliRunner().invoke(app, ["entropy", "--chsh", "2.8", "--parties", "AB", "--measure",
                                 "vn", "--json"])
    assert r.exit_code == 0, r.output
    doc = json.loads(r.stdout)
    assert doc["single_round_bound_bits"] == b.h_vn_bits and doc["quadrature"]["nodes"] == tab.nodes
    assert bound_entropy(chsh=2.0, parties="AB", measure="vn").h_vn_bits == 0.0
    # the quadrature methods are for the von Neumann entropy only (bad input, exit code 2)
    r = CliRunner().invoke(app, ["entropy", "--chsh", "2.8", "--method", "radau-table"])
    assert r.exit_code == 2 and "measure" in r.output


def _random_strategy(rng, spread):
    # Two-qubit strategy near the CHSH-optimal one: a random mixed state (rank <= 4, close to
    # Phi+ for small spread) and random projective measurements in the x-z plane (angles
    # perturbed around 0, pi/2 for Alice and pi/4, -pi/4 for Bob), Eve holding the
    # purification.
    phi = np.array([1.0, 0, 0, 1]) / math.sqrt(2)
    g = rng.normal(size=(4, 4)) + 1j * rng.normal(size=(4, 4))
    mix = g @ g.conj().T
    mix /= np.trace(mix).real
    p = rng.uniform(0, spread)
    rho = (1 - p) * np.outer(phi, phi) + p * mix
    z, x = np.diag([1.0, -1.0]), np.array([[0, 1.0], [1, 0]])

    def obs(theta):
        return math.cos(theta) * z + math.sin(theta) * x

    th = np.array([0.0, math.pi / 2, math.pi / 4, -math.pi / 4]) + rng.normal(0, spread, 4)
    a = [obs(th[0]), obs(th[1])]
    b = [obs(th[2]), obs(th[3])]
    return rho, a, b


def _strategy_entropies(rho, a, b):
    # CHSH win probability and H(A|X=0,E), H(AB|X=0,Y=0,E) with Eve purifying rho (numpy).
    e = [[np.trace(rho @ np.kron(a[x], b[y])).real for y in (0, 1)] for x in (0, 1)]
    s = e[0][0] + e[0][1] + e[1][0] - e[1][1]
    ev, u = np.linalg.eigh(rho)
    sq = u @ np.diag(np.sqrt(np.clip(ev, 0.0, None))) @ u.conj().T
    h_e = _h(rho)
    pa = [(np.eye(2) + sg * a[0]) / 2 for sg in (1, -1)]
    pb = [(np.eye(2) + sg * b[0]) / 2 for sg in (1, -1)]
    h_ab = sum(_h(sq @ np.kron(p, q) @ sq) for p in pa for q in pb) - h_e
    h_a = sum(_h(sq @ np.kron(p, np.eye(2)) @ sq) for p in pa) - h_e
    return 0.5 + s / 8, h_a, h_ab


def test_table_never_exceeds_random_two_qubit_strategies():
    # Soundness against many explicit strategies (not only the noisy singlet): every certified
    # line must lie below the entropy that Eve leaves in each strategy (numpy computation;
    # the bound holds for every quantum strategy with that win probability).
    tab = load_vn_table()
    rng = np.random.default_rng(2024)
    checked = 0
    for spread in (0.02, 0.05, 0.1, 0.2):
        for _ in range(60):
            w, h_a, h_ab = _strategy_entropies(*_random_strategy(rng, spread))
            if w <= 0.75:
                continue
            checked += 1
            assert tab.bound(w, "AB")[0] <= h_ab + 1e-9
            assert tab.bound(w, "A")[0] <= h_a + 1e-9
    assert checked > 150


@pytest.mark.slow
def test_shipped_one_party_line_is_reproduced():
    # The shipped table is what this code computes: re-solve one one-party line (7 SDPs) and
    # compare (solver round-off across machines allowed at 1e-5 in the bound).
    from dicert.entropy.vnquad import certified_line

    tab = load_vn_table()
    w0, off, sl = tab.lines["A"][7]
    qb = certified_line(w0, parties="A", nodes=tab.nodes, level=tab.level)
    assert qb.at(w0) == pytest.approx(off + sl * w0, abs=1e-5)
    assert qb.slope == pytest.approx(sl, rel=1e-3)


def test_certificate_from_garbage_duals_is_still_valid():
    # Whatever the solver returns, the exact repair (PSD shift, exact residual charged with
    # the a-priori norm bound) can only lower the bound: random dual matrices give a valid but
    # weak line, below the certified optimum of the same node (weak duality, Boyd &
    # Vandenberghe 2004, sec. 5.2).
    from dicert.entropy import vnquad as V

    t = radau_nodes(8)[0][3]
    struct = V._structure("A", "z1")
    cform = V._objective(struct, t)
    good = V.solve_node(t, 0.84, parties="A", zlevel="z1")
    rng = np.random.default_rng(0)
    for _ in range(3):
        ys = []
        for ops in struct.blocks:
            g = rng.normal(size=(len(ops), len(ops)))
            ys.append(g @ g.T)
        lam, nu, charge, _ = V._certify_node(struct, cform, t, ys, float(rng.uniform(0, 5)))
        assert charge > 0
        assert float(lam + nu * Fraction(0.84)) <= good.value_at(0.84)


def test_norm_bound_rounds_up():
    # The rational bound used for charging is >= 1/(2 sqrt(t(1-t))) (mpmath, 40 digits).
    with mpmath.workdps(40):
        for t in (Fraction(1, 1000), Fraction(1, 3), Fraction(1, 2), Fraction(999, 1000)):
            exact = 1 / (2 * mpmath.sqrt(mpmath.mpf(t.numerator) / t.denominator
                                         * (1 - mpmath.mpf(t.numerator) / t.denominator)))
            b = z_norm_bound(t)
            assert mpmath.mpf(b.numerator) / b.denominator >= exact
            assert mpmath.mpf(b.numerator) / b.denominator <= exact * (1 + mpmath.mpf(10) ** -15)
