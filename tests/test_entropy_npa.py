"""NPA relaxations with exactly checked dual certificates (dicert.entropy.npa, .table, recipe)."""

import json
import math
from fractions import Fraction

import numpy as np
import pytest

from dicert.entropy import analytic as an
from dicert.entropy import bound_entropy, npa, pair_min_entropy_bound, table
from dicert.errors import ParameterError, SolverError

SQRT2 = math.sqrt(2.0)
TSIRELSON = 2.0 * SQRT2
# -log2((2 + sqrt2)/8) = 1.228447 bits: pair min-entropy of the self-tested singlet box at
# maximal CHSH violation (Pironio et al., Nature 464, 1021 (2010), NPA value; exact value
# recomputed in the methods note A2).
PAIR_MAX_BITS = 3.0 - math.log2(2.0 + SQRT2)


# ------------------------------------------------------------------ explicit quantum boxes
def _qubit_box(rng):
    """A random two-qubit state and random projective +-1 measurements; returns p[x,y,a,b]."""
    psi = rng.normal(size=4) + 1j * rng.normal(size=4)
    psi /= np.linalg.norm(psi)
    rho = np.outer(psi, psi.conj())

    def obs():
        v = rng.normal(size=3)
        v /= np.linalg.norm(v)
        sx = np.array([[0, 1], [1, 0]])
        sy = np.array([[0, -1j], [1j, 0]])
        sz = np.diag([1.0, -1.0])
        return v[0] * sx + v[1] * sy + v[2] * sz

    A, B = [obs(), obs()], [obs(), obs()]
    p = np.zeros((2, 2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    pa = (np.eye(2) + (1 - 2 * a) * A[x]) / 2
                    pb = (np.eye(2) + (1 - 2 * b) * B[y]) / 2
                    p[x, y, a, b] = np.real(np.trace(rho @ np.kron(pa, pb)))
    return p


def _near_optimal_box(rng):
    """cos t|00> + sin t|11> mixed with white noise, x-z plane observables near the CHSH optimum."""
    t = rng.uniform(0.25, math.pi / 4)
    v = rng.uniform(0.75, 1.0)
    psi = np.array([math.cos(t), 0, 0, math.sin(t)])
    rho = v * np.outer(psi, psi) + (1 - v) * np.eye(4) / 4
    sx = np.array([[0.0, 1.0], [1.0, 0.0]])
    sz = np.diag([1.0, -1.0])
    ang_a = np.array([0.0, math.pi / 2]) + rng.normal(scale=0.25, size=2)
    ang_b = np.array([math.pi / 4, -math.pi / 4]) + rng.normal(scale=0.25, size=2)
    A = [math.cos(u) * sz + math.sin(u) * sx for u in ang_a]
    B = [math.cos(u) * sz + math.sin(u) * sx for u in ang_b]
    p = np.zeros((2, 2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            for a in (0, 1):
                for b in (0, 1):
                    pa = (np.eye(2) + (1 - 2 * a) * A[x]) / 2
                    pb = (np.eye(2) + (1 - 2 * b) * B[y]) / 2
                    p[x, y, a, b] = np.trace(rho @ np.kron(pa, pb))
    return p


def _singlet_like_box(theta=0.0):
    """|Phi+> with the textbook optimal angles: E_xy = cos 2(alpha_x - beta_y), S = 2 sqrt 2."""
    alpha = [0.0, math.pi / 4]
    beta = [math.pi / 8, -math.pi / 8]
    p = np.zeros((2, 2, 2, 2))
    for x in (0, 1):
        for y in (0, 1):
            e = math.cos(2 * (alpha[x] - beta[y]))
            for a in (0, 1):
                for b in (0, 1):
                    p[x, y, a, b] = (1 + (1 - 2 * a) * (1 - 2 * b) * e) / 4
    return p


def _value(coeffs, p):
    return float(np.sum(np.asarray(coeffs).reshape(2, 2, 2, 2) * p))


# ------------------------------------------------------------------ Bell functionals
def test_tsirelson_bound_from_npa():
    # Max CHSH over quantum boxes = 2 sqrt 2 (Cirel'son, Lett. Math. Phys. 4, 93 (1980));
    # already exact at NPA level 1 (Navascues, Pironio, Acin, PRL 98, 010401 (2007)).
    cert = npa.max_bell_value(npa.chsh_coefficients(), level="1")
    assert cert.upper_bound >= TSIRELSON  # a certified upper bound may never be below the truth
    assert cert.upper_bound <= TSIRELSON + 1e-6


def test_ch_eberhard_maximum_and_relation():
    # CH/Eberhard J has quantum maximum (sqrt2 - 1)/2 and S = 2 + 4 J for no-signalling boxes
    # (Clauser & Horne, PRD 10, 526 (1974); methods note D, common practice).
    cert = npa.max_bell_value(npa.ch_eberhard_coefficients(), level="1+AB")
    assert (SQRT2 - 1) / 2 <= cert.upper_bound <= (SQRT2 - 1) / 2 + 1e-6
    # exact identity of the linear forms on normalised boxes: S = 2 * <1> + 4 J
    chsh = npa.functional_moments(npa.chsh_coefficients())
    ch = npa.functional_moments(npa.ch_eberhard_coefficients())
    words = set(chsh) | set(ch)
    for w in words:
        expected = 4 * ch.get(w, Fraction(0)) + (2 if w == npa.IDENTITY else 0)
        assert chsh.get(w, Fraction(0)) == expected
    # and on explicit quantum boxes (textbook Born rule on qubits)
    rng = np.random.default_rng(7)
    for _ in range(20):
        p = _qubit_box(rng)
        s = _value(npa.chsh_coefficients(), p)
        j = _value(npa.ch_eberhard_coefficients(), p)
        assert s == pytest.approx(2 + 4 * j, abs=1e-12)


def test_functional_moments_convention_on_quantum_boxes():
    # p(ab|xy) = (1 + (-1)^a <A_x> + (-1)^b <B_y> + (-1)^(a+b) <A_x B_y>)/4 (common practice):
    # the moment form of a random functional equals sum c p on explicit qubit boxes.
    rng = np.random.default_rng(11)
    for _ in range(10):
        p = _qubit_box(rng)
        c = rng.normal(size=16)
        corr = npa.Correlators(
            alice=tuple(float(p[x, 0, 0].sum() - p[x, 0, 1].sum()) for x in (0, 1)),
            bob=tuple(float(p[0, y, :, 0].sum() - p[0, y, :, 1].sum()) for y in (0, 1)),
            joint=tuple(
                tuple(float(p[x, y, 0, 0] + p[x, y, 1, 1] - p[x, y, 0, 1] - p[x, y, 1, 0]) for y in (0, 1))
                for x in (0, 1)
            ),
        )
        np.testing.assert_allclose(corr.probabilities(), p, atol=1e-12)
        mom = {npa.IDENTITY: 1.0}
        for x in (0, 1):
            mom[((x,), ())] = corr.alice[x]
            mom[((), (x,))] = corr.bob[x]
            for y in (0, 1):
                mom[((x,), (y,))] = corr.joint[x][y]
        form = npa.functional_moments(c)
        assert sum(float(v) * mom[w] for w, v in form.items()) == pytest.approx(_value(c, p), abs=1e-12)


# ------------------------------------------------------------------ guessing probabilities
@pytest.mark.parametrize("s", [2.1, 2.3, 2.5, 2.7, 2.8])
def test_single_party_guessing_reproduces_analytic(s):
    # NPA guessing probability of one outcome = (1 + sqrt(2 - S^2/4))/2 (Pironio et al. 2010).
    cert = npa.guessing_probability(parties="A", chsh=s, level="1+AB")
    g = an.guessing_probability_single(s)
    assert cert.upper_bound >= g  # valid: the analytic value is attained by quantum boxes
    assert cert.upper_bound <= g + 1e-6


def test_pair_at_maximal_violation():
    # 1.228447 bits for the pair at S = 2 sqrt 2 (Pironio et al. 2010, NPA value). The CHSH
    # constraint sits at the edge of the quantum set (no strictly feasible point), so a finite
    # dual certificate is slightly loose there: we demand validity exactly and 1e-3 accuracy.
    b = bound_entropy(chsh=3.0, parties="AB", method="npa")  # above Tsirelson: clamped
    assert b.chsh == pytest.approx(TSIRELSON)
    assert b.h_min_bits <= PAIR_MAX_BITS
    assert b.h_min_bits >= PAIR_MAX_BITS - 1e-3
    # with the full statistics of the optimal box (Nieto-Silleras, Pironio, Silman 2014)
    p = _singlet_like_box()
    h = 0.5 ** 0.5
    corr = npa.Correlators(alice=(0.0, 0.0), bob=(0.0, 0.0), joint=((h, h), (h, -h)))
    np.testing.assert_allclose(corr.probabilities(), p, atol=1e-15)
    b2 = bound_entropy(correlators=corr, parties="AB")
    assert PAIR_MAX_BITS - 1e-3 <= b2.h_min_bits <= PAIR_MAX_BITS


def test_validity_sweep_and_monotone():
    # Validity: certified one-party min-entropy never exceeds f(S) (Pironio 2010, tight), the
    # pair never exceeds its maximal-violation value; monotone in S; the pair bound improves on
    # the loose one-party bound (Pironio et al. 2010, Fig. 1 [from memory]).
    prev = -1.0
    for s in (2.0, 2.15, 2.35, 2.55, 2.75, 2.82):
        ha = bound_entropy(chsh=s, parties="A", method="npa").h_min_bits
        hab = bound_entropy(chsh=s, parties="AB", method="npa").h_min_bits
        assert ha <= an.min_entropy_single(s)
        assert hab <= PAIR_MAX_BITS
        assert hab >= an.min_entropy_single(s) - 1e-6
        assert hab >= prev
        prev = hab


def test_local_values_give_zero():
    # S <= 2: deterministic local boxes reach it, so nothing is certified (common practice).
    for s in (1.0, 2.0):
        assert bound_entropy(chsh=s, parties="A", method="npa").h_min_bits == 0.0
        assert bound_entropy(chsh=s, parties="AB", method="npa").h_min_bits == 0.0


def test_certificate_survives_inaccurate_solver():
    # Soundness of the repair: a loose SCS solve still yields a VALID bound (>= the analytic
    # value of Pironio et al. 2010), only a looser one.
    struct_obj = [
        {npa.IDENTITY: Fraction(1, 2), ((0,), ()): Fraction(1 - 2 * e, 2)} for e in (0, 1)
    ]
    cons = npa._box_constraints(bell=(npa.chsh_coefficients(), 2.6), correlators=None, tolerance=0.0)
    cert = npa.solve_certified(struct_obj, cons, level="1+AB", solvers=("SCS",))
    assert cert.solver == "SCS"
    assert cert.upper_bound >= an.guessing_probability_single(2.6)
    assert cert.upper_bound <= an.guessing_probability_single(2.6) + 1e-3


def test_affine_certificate_valid_elsewhere():
    # Weak duality (Boyd & Vandenberghe 2004, sec. 5.2): the dual point at S0 bounds the
    # guessing probability at every S; check against the analytic optimum (Pironio 2010).
    cert = npa.guessing_probability(parties="A", chsh=2.5, level="1+AB")
    for s in (2.0, 2.2, 2.5, 2.7, 2.8):
        assert cert.bound_at({"bell": s}) >= an.guessing_probability_single(s)


def test_explicit_quantum_boxes_respect_bounds():
    # Any explicit quantum box is feasible, so its trivial guessing probability (no side
    # information) cannot exceed the certified bound at its CHSH value (Born rule on qubits).
    rng = np.random.default_rng(2026)
    tab = table.load_table()
    checked = 0
    for _ in range(300):
        p = _near_optimal_box(rng)
        s = _value(npa.chsh_coefficients(), p)
        if s <= 2.0:
            continue
        checked += 1
        assert p[0, 0].max() <= tab.guessing_bound(s, "AB")[0]
        assert p[0, 0].sum(axis=1).max() <= tab.guessing_bound(s, "A")[0]
        assert p[0, 0].sum(axis=1).max() <= an.guessing_probability_single(s) + 1e-12
    assert checked >= 20


def test_outside_quantum_set_raises():
    # A PR box (S = 4, Popescu & Rohrlich 1994) has no quantum realisation: the dual is unbounded.
    corr = npa.Correlators(alice=(0.0, 0.0), bob=(0.0, 0.0), joint=((1.0, 1.0), (1.0, -1.0)))
    with pytest.raises(SolverError) as exc:
        npa.guessing_probability(parties="A", correlators=corr, level="1")
    assert "quantum set" in str(exc.value)


def test_level_2_and_level_1():
    # Higher level: still reproduces the analytic bound (Pironio 2010); level 1 is valid but loose
    # for the pair (products A_x B_y are not in its operator list).
    cert = npa.guessing_probability(parties="A", chsh=2.6, level="2")
    g = an.guessing_probability_single(2.6)
    assert g <= cert.upper_bound <= g + 1e-6
    c1 = npa.guessing_probability(parties="AB", chsh=2.6, level="1")
    c2 = npa.guessing_probability(parties="AB", chsh=2.6, level="1+AB")
    assert c1.upper_bound >= c2.upper_bound - 1e-9


def test_exact_pd_check():
    # Hilbert matrices are positive definite; [[1,2],[2,1]] has eigenvalue -1 (textbook facts).
    hil = [[Fraction(1, i + j + 1) for j in range(6)] for i in range(6)]
    assert npa._exactly_positive_definite(hil)
    assert not npa._exactly_positive_definite([[Fraction(1), Fraction(2)], [Fraction(2), Fraction(1)]])


def test_moment_structure_sizes():
    # Level 1 has 5 operators, 1+AB has 9, level 2 has 13 (NPA 2008 construction, counted by hand).
    assert npa.moment_structure("1").size == 5
    assert npa.moment_structure("1+AB").size == 9
    assert npa.moment_structure("2").size == 13
    with pytest.raises(ParameterError):
        npa.moment_structure("3")


def test_correlators_from_counts():
    # Hand-made counts: x=y=0 always a=b; other settings balanced with marginals 0 (common practice).
    n = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    n[1, 0, 0, 0, 0] = 30
    n[1, 0, 0, 1, 1] = 10
    for x, y in ((0, 1), (1, 0), (1, 1)):
        n[1, x, y] = 10
    c = npa.correlators_from_counts(n)
    assert c.joint[0][0] == 1.0
    assert c.joint[1][1] == 0.0
    assert c.alice[0] == pytest.approx((30 - 10) / (40 + 40))  # 40 + 40 trials with x = 0
    n[1, 1, 1] = 0
    with pytest.raises(ParameterError, match="x=1, y=1"):
        npa.correlators_from_counts(n)


# ------------------------------------------------------------------ table
def test_table_valid_monotone_convex():
    # Validity against the published one-party formula (Pironio 2010) and the pair maximum;
    # monotone; -log2 of a minimum of affine functions is convex (Boyd & Vandenberghe 2004,
    # sec. 3.2.3-3.2.4).
    tab = table.load_table()
    s = np.linspace(1.9, 2.9, 801)
    ha = tab.min_entropy(s, "A")
    hab = tab.min_entropy(s, "AB")
    assert np.all(ha <= an.min_entropy_single(s))
    assert np.all(ha >= an.min_entropy_single(s) - 2e-3)
    assert np.all(hab <= PAIR_MAX_BITS)
    assert np.all(np.diff(ha) >= 0) and np.all(np.diff(hab) >= 0)
    inside = (s > 2.0) & (s < TSIRELSON)
    d2 = np.diff(hab[inside], 2)
    assert np.all(d2 >= -1e-9)
    assert hab[s <= 2.0].max() == 0.0
    assert pair_min_entropy_bound(3.5) == pair_min_entropy_bound(TSIRELSON)


def test_table_close_to_exact_solve():
    # The table's affine pieces are the certificates of exact solves: at a grid point they agree.
    tab = table.load_table()
    s = tab.chsh[60]
    exact = npa.guessing_probability(parties="AB", chsh=s, level="1+AB").upper_bound
    assert tab.guessing_bound(s, "AB")[0] <= exact + 1e-9
    assert tab.guessing_bound(s, "AB")[0] >= exact - 1e-6


def test_table_tangent_is_below():
    tab = table.load_table()
    for s0 in (2.3, 2.6, 2.8):
        v, k = tab.tangent(s0)
        for s in np.linspace(2.0, TSIRELSON, 41):
            assert v + k * (s - s0) <= tab.lookup(s, "AB").single_round_bound_bits + 1e-15


def test_corrupt_table_rejected(tmp_path):
    tab_path = table._file_path()
    doc = json.loads(tab_path.read_text())
    doc["pieces"]["AB"]["slope"][3] = -1.0
    bad = tmp_path / "t.json"
    bad.write_text(json.dumps(doc))
    with pytest.raises(ParameterError, match="negative slope"):
        table.load_table(str(bad))


# ------------------------------------------------------------------ recipe
def test_recipe_methods_and_vn():
    a = bound_entropy(chsh=2.7)
    assert a.method == "analytic" and a.h_min_bits == an.min_entropy_single(2.7)
    v = bound_entropy(chsh=2.7, measure="vn")
    assert v.h_vn_bits == an.vn_entropy_single(2.7) and v.h_min_bits is None
    vab = bound_entropy(chsh=2.82, parties="AB", measure="vn", method="table")
    # max(H(A|E) bound, H_min(AB|E) bound): both valid lower bounds on H(AB|E)
    assert vab.h_vn_bits == max(an.vn_entropy_single(2.82), pair_min_entropy_bound(2.82))
    with pytest.raises(ParameterError):
        bound_entropy(chsh=2.5, correlators=npa.Correlators(alice=(0, 0), bob=(0, 0), joint=((0, 0), (0, 0))))
    with pytest.raises(ParameterError):
        bound_entropy(chsh=2.5, measure="max")


def test_recipe_fallback(monkeypatch):
    def boom(**kw):
        raise SolverError("solver failed", "max_iterations")

    monkeypatch.setattr(npa, "guessing_probability", boom)
    b = bound_entropy(chsh=2.6, parties="AB", method="npa")
    assert b.method == "analytic-fallback" and "max_iterations" in b.fallback_reason
    assert b.h_min_bits == an.min_entropy_single(2.6)
    with pytest.raises(SolverError):
        bound_entropy(chsh=2.6, parties="AB", method="npa", fallback="raise")


def test_recipe_general_bell_functional():
    # CH/Eberhard J >= (S - 2)/4 carries the same information as CHSH >= S (S = 2 + 4J,
    # Clauser & Horne 1974): the certified one-party bound matches f(S) (Pironio 2010).
    b = bound_entropy(bell=(npa.ch_eberhard_coefficients(), (2.6 - 2) / 4), parties="A")
    assert an.min_entropy_single(2.6) - 1e-5 <= b.h_min_bits <= an.min_entropy_single(2.6)


def test_correlator_tolerance_only_loosens():
    # Relaxing constraints can only raise the maximum (feasible set grows; basic optimisation
    # fact, Boyd & Vandenberghe 2004, sec. 4.1): certified entropy with tolerance <= without,
    # and the full-statistics bound beats the CHSH-only one-party bound f(S) (Nieto-Silleras,
    # Pironio, Silman 2014).
    v = 0.95 / SQRT2
    corr = npa.Correlators(alice=(0.0, 0.0), bob=(0.0, 0.0), joint=((v, v), (v, -v)))
    h0 = bound_entropy(correlators=corr, parties="A").h_min_bits
    h1 = bound_entropy(correlators=corr, parties="A", tolerance=0.01).h_min_bits
    assert h1 <= h0 + 1e-9
    assert h0 >= an.min_entropy_single(corr.chsh) - 1e-6
    with pytest.raises(ParameterError):
        bound_entropy(correlators=corr, tolerance=-0.1)
