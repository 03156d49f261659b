"""Probability estimation factors: models, construction, validity, scoring, parameters, planning.

Sources of the check values:
- [MN] methods note "probability-estimation.md", section 4 "Computed" values: regression values
  computed from the formulas in the methods note (the note's own numerical computation).
- [KZB] E. Knill, Y. Zhang, P. Bierhorst, Phys. Rev. Research 2, 033465 (2020): the PEF
  inequality and the success rule (definitions, as summarised in the methods note section 1-2).
- [vDGG] W. van Dam, R. D. Gill, P. D. Grunwald, IEEE Trans. Inf. Theory 51, 2812 (2005):
  statistical strength of CHSH 0.0462738469 bits (from memory).
- [PR94] S. Popescu, D. Rohrlich, Found. Phys. 24, 379 (1994): PR box reaches CHSH = 4.
- [C80] B. S. Cirel'son, Lett. Math. Phys. 4, 93 (1980): Tsirelson bound 2 sqrt 2.
- Reference libraries: scipy.optimize.linprog (HiGHS), scipy.spatial.ConvexHull (Qhull).
"""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import settings as hsettings
from hypothesis import strategies as st

from dicert.errors import ParameterError, ProtocolError
from dicert.finite import pef as P

SQRT2 = math.sqrt(2.0)

# Photonic Eberhard-type model of the methods note section 4, rho(c|z) with rows c, columns z.
PHOTONIC_TABLE = np.array([
    [.8859631, .7646459, .7646459, .5773941],
    [.0287661, .1500833, .0234703, .2107221],
    [.0287661, .0234703, .1500833, .2107221],
    [.0565046, .0618005, .0618005, .0011617],
]).T


@pytest.fixture(scope="module")
def photonic():
    # The 7-digit table signals at the 1e-7 level; fit it into NS (methods note section 3).
    return P.fit_box(PHOTONIC_TABLE / PHOTONIC_TABLE.sum(axis=1, keepdims=True) * 1e9)


def chsh_value(box):
    corr = np.array([1.0, -1.0, -1.0, 1.0])
    e = box @ corr
    return e[0] + e[1] + e[2] - e[3]


def is_no_signalling(box, tol=1e-12):
    b = box.reshape(2, 2, 2, 2)  # x, y, a, b
    alice = b.sum(axis=3)  # x, y, a
    bob = b.sum(axis=2)  # x, y, b
    return (np.allclose(alice[:, 0], alice[:, 1], atol=tol)
            and np.allclose(bob[0], bob[1], atol=tol)
            and np.allclose(box.sum(axis=1), 1.0, atol=tol) and np.all(box >= 0))


def rows_float64(pef):
    a = P.pef_rows(pef.model, pef.settings, pef.beta)
    vals = a @ pef.factors.ravel()
    vals_fsum = [math.fsum(row * pef.factors.ravel()) for row in a]
    return vals, np.array(vals_fsum)


# --------------------------------------------------------------------------- models

def test_ns_vertices_are_the_24_textbook_boxes():
    verts = P.box_model("ns").vertices
    assert verts.shape == (24, 4, 4)
    assert all(is_no_signalling(v) for v in verts)
    chsh = np.array([chsh_value(v) for v in verts])
    # Local deterministic boxes obey |CHSH| <= 2 with 8 of the 16 reaching +2 (common practice);
    # the PR box (al,be,ga) = (0,0,0) reaches CHSH = 4 [PR94].
    assert np.all(np.abs(chsh[:16]) <= 2 + 1e-12)
    assert np.sum(np.isclose(chsh[:16], 2.0)) == 8
    assert math.isclose(chsh[16], 4.0)
    assert len({v.tobytes() for v in verts}) == 24


def test_tsirelson_polytope_has_80_vertices_with_the_note_entries():
    bm = P.box_model("tsirelson")
    assert bm.n_vertices == 80
    vals = set(np.round(bm.vertices.ravel(), 12))
    # [MN]: truncated PR boxes have entries 0, (sqrt2-1)/2, 2-sqrt2, (3-sqrt2)/2 (plus LD's 1).
    expected = {0.0, round((SQRT2 - 1) / 2, 12), round(2 - SQRT2, 12), round((3 - SQRT2) / 2, 12),
                1.0}
    assert vals == expected
    n_ld = sum(1 for v in bm.vertices if set(v.ravel()) <= {0.0, 1.0})
    assert n_ld == 16  # [MN]: the 16 LD boxes plus 64 truncated PR boxes
    for v in bm.vertices:
        assert is_no_signalling(v)
        assert all(w.ravel() @ v.ravel() <= 2 * SQRT2 + 1e-12  # [C80]
                   for w in P.chsh_functionals())


