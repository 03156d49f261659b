"""Closed-form CHSH entropy bounds (dicert.entropy.analytic) against published formulas."""

import math

import mpmath
import numpy as np
import pytest
import scipy.stats

from dicert.entropy import analytic as an

SQRT2 = math.sqrt(2.0)
TSIRELSON = 2.0 * SQRT2


# Regression values computed from the formula f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) of
# Pironio et al., Nature 464, 1021 (2010), as listed in the methods note
# (shared/methods/bounds-extraction-tests.md, A2, marked [CALC]); 6 decimals there.
@pytest.mark.parametrize(
    ("s", "f"),
    [
        (2.05, 0.018616),
        (2.1, 0.038477),
        (2.2, 0.082515),
        (2.3, 0.133603),
        (2.4, 0.194021),
        (2.414, 0.203412),
        (2.5, 0.267568),
        (2.6, 0.361438),
        (2.7, 0.492781),
        (2.8, 0.736966),
    ],
)
def test_min_entropy_single_regression_values(s, f):
    assert an.min_entropy_single(s) == pytest.approx(f, abs=1e-6)


def test_min_entropy_single_endpoints():
    # f(2) = 0 and f(2 sqrt 2) = 1 (Pironio et al., Nature 2010, eq. (3)).
    assert an.min_entropy_single(2.0) == 0.0
    assert an.min_entropy_single(TSIRELSON) == pytest.approx(1.0, abs=1e-12)
    # S <= 2 certifies nothing (local boxes are deterministic; common practice).
    assert an.min_entropy_single(1.5) == 0.0
    assert an.min_entropy_single(-2.0) == 0.0
    # above Tsirelson (a statistical fluctuation) clamps to the maximum
    assert an.min_entropy_single(3.1) == an.min_entropy_single(TSIRELSON)


def test_min_entropy_near_tsirelson_is_below_one():
    # The methods note lists "f(2.828427) = 1"; 2.828427 is 1.25e-7 BELOW 2 sqrt 2, and the
    # formula (Pironio et al. 2010) gives 1 - log2(1 + sqrt(2 - S^2/4)) = 0.99939 there
    # (recomputed with mpmath at 50 digits): the square root makes the curve steep at the top.
    mpmath.mp.dps = 50
    s = mpmath.mpf("2.828427")
    ref = 1 - mpmath.log(1 + mpmath.sqrt(2 - s**2 / 4), 2)
    assert an.min_entropy_single(2.828427) == pytest.approx(float(ref), abs=1e-12)
    assert an.min_entropy_single(2.828427) < 0.9995


def test_guessing_probability_matches_min_entropy():
    # P_guess = (1 + sqrt(2 - S^2/4))/2 and H_min = -log2 P_guess (Pironio et al. 2010).
    for s in np.linspace(2.0, TSIRELSON, 11):
        g = an.guessing_probability_single(s)
        assert g == pytest.approx(0.5 * (1 + math.sqrt(max(0.0, 2 - s * s / 4))), abs=1e-15)
        assert an.min_entropy_single(s) == pytest.approx(-math.log2(g), abs=1e-12)


def test_pironio_2010_42_bits():
    # Pironio et al., Nature 464, 1021 (2010), abstract: 42 certified bits at 99% confidence
    # from n = 3016 events with observed I = 2.414 (uniform settings, q = 1/4, delta = 0.01).
    # Azuma margin mu = (1/q + 2 sqrt 2) sqrt(2 ln(1/delta)/n) (methods note A3/A4: the published
    # 42 matches within the rounding of I; suggested band 40.5..42.5).
    n, delta = 3016, 0.01
    mu = (4 + 2 * SQRT2) * math.sqrt(2 * math.log(1 / delta) / n)
    for i_hat in (2.414, 2.4151):
        bits = n * an.min_entropy_single(i_hat - mu)
        assert 40.5 <= bits <= 42.5


def test_min_entropy_convex_increasing():
    # f is convex and increasing on [2, 2 sqrt 2] (Pironio et al. 2010, SI; methods note A2).
    s = np.linspace(2.0, TSIRELSON, 401)
    f = an.min_entropy_single(s)
    assert np.all(np.diff(f) > 0)
    assert np.all(np.diff(f, 2) >= -1e-12)


def test_vn_bound_against_scipy_binary_entropy():
    # H(A|E) >= 1 - h(1/2 + 1/2 sqrt(S^2/4 - 1)) (Acin et al., PRL 98, 230501 (2007);
    # Pironio et al., NJP 11, 045021 (2009)); h computed with scipy.stats.entropy(base=2).
    for s in (2.1, 2.3, 2.5, 2.7, 2.8):
        p = 0.5 + 0.5 * math.sqrt(s * s / 4 - 1)
        ref = 1 - scipy.stats.entropy([p, 1 - p], base=2)
        assert an.vn_entropy_single(s) == pytest.approx(ref, abs=1e-12)
    assert an.vn_entropy_single(2.0) == 0.0
    assert an.vn_entropy_single(1.0) == 0.0
    assert an.vn_entropy_single(TSIRELSON) == pytest.approx(1.0, abs=1e-12)
    assert an.vn_entropy_single(3.0) == an.vn_entropy_single(TSIRELSON)