def test_tsirelson_polytope_vertex_list_is_complete():
    """conv(vertices) contains the polytope: every facet of the hull (scipy.spatial.ConvexHull)
    is implied by the polytope's inequalities (checked by maximising over it with
    scipy.optimize.linprog)."""
    from scipy.optimize import linprog
    from scipy.spatial import ConvexHull

    m, c0 = P._box_affine()
    verts = P.box_model("tsirelson").vertices.reshape(80, 16)
    theta = np.linalg.lstsq(m, (verts - c0).T, rcond=None)[0].T  # 80 x 8 coordinates
    assert np.allclose(theta @ m.T + c0, verts, atol=1e-12)
    hull = ConvexHull(theta)
    a_ub = [-m]
    b_ub = [c0]
    for w in P.chsh_functionals().reshape(8, 16):
        a_ub.append((w @ m)[None, :])
        b_ub.append([2 * SQRT2 - w @ c0])
    a_ub, b_ub = np.vstack(a_ub), np.concatenate(b_ub)
    for eq in np.unique(np.round(hull.equations, 9), axis=0):
        normal, offset = eq[:-1], eq[-1]  # hull: normal . x + offset <= 0
        res = linprog(-normal, A_ub=a_ub, b_ub=b_ub, bounds=(None, None), method="highs")
        assert res.status == 0
        assert -res.fun + offset <= 1e-7


# --------------------------------------------------------------------------- rates

@pytest.mark.parametrize("beta,rate", [
    (0.1, 0.341247), (0.05, 0.381052), (0.02, 0.401624), (0.01, 0.408023), (0.005, 0.411143),
])
def test_tsirelson_box_rates(beta, rate):
    # [MN] computed r(beta) for the Tsirelson box, uniform settings, NS model.
    pef = P.build_pef(P.tsirelson_box(), P.uniform_settings(), beta)
    assert pef.rate == pytest.approx(rate, rel=1e-4)


def test_tsirelson_box_asymptotic_rate_and_strength():
    rho = P.tsirelson_box()
    # h_inf = sqrt2 - 1 [MN]; equals (CHSH - 2)/2 for isotropic boxes [MN, derived].
    assert P.asymptotic_rate(rho) == pytest.approx(SQRT2 - 1, abs=1e-9)
    # D_LR = 0.0462738 bits: [MN] computed, and [vDGG] 0.0462738469 (from memory).
    d = P.statistical_strength(rho)
    assert d == pytest.approx(0.0462738469, abs=2e-8)
    # g(beta) saturates at D_LR for beta in {1, 0.5, 0.2} [MN]; and never exceeds it (fact (d)).
    for beta in (1.0, 0.5, 0.2):
        g = P.build_pef(rho, beta=beta).expected_log2
        assert g == pytest.approx(0.0462738, abs=2e-7)
        assert g <= d + 1e-12
    # r(0.001) = 0.413603 < h_inf [MN].
    r = P.build_pef(rho, beta=0.001).rate
    assert r == pytest.approx(0.413603, rel=1e-4) and r <= SQRT2 - 1


def test_tsirelson_box_optimal_factor_values():
    # [MN]: at beta = 0.01, F ~ 1.006955 on CHSH wins and ~ 0.979134 otherwise (tol ~1e-5).
    f = P.build_pef(P.tsirelson_box(), beta=0.01).factors
    for x, y, a, b in itertools.product((0, 1), repeat=4):
        want = 1.006955 if (a ^ b) == (x * y) else 0.979134
        assert f[2 * x + y, 2 * a + b] == pytest.approx(want, abs=2e-5)


@pytest.mark.parametrize("v,h_inf,d_lr,r01", [
    (0.75, 0.060660, 8.9714e-04, 0.050733),
    (0.80, 0.131371, 4.2809e-03, 0.122191),
    (0.90, 0.272792, 1.9184e-02, 0.265107),
])
def test_isotropic_boxes(v, h_inf, d_lr, r01):
    rho = P.isotropic_box(v)
    assert P.asymptotic_rate(rho) == pytest.approx(h_inf, abs=2e-6)  # [MN]
    assert P.asymptotic_rate(rho) == pytest.approx((2 * SQRT2 * v - 2) / 2, abs=1e-9)  # [MN, D]
    assert P.statistical_strength(rho) == pytest.approx(d_lr, rel=2e-4)  # [MN]
    assert P.build_pef(rho, beta=0.01).rate == pytest.approx(r01, rel=1e-4)  # [MN]


@pytest.mark.parametrize("beta,rate", [
    (0.1, 0.002753), (0.02, 0.011783), (0.01, 0.014335), (0.005, 0.015580), (0.001, 0.016561),
])
def test_photonic_model_rates(photonic, beta, rate):
    # [MN] photonic Eberhard-type model (r = 2.918, efficiency 0.76), NS model, uniform settings.
    assert P.build_pef(photonic, beta=beta).rate == pytest.approx(rate, rel=2e-4)


def test_photonic_model_h_inf_and_strength(photonic):
    assert P.asymptotic_rate(photonic) == pytest.approx(0.016805, abs=2e-6)  # [MN]
    assert P.statistical_strength(photonic) == pytest.approx(2.7528e-4, rel=2e-4)  # [MN]
    # Tsirelson polytope column of the [MN] table: 0.0365 (photonic), 0.900 (Tsirelson box),
    # 0.1318 (isotropic v = 0.75).
    assert P.asymptotic_rate(photonic, model="tsirelson") == pytest.approx(0.0365, abs=6e-5)
    assert P.asymptotic_rate(P.tsirelson_box(), model="tsirelson") == pytest.approx(0.900, abs=6e-4)
    assert P.asymptotic_rate(P.isotropic_box(0.75), model="tsirelson") == pytest.approx(
        0.1318, abs=6e-5)


def test_tsirelson_model_gives_more_than_ns():
    rho = P.tsirelson_box()
    ns = P.build_pef(rho, beta=0.01)
    ts = P.build_pef(rho, beta=0.01, model="tsirelson")
    assert ts.rate > ns.rate  # more randomness with the quantum assumption [MN table, BZ20]
    assert ts.rate <= 0.9002  # never above its h_inf


def test_spot_checking_rates():
    # [MN] spot-checking q = 0.1, z0 = 00, Tsirelson box: D_LR = 0.005744, r(0.01) = 0.3549.
    s = P.spot_settings(0.1, (0, 0))
    rho = P.tsirelson_box()
    assert P.statistical_strength(rho, s) == pytest.approx(0.005744, rel=2e-4)
    assert P.build_pef(rho, s, 0.01).rate == pytest.approx(0.3549, abs=1e-4)
    assert P.build_pef(rho, s, 0.001).rate == pytest.approx(0.4090, abs=1e-4)
    assert P.asymptotic_rate(rho, s) == pytest.approx(SQRT2 - 1, abs=1e-9)  # [MN]


# --------------------------------------------------------------------------- validity

def _random_ns_box(draw_weights):
    verts = P.box_model("ns").vertices
    w = np.asarray(draw_weights, dtype=float)
    w = w / w.sum()
    return np.tensordot(w, verts, axes=1)


@hsettings(max_examples=25, deadline=None)
@given(weights=st.lists(st.floats(0.01, 1.0), min_size=24, max_size=24),
       beta=st.sampled_from([1.0, 0.3, 0.05, 0.01, 1e-3, 1e-4]),
       model=st.sampled_from(["ns", "tsirelson"]),
       kind=st.sampled_from(["uniform", "product", "spot", "bias"]),
       lam=st.sampled_from([0.0, 1e-3]))
def test_every_produced_pef_satisfies_every_vertex_row(weights, beta, model, kind, lam):
    """[KZB] PEF inequality at every (settings vertex, box vertex) pair, evaluated in float64
    (numpy and math.fsum) on the returned factors."""
    rho = _random_ns_box(weights)
    s = {"uniform": P.uniform_settings(),
         "product": P.product_settings(0.3, 0.6),
         "spot": P.spot_settings(0.05, (1, 0)),
         "bias": P.spot_settings(0.2, (0, 1), bias_x=0.05, bias_y=0.02)}[kind]
    pef = P.build_pef(rho, s, beta, model=model, lam=lam)
    vals, vals_fsum = rows_float64(pef)
    assert np.all(vals <= 1.0) and np.all(vals_fsum <= 1.0)
    assert pef.max_row_value <= 1.0 - P.ROW_CHECK_SLACK
    assert np.all(pef.factors >= 0)
    if lam > 0:
        assert np.all(pef.factors >= lam * 0.999)


def test_bias_bounded_settings_cover_every_distribution_in_the_box():
    """A PEF for |P(x=0)-1/2| <= 0.1, |P(y=0)-1/2| <= 0.05 satisfies the rows for settings drawn
    anywhere inside the box (multilinearity, methods note section 1)."""
    s = P.product_settings(0.5, 0.5, bias_x=0.1, bias_y=0.05)
    assert s.vertices.shape == (4, 4)
    pef = P.build_pef(P.isotropic_box(0.9), s, 0.05)
    rng = np.random.default_rng(7)
    verts = P.box_model("ns").vertices ** 1.05
    for _ in range(200):
        inner = P.product_settings(0.5 + rng.uniform(-0.1, 0.1), 0.5 + rng.uniform(-0.05, 0.05))
        rows = (inner.nominal[None, :, None] * verts).reshape(24, 16) @ pef.factors.ravel()
        assert np.all(rows <= 1.0)
    # The nominal-only PEF is NOT valid for the biased corners (so the bound matters).
    naive = P.build_pef(P.isotropic_box(0.9), P.uniform_settings(), 0.05)
    corner = P.product_settings(0.6, 0.55)
    rows = (corner.nominal[None, :, None] * verts).reshape(24, 16) @ naive.factors.ravel()
    assert rows.max() > 1.0


def test_make_valid_repairs_infeasible_candidates():
    s = P.uniform_settings()
    bad = np.full((4, 4), 3.0)
    pef = P.make_valid(bad, 0.05, "ns", s)
    assert np.all(rows_float64(pef)[0] <= 1.0)
    with pytest.raises(ParameterError):
        P.validate_pef(bad, 0.05, "ns", s)
    assert P.validate_pef(np.ones((4, 4)), 0.05, "ns", s) <= 1.0  # F = 1 is a PEF (fact (a))


# --------------------------------------------------------------------------- scoring

def _sample(box, n, rng, settings=None, t=1):
    s = P.uniform_settings() if settings is None else settings
    z = rng.choice(4, size=n, p=s.nominal)
    cdf = np.cumsum(box, axis=1)[z]
    c = np.minimum((rng.random(n)[:, None] > cdf).sum(axis=1), 3)
    return ((t << 4) | (4 * z + c)).astype(np.uint8)


def _params(**kw):
    base = dict(beta=0.14, eps_pe=2.0 ** -64, sigma_target_bits=512, n_max=10 ** 7,
                calibration="isotropic", calibration_chsh=2.8, lam=1e-3)
    base.update(kw)
    return P.PefParams(**base)