def test_vn_bound_above_min_entropy_and_convex():
    # H >= H_min for every state (textbook ordering of entropies, e.g. Tomamichel,
    # "Quantum Information Processing with Finite Resources", Springer 2016, sec. 6.4), and the
    # two published bounds respect it on the open interval; convex and increasing
    # (Pironio et al. 2009 use convexity for the collective-attack bound).
    s = np.linspace(2.0, TSIRELSON, 301)
    vn = an.vn_entropy_single(s)
    assert np.all(vn[1:-1] >= an.min_entropy_single(s)[1:-1])
    assert np.all(np.diff(vn) > 0)
    assert np.all(np.diff(vn, 2) >= -1e-12)


def test_vn_entropy_win_matches_note_form():
    # G(w) = 1 - h(1/2 + 1/2 sqrt(16 w (w-1) + 3)) on [3/4, (2+sqrt2)/4], 0 below 3/4
    # (entropy-accumulation methods note, sec. 2.1; same as the S form with S = 8w - 4).
    for w in (0.76, 0.8, 0.83, 0.85):
        p = 0.5 + 0.5 * math.sqrt(16 * w * (w - 1) + 3)
        ref = 1 - scipy.stats.entropy([p, 1 - p], base=2)
        assert an.vn_entropy_win(w) == pytest.approx(ref, abs=1e-12)
    assert an.vn_entropy_win(0.7) == 0.0


def test_chsh_game_identities():
    # CHSH game: w = 1/2 + S/8; classical 3/4, quantum cos^2(pi/8) = (2+sqrt2)/4 (common practice).
    assert an.win_from_chsh(2.0) == pytest.approx(0.75)
    assert an.win_from_chsh(TSIRELSON) == pytest.approx(math.cos(math.pi / 8) ** 2, abs=1e-15)
    assert an.W_QUANTUM == pytest.approx(math.cos(math.pi / 8) ** 2, abs=1e-15)
    assert an.chsh_from_win(an.win_from_chsh(2.37)) == pytest.approx(2.37, abs=1e-15)


@pytest.mark.parametrize("s", [2.05, 2.3, 2.6, 2.8])
def test_derivatives_against_mpmath(s):
    # Derivatives checked against mpmath.diff of the published formulas (Pironio 2010; Acin 2007).
    mpmath.mp.dps = 40

    def f(v):
        return 1 - mpmath.log(1 + mpmath.sqrt(2 - v**2 / 4), 2)

    def g(v):
        p = (1 + mpmath.sqrt(v**2 / 4 - 1)) / 2
        return 1 + p * mpmath.log(p, 2) + (1 - p) * mpmath.log(1 - p, 2)

    assert an.min_entropy_single_derivative(s) == pytest.approx(float(mpmath.diff(f, s)), rel=1e-9)
    assert an.vn_entropy_single_derivative(s) == pytest.approx(float(mpmath.diff(g, s)), rel=1e-9)
    w = float(an.win_from_chsh(s))
    assert an.vn_entropy_win_derivative(w) == pytest.approx(8 * float(mpmath.diff(g, s)), rel=1e-9)


def test_derivative_edge_values():
    # Limits of the published formulas (Pironio 2010; Acin 2007), derived by hand and checked
    # with mpmath: dH/dS -> 1/(2 ln 2) as S -> 2+ (expand h around 1/2); f'(2) = (2/4)/(1 * 1 *
    # ln 2) / 2 = 1/(4 ln 2); both infinite at the Tsirelson bound (square-root singularity);
    # 0 below 2.
    mpmath.mp.dps = 40

    def g(v):
        p = (1 + mpmath.sqrt(v**2 / 4 - 1)) / 2
        return 1 + p * mpmath.log(p, 2) + (1 - p) * mpmath.log(1 - p, 2)

    assert an.vn_entropy_single_derivative(2.0) == pytest.approx(1 / (2 * math.log(2)))
    assert float(mpmath.diff(g, mpmath.mpf(2) + mpmath.mpf("1e-12"))) == pytest.approx(
        1 / (2 * math.log(2)), rel=1e-4
    )
    assert an.min_entropy_single_derivative(2.0) == pytest.approx(1 / (4 * math.log(2)))
    assert an.min_entropy_single_derivative(1.9) == 0.0
    assert an.vn_entropy_single_derivative(1.9) == 0.0
    assert an.min_entropy_single_derivative(TSIRELSON) == math.inf
    assert an.vn_entropy_win_derivative(0.75) == pytest.approx(4 / math.log(2))