def test_first_crossing_matches_per_trial_oracle():
    rng = np.random.default_rng(11)
    codes = _sample(P.tsirelson_box(), 20000, rng)
    params = _params()
    acc = P.PefAccumulator(params)
    assert acc.update(codes)
    # Oracle: naive per-trial loop with math.fsum of the factors' log2 (style guide).
    lf = np.log2(acc.pef.factors.ravel())
    run = 0.0
    first = None
    terms = []
    for i, c in enumerate(codes):
        terms.append(lf[c & 15])
        if i % 50 == 0 or i > 3000:
            run = math.fsum(terms)
            if run >= params.threshold_log2 + 1e-9:
                first = i
                break
    assert acc.success_index == first
    res = acc.result()
    assert res.accepted and res.method == "pef" and res.side_information == "classical"
    assert res.details["success_trial_index"] == first
    assert res.details["harvest_bits"] == 2 * (first + 1)
    assert res.certified_min_entropy_bits == 511.0
    assert res.total_error(1e-10) == pytest.approx(2.0 ** -64 + 1e-10)  # eps_PE + eps_ext [MN]
    # The methods note's planning value: ~3.2e3 trials for 512 bits at 2^-64 [MN].
    assert 2000 < first < 5000


@pytest.mark.parametrize("chunk", [1, 7, 1000, 1 << 20])
def test_chunking_and_numpy_fallback_give_the_same_index(chunk, monkeypatch):
    rng = np.random.default_rng(5)
    codes = _sample(P.isotropic_box(0.95), 8000, rng)
    ref = P.PefAccumulator(_params(calibration_chsh=2.6))
    ref.update(codes)
    acc = P.PefAccumulator(_params(calibration_chsh=2.6))
    if chunk == 7:
        import dicert._kernels as kernels

        monkeypatch.setattr(kernels, "_c_kernel", lambda: None)  # numpy counting path
    for i in range(0, codes.size, chunk):
        if acc.update(codes[i:i + chunk]):
            break
    assert acc.success_index == ref.success_index is not None
    assert acc.log2_t() == ref.log2_t()


def test_counts_variant_and_abort_paths():
    rng = np.random.default_rng(3)
    codes = _sample(P.tsirelson_box(), 3000, rng)
    counts = np.bincount(codes, minlength=32)
    params = _params(n_max=3000)
    res = P.certify_pef_counts(counts, params)
    acc = P.PefAccumulator(params)
    acc.update(codes)
    assert res.details["log2_t"] == pytest.approx(acc.log2_t()[0], abs=1e-9)
    # n_max reached without success: aborted with 0 bits.
    small = _params(n_max=500)
    res = P.certify_pef(codes, small)
    assert not res.accepted and res.certified_min_entropy_bits == 0.0
    assert res.details["analysis_trials"] == 500
    # A generation-round trial (t = 0) under uniform settings is outside the model: factor 0.
    bad = codes.copy()
    bad[10] = 0x00
    acc = P.PefAccumulator(_params())
    acc.update(bad)
    assert acc.dead and not acc.succeeded and acc.done
    with pytest.raises(ProtocolError):
        P.certify_pef_counts(counts, _params(calibration="prefix", calibration_chsh=None,
                                             calibration_trials=100))


def test_prefix_calibration_does_not_score_calibration_trials():
    rng = np.random.default_rng(9)
    codes = _sample(P.tsirelson_box(), 12000, rng)
    params = _params(calibration="prefix", calibration_chsh=None, calibration_trials=5000)
    acc = P.PefAccumulator(params)
    acc.update(codes)
    assert acc.calibration_trials == 5000
    assert acc.succeeded and acc.success_index >= 5000
    res = acc.result()
    assert res.details["harvest_first_trial"] == 5000
    assert acc.analysis_trials == acc.success_index - 5000 + 1
    # The PEF came from the prefix only: identical to one built from those trials' counts.
    box = P.fit_box(P.counts_by_setting(np.bincount(codes[:5000], minlength=32)))
    ref = P.build_pef(box, P.uniform_settings(), 0.14, lam=1e-3)
    assert np.allclose(acc.pef.factors, ref.factors, rtol=1e-9)


def test_spot_checking_log_with_test_flags():
    P.spot_settings(0.2, (0, 1))  # the settings model must build for this design
    rng = np.random.default_rng(2)
    n = 4000
    t = (rng.random(n) < 0.2).astype(np.uint8)
    z = np.where(t == 1, rng.integers(0, 4, n), 1)
    box = P.tsirelson_box()
    cdf = np.cumsum(box, axis=1)[z]
    c = np.minimum((rng.random(n)[:, None] > cdf).sum(axis=1), 3)
    codes = ((t << 4) | (4 * z + c)).astype(np.uint8)

    class Design:
        gamma = 0.2
        generation = (0, 1)

    acc = P.PefAccumulator(_params(beta=0.05, sigma_target_bits=64, eps_pe=1e-6), Design())
    acc.update(codes)
    assert not acc.dead
    assert acc.pef.settings.kind == "spot-checking"
    # A t = 0 trial with non-generation settings is outside the model.
    bad = codes.copy()
    bad[0] = (0 << 4) | (4 * 3)
    acc = P.PefAccumulator(_params(beta=0.05), Design())
    acc.update(bad)
    assert acc.dead


# --------------------------------------------------------------------------- parameters

def test_params_from_mapping_names_the_key():
    good = {"beta": 0.02, "eps_pe": 1e-9, "sigma_target_bits": 512, "n_max": 10 ** 8,
            "calibration": "prefix", "calibration_trials": 10 ** 6}
    p = P.PefParams.from_mapping(good, "x.toml: [analysis]")
    assert p.model == "ns" and p.lam == 1e-3
    cases = [
        ({"beta": 0}, "beta"), ({"beta": "a"}, "beta"), ({"eps_pe": 1.0}, "eps_pe"),
        ({"n_max": 1.5}, "n_max"), ({"model": "quantum"}, "model"), ({"lam": 1}, "lam"),
        ({"bogus": 1}, "bogus"), ({"calibration_trials": 0}, "calibration_trials"),
        ({"calibration": "isotropic", "calibration_trials": 0}, "calibration_chsh"),
        ({"bias_x": 0.6}, "bias_x"), ({"p_x0": 0.9, "bias_x": 0.2}, "bias_x"),
    ]
    for change, key in cases:
        d = {**good, **change}
        with pytest.raises(ProtocolError) as info:
            P.PefParams.from_mapping(d, "x.toml: [analysis]")
        msg = str(info.value)
        assert "x.toml" in msg and f"'{key}'" in msg and "\n" not in msg
    tab = P.PefParams.from_mapping({**good, "calibration": "table", "calibration_trials": 0,
                                    "calibration_table": P.tsirelson_box().ravel().tolist()})
    assert np.allclose(tab.anticipated_box(), P.tsirelson_box())
    assert tab.threshold_log2 == pytest.approx(0.02 * 512 + math.log2(1e9))


# --------------------------------------------------------------------------- planning

def test_plan_tsirelson_box_512_bits():
    # [MN]: 512 bits at eps_PE = 2^-64: expected n ~ 3.2e3 at beta ~ 0.14; latency floor
    # 64 / D_LR = 1383 trials.
    plan = P.plan_pef(P.tsirelson_box(), target_bits=512, eps_pe=2.0 ** -64)
    assert plan.expected_trials == pytest.approx(3.2e3, rel=0.05)
    assert 0.1 < plan.beta < 0.2
    assert plan.latency_floor_trials == pytest.approx(1383, abs=1)
    assert plan.trials_for_completeness > plan.expected_trials


def test_plan_photonic_512_bits(photonic):
    # [MN]: beta* ~ 0.023; E[log2 F] = 2.53e-4, sd 0.0200; expected n = 3.0e5; n(99%) = 4.2e5.
    at = P.plan_pef(photonic, target_bits=512, eps_pe=2.0 ** -64, betas=[0.023])
    assert at.expected_log2_factor == pytest.approx(2.53e-4, rel=0.03)
    assert at.sd_log2_factor == pytest.approx(0.0200, rel=0.03)
    assert at.expected_trials == pytest.approx(3.0e5, rel=0.04)
    assert at.trials_for_completeness == pytest.approx(4.2e5, rel=0.04)
    # Normal-approximation round trip (scipy.stats.norm): P(success) at that n is 0.99.
    thr = 0.023 * 512 + 64
    assert P.completeness_probability(at.trials_for_completeness, at.expected_log2_factor,
                                      at.sd_log2_factor, thr) == pytest.approx(0.99, abs=1e-9)
    # The grid search lands on the flat optimum near there (expected n within 5% of 3.0e5).
    plan = P.plan_pef(photonic, target_bits=512, eps_pe=2.0 ** -64)
    assert 0.015 < plan.beta < 0.035
    assert plan.expected_trials == pytest.approx(3.0e5, rel=0.05)
    assert plan.expected_trials <= at.expected_trials
    assert plan.latency_floor_trials == pytest.approx(64 / 2.7528e-4, rel=1e-3)


# --------------------------------------------------------------------------- integration

def test_shipped_photonic_protocol_loads_with_the_shared_loader():
    from pathlib import Path

    from dicert.protocol import load_protocol, protocol_from_dict

    proto = load_protocol(Path(__file__).resolve().parents[1] / "protocols" / "ch-photonic.toml")
    assert proto.method == "pef"
    assert isinstance(proto.analysis, P.PefParams)
    assert proto.harvest.parties == "AB" and proto.harvest.select == "all"
    d = {"name": "x", "bell": {"kind": "chsh"}, "settings": {"gamma": 1.0},
         "harvest": {"parties": "AB", "select": "all"},
         "analysis": {"method": "pef", "beta": 0.02, "eps_pe": 1e-9, "sigma_target_bits": 64,
                      "n_max": 1000, "calibration_trials": 10, "lam": 2.0},
         "extractor": {"kind": "toeplitz", "eps_ext": 1e-9}}
    with pytest.raises(ProtocolError, match="'lam'"):
        protocol_from_dict(d, "p.toml")


def test_simulator_photonic_box_matches_the_note(photonic):
    simulate = pytest.importorskip("dicert.simulate")
    box = np.asarray(simulate.box_photonic(None)).reshape(4, 4)
    assert np.abs(box - photonic).max() < 1e-6  # [MN] table, 7 digits
    assert P.build_pef(box, beta=0.01).rate == pytest.approx(0.014335, rel=2e-4)  # [MN]


def test_photonic_run_with_prefix_calibration_succeeds():
    """Invented photonic run (methods note model): the prefix fixes the PEF, a modest target is
    reached, and the success index agrees with a per-trial oracle over the analysis trials."""
    rng = np.random.default_rng(12)
    box = P.fit_box(PHOTONIC_TABLE / PHOTONIC_TABLE.sum(axis=1, keepdims=True) * 1e9)
    n = 400_000
    codes = _sample(box, n, rng)
    params = P.PefParams(beta=0.03, eps_pe=1e-3, sigma_target_bits=32, n_max=n,
                         calibration="prefix", calibration_trials=100_000, lam=1e-3)
    res = P.certify_pef(codes, params)
    assert res.accepted, res.details["outcome"]
    k = res.details["success_trial_index"]
    lf = np.log2(np.asarray(res.details["pef"]["factors"]).ravel())
    run = np.cumsum(lf[codes[100_000:] & 15])
    oracle = 100_000 + int(np.argmax(run >= params.threshold_log2 + 1e-9))
    assert k == oracle


def test_follow_log_yields_appended_trials_and_stops_at_the_trailer(tmp_path):
    import hashlib

    from dicert.logs import BinaryLogWriter

    rng = np.random.default_rng(4)
    parts = [rng.integers(0, 32, m, dtype=np.uint8) for m in (0, 5, 1000, 3, 70000)]
    path = tmp_path / "grow.btl"
    w = BinaryLogWriter(path, has_test_flag=True, streamed=True)
    feed = iter(parts)

    def fake_sleep(_s):  # each poll lets the "experiment" append the next piece
        nxt = next(feed, None)
        if nxt is None:
            if not w._fh.closed:
                w.close()
        else:
            w.append(nxt)

    h = hashlib.sha256()
    got = list(P.follow_log(path, 0.0, chunk_trials=4096, hasher=h, sleep=fake_sleep))
    assert np.array_equal(np.concatenate(got), np.concatenate(parts))
    assert h.hexdigest() == hashlib.sha256(path.read_bytes()).hexdigest()
    # A growing log that stops growing: idle timeout ends the generator without error.
    path2 = tmp_path / "stalled.btl"
    w2 = BinaryLogWriter(path2, has_test_flag=False, streamed=True)
    w2.append(np.arange(16, dtype=np.uint8))
    ticks = iter(range(100))
    got = list(P.follow_log(path2, 0.0, idle_timeout_s=3, sleep=lambda s: None,
                            clock=lambda: next(ticks)))
    assert np.array_equal(np.concatenate(got), np.arange(16))
    w2.close()
    # An invalid byte is reported with its offset.
    bad = tmp_path / "bad.btl"
    w3 = BinaryLogWriter(bad, has_test_flag=False, streamed=True)
    w3.append(np.arange(10, dtype=np.uint8))
    w3.close()
    data = bytearray(bad.read_bytes())
    data[24 + 3] = 0x30
    bad.write_bytes(bytes(data))
    from dicert.errors import LogFormatError

    with pytest.raises(LogFormatError, match="byte offset 27"):
        list(P.follow_log(bad, 0.0, idle_timeout_s=0, sleep=lambda s: None))


# --------------------------------------------------------------------------- adaptive calibration
# [KZB] section "Training versus analysis" of the methods note: the PEF of trial i may be
# re-optimised from all earlier trials (it must depend only on the past), which lets the
# analysis follow drifting conditions; the estimate then holds for the product of the per-trial
# factors exactly as for a fixed PEF.


def _adaptive(**kw):
    base = {"beta": 0.05, "eps_pe": 1e-6, "sigma_target_bits": 10 ** 6, "n_max": 10 ** 8,
            "calibration": "adaptive", "lam": 1e-3, "block_trials": 4000}
    base.update(kw)
    return P.PefParams(**base)


def _block_oracle(codes, blocks, start=0):
    """Naive log2 T after every trial: trial i scored with the factors of its block
    (math.fsum per prefix would be quadratic; a float cumsum is enough away from ties)."""
    lf = np.empty(codes.size)
    for b in blocks:
        lo, hi = b["first_trial"], b["first_trial"] + b["trials"]
        table = np.log2(np.asarray(b["factors"]).ravel())
        lf[lo:hi] = table[codes[lo:hi] & 15]
    return np.cumsum(lf[start:])


def test_adaptive_params_name_the_key():
    good = {"beta": 0.02, "eps_pe": 1e-9, "sigma_target_bits": 512, "n_max": 10 ** 8,
            "calibration": "adaptive"}
    p = P.PefParams.from_mapping(good, "x.toml: [analysis]")
    assert (p.block_trials, p.initial, p.fit_window_blocks) == (P.DEFAULT_BLOCK_TRIALS,
                                                                "trivial", 0)
    assert p.anticipated_box() is None and "block_trials" in p.to_dict()
    iso = P.PefParams.from_mapping({**good, "initial": "isotropic", "calibration_chsh": 2.7,
                                    "block_trials": 10 ** 6, "fit_window_blocks": 3})
    assert np.allclose(iso.anticipated_box(), P.box_from_chsh(2.7))
    # The fixed calibrations keep their parameter dictionaries (and hence their records).
    assert "block_trials" not in _params().to_dict()
    cases = [
        ({"block_trials": 0}, "block_trials"), ({"block_trials": 1.5}, "block_trials"),
        ({"initial": "prefix"}, "initial"), ({"fit_window_blocks": -1}, "fit_window_blocks"),
        ({"lam": 0.0}, "lam"), ({"initial": "isotropic"}, "calibration_chsh"),
        ({"calibration_chsh": 2.5}, "calibration_chsh"),
        ({"initial": "table", "calibration_table": [0.5] * 16}, "calibration_table"),
        ({"calibration_trials": 100}, "calibration_trials"),
        ({"calibration": "prefix", "calibration_trials": 10, "block_trials": 10}, "block_trials"),
        ({"calibration": "prefix", "calibration_trials": 10, "initial": "trivial"}, "initial"),
    ]
    for change, key in cases:
        with pytest.raises(ProtocolError) as info:
            P.PefParams.from_mapping({**good, **change}, "x.toml: [analysis]")
        msg = str(info.value)
        assert "x.toml" in msg and f"'{key}'" in msg and "\n" not in msg, (change, msg)
    # Counts alone lose the trial order that decides the blocks.
    with pytest.raises(ProtocolError, match="'calibration'"):
        P.certify_pef_counts(np.ones(32, dtype=np.int64), p)


def test_adaptive_block_pef_depends_only_on_earlier_trials():
    """[KZB]: F_i is fixed before trial i from earlier data only. Changing the trials of block 1
    leaves the PEFs of blocks 0 and 1 unchanged and changes block 2's; block k's PEF is the one
    built from the maximum-likelihood box of the trials before block k; log2 T and the first
    crossing agree with a per-trial oracle that scores each trial with its block's factors."""
    rng = np.random.default_rng(21)
    codes = _sample(P.isotropic_box(0.9), 3 * 4000 + 2500, rng)
    params = _adaptive()
    res = P.certify_pef(codes, params)
    blocks = res.details["blocks"]
    assert [b["first_trial"] for b in blocks] == [0, 4000, 8000, 12000]
    assert [b["trials"] for b in blocks] == [4000, 4000, 4000, 2500]
    assert blocks[0]["source"] == "initial: trivial" and blocks[1]["source"] == "fit"
    assert [b["fit_trials"] for b in blocks[1:]] == [4000, 8000, 12000]
    for k in (1, 3):
        box = P.fit_box(P.counts_by_setting(np.bincount(codes[:4000 * k], minlength=32)))
        ref = P.build_pef(box, P.uniform_settings(), 0.05, lam=1e-3)
        assert blocks[k]["factors_sha256"] == P.factors_digest(ref.factors)
    # Every block's PEF passed the validity checks (40-digit row maximum below 1).
    assert all(b["max_row_value"] < 1.0 and b["rows_checked"] == 24 for b in blocks)
    changed = codes.copy()
    changed[4000:8000] = _sample(P.isotropic_box(0.6), 4000, np.random.default_rng(22))
    blocks2 = P.certify_pef(changed, params).details["blocks"]
    assert [b["factors_sha256"] for b in blocks2[:2]] == [b["factors_sha256"] for b in blocks[:2]]
    assert blocks2[2]["factors_sha256"] != blocks[2]["factors_sha256"]
    # log2 T = sum over blocks of counts x log2 F (exact counts, fsum) = the per-trial oracle.
    run = _block_oracle(codes, blocks)
    assert res.details["log2_t"] == pytest.approx(run[-1], abs=1e-9)
    assert math.fsum(b["log2_t_block"] for b in blocks) == pytest.approx(run[-1], abs=1e-9)
    # A target crossed inside block 2: the exact first crossing, whatever the chunking.
    thr = float(run[9000]) + 1e-7
    target = (thr - math.log2(1e6)) / 0.05
    hit = _adaptive(sigma_target_bits=target)
    first = int(np.argmax(run >= thr + 1e-9))
    assert first == int(np.argmax(run >= thr - 1e-9)) and 8000 <= first < 12000
    # Pieces: all at once; 997 at a time; single trials across the block boundary at 8000
    # and across the crossing.
    singles = sorted({*range(7990, 8011), *range(first - 10, first + 11)})
    for cuts in ([codes.size], list(range(997, codes.size, 997)), singles):
        acc = P.PefAccumulator(hit)
        for lo, hi in zip([0, *cuts], [*cuts, codes.size]):
            if acc.update(codes[lo:hi]) or acc.done:
                break
        assert acc.success_index == first
        assert acc.result().details["harvest_first_trial"] == 0


def test_adaptive_matches_fixed_calibration_on_stationary_data():
    """Stationary data: with a block longer than the run, adaptive calibration IS the fixed
    one (same PEF, same log2 T, same success trial); with a trivial first block of B trials it
    equals a calibration prefix of B trials up to block 1 (same PEF, same success trial)."""
    rng = np.random.default_rng(7)
    codes = _sample(P.tsirelson_box(), 20000, rng)
    fixed = P.certify_pef(codes, _params())
    adap = P.certify_pef(codes, _params(calibration="adaptive", initial="isotropic",
                                        block_trials=10 ** 9))
    assert fixed.accepted and adap.accepted
    for key in ("success_trial_index", "log2_t", "rounding_allowance_log2"):
        assert adap.details[key] == fixed.details[key]
    assert adap.details["pef"]["factors"] == fixed.details["pef"]["factors"]
    assert adap.details["blocks_total"] == 1
    prefix = P.certify_pef(codes, _params(calibration="prefix", calibration_chsh=None,
                                          calibration_trials=5000))
    trivial = P.certify_pef(codes, _params(calibration="adaptive", calibration_chsh=None,
                                           block_trials=5000))
    assert prefix.accepted and trivial.accepted
    assert trivial.details["success_trial_index"] == prefix.details["success_trial_index"]
    assert trivial.details["blocks"][1]["factors"] == prefix.details["pef"]["factors"]
    # The trivial first block scores (almost) nothing: F = 1 shrunk by the 1e-12 row margin.
    assert -1e-7 < trivial.details["blocks"][0]["log2_t_block"] <= 0.0
    # ... but its trials are analysed and harvested (no calibration prefix to skip).
    assert trivial.details["harvest_first_trial"] == 0
    assert trivial.details["harvest_bits"] == 2 * (trivial.details["success_trial_index"] + 1)


def _drifting_photonic_codes(n_before, n_after, seed):
    """Invented drifting photonic run (Eberhard-type model of dicert.simulate: Eberhard,
    PRA 47, R747 (1993)): detectors of efficiency 0.80 with the matching state and angles, then
    the efficiency drops to 0.76 while state and angles stay."""
    from dicert.simulate import box_photonic, optimal_photonic_setup, simulate_trials

    r, ang, _ = optimal_photonic_setup(None, 0.80, 1.0)
    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)))
    before = simulate_trials(n_before, box_photonic(r, 0.80, ang), rng=rng).codes()
    after = simulate_trials(n_after, box_photonic(r, 0.76, ang), rng=rng).codes()
    return np.concatenate([before, after])


DRIFT_ANALYSIS = {"beta": 0.03, "eps_pe": 1e-3, "sigma_target_bits": 32, "n_max": 10 ** 7,
                  "lam": 1e-3}


def test_adaptive_follows_a_drifting_source_faster_than_a_fixed_prefix():
    """[KZB] (PEFs re-fitted from the past adapt to drifting conditions): the PEF fitted to the
    first 10^5 trials (efficiency 0.80) scores the later trials (0.76) with a negative expected
    log2 F; re-fitting every 10^5 trials from all earlier trials reaches the target, a fixed
    PEF from the same 10^5-trial prefix does not within the run (fixed seed)."""
    codes = _drifting_photonic_codes(100_000, 700_000, seed=2) | np.uint8(0x10)
    fixed = P.certify_pef(codes, P.PefParams(**DRIFT_ANALYSIS, calibration="prefix",
                                             calibration_trials=100_000))
    adap = P.certify_pef(codes, P.PefParams(**DRIFT_ANALYSIS, calibration="adaptive",
                                            block_trials=100_000))
    assert adap.accepted, adap.details["outcome"]
    assert (not fixed.accepted
            or fixed.details["success_trial_index"] > adap.details["success_trial_index"])
    assert not fixed.accepted and fixed.details["log2_t"] < 0.0
    # Both used the same PEF for trials 100000..199999 (fitted to the same prefix).
    assert adap.details["blocks"][1]["factors"] == fixed.details["pef"]["factors"]


def test_certify_and_verify_an_adaptive_protocol_on_a_drifting_log(tmp_path):
    """End to end: an adaptive protocol (protocol_from_dict) on a drifting photonic log is
    certified, stops at the exact crossing of the per-block oracle, and verifies."""
    import tomllib
    from pathlib import Path

    from dicert.certify import certify
    from dicert.logs import TrialArrays, write_log
    from dicert.protocol import protocol_from_dict
    from dicert.verify import verify

    root = Path(__file__).resolve().parents[1]
    d = tomllib.loads((root / "protocols" / "ch-photonic.toml").read_text())
    a = d["analysis"]
    del a["calibration_trials"]
    a.update(DRIFT_ANALYSIS, calibration="adaptive", initial="trivial", block_trials=100_000)
    d["extractor"]["eps_ext"] = 1e-3
    proto = protocol_from_dict(d, "pef-adaptive")
    codes = _drifting_photonic_codes(100_000, 700_000, seed=2)
    log = tmp_path / "drift.btl"
    write_log(log, TrialArrays.from_codes(codes, has_test_flag=False))
    seed = tmp_path / "seed.bin"
    seed.write_bytes(np.random.default_rng(8).bytes(200_000))
    res = certify(log, proto, seed, tmp_path / "out")
    assert res.status == "certified", res.abort_reason
    det = res.record["entropy"]["finite_size"]["details"]
    k = det["success_trial_index"]
    run = _block_oracle(codes, det["blocks"])
    thr = proto.analysis.threshold_log2
    assert k == int(np.argmax(run >= thr + 1e-9)) == int(np.argmax(run >= thr - 1e-9))
    assert res.success_trial_index == k and det["harvest_first_trial"] == 0
    assert det["blocks_total"] == k // 100_000 + 1 and det["block_factor_tables"] == "listed"
    rep = verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    assert rep.scope == "full"
