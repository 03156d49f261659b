"""Soundness of PEF certification by simulation.

Statements checked (sources):
- [KZB] E. Knill, Y. Zhang, P. Bierhorst, Phys. Rev. Research 2, 033465 (2020): for a PEF F with
  power beta and any stopping time, P(nu(C|Z,e) >= (eps T)^(-1/beta)) <= eps (the probability
  estimate); the product M_k = T_k prod_i nu(c_i|z_i, e)^beta is a test supermartingale.
- [Ville] J. Ville, "Etude critique de la notion de collectif" (1939): for a non-negative
  supermartingale with M_0 = 1, P(sup_k M_k >= 1/eps) <= eps.
- Every PEF is a test factor against local realism (methods note section 1 fact (d), derived):
  local devices cannot make T large except with probability <= 1/T.
Statistical checks use scipy.stats.binom (reference library) for the one-sided tail, and each
comes with a negative control (an invalid, scaled-up F) showing the check can fail.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binom

from dicert.finite import pef as P


def _simulate(factors, beta, vertices, vertex_p, settings, runs, n, rng):
    """Adversary with classical side information e: each trial's box is a model vertex drawn
    from ``vertex_p`` (e records the draws). Returns per-run sup_k of
    log2 T_k + beta * log2 nu(c_1..c_k | z_1..z_k, e)  (log2 of the supermartingale M_k) and
    sup_k log2 T_k."""
    shape = (runs, n)
    v = rng.choice(len(vertices), size=shape, p=vertex_p)
    s_vert = rng.integers(0, settings.vertices.shape[0], size=shape)
    cum_s = np.cumsum(settings.vertices, axis=1)[s_vert]
    z = np.minimum((rng.random(shape)[..., None] > cum_s).sum(axis=-1), 3)
    cond = vertices[v, z]  # (runs, n, 4) = nu_e(.|z)
    c = np.minimum((rng.random(shape)[..., None] > np.cumsum(cond, axis=-1)).sum(axis=-1), 3)
    p = np.take_along_axis(cond, c[..., None], axis=-1)[..., 0]
    with np.errstate(divide="ignore"):
        log2f = np.log2(factors[z, c])
    log2t = np.cumsum(log2f, axis=1)
    log2m = log2t + beta * np.cumsum(np.log2(p), axis=1)
    return log2m.max(axis=1), log2t.max(axis=1)


def _tight_vertices(pef, tol=1e-6):
    bm = P.box_model(pef.model)
    rows = P.pef_rows(bm, pef.settings, pef.beta).reshape(pef.settings.vertices.shape[0], -1, 16)
    vals = (rows @ pef.factors.ravel()).max(axis=0)
    return bm.vertices[vals >= vals.max() - tol]


def _tail_pvalue(k, runs, eps):
    # P(X >= k) for X ~ Binomial(runs, eps) (scipy.stats.binom).
    return float(binom.sf(k - 1, runs, eps))


@pytest.mark.parametrize("model,beta", [("ns", 0.2), ("ns", 0.02), ("tsirelson", 0.05)])
def test_probability_estimate_fails_at_most_eps(model, beta):
    """[KZB] + [Ville]: fraction of runs whose estimate ever undercuts the true probability."""
    eps = 0.05
    rng = np.random.default_rng(20240 + int(beta * 1000))
    pef = P.build_pef(P.tsirelson_box(), P.uniform_settings(), beta, model=model)
    verts = _tight_vertices(pef)
    assert len(verts) >= 2
    runs, n = 3000, 150
    log2m, _ = _simulate(pef.factors, beta, verts, np.full(len(verts), 1 / len(verts)),
                         pef.settings, runs, n, rng)
    fails = int(np.sum(log2m >= math.log2(1 / eps)))
    assert _tail_pvalue(fails, runs, eps) > 1e-4, (fails, runs)
    # Negative control: the same F scaled by 1.05 is not a PEF; the check catches it.
    bad = pef.factors * 1.05
    log2m_bad, _ = _simulate(bad, beta, verts, np.full(len(verts), 1 / len(verts)),
                             pef.settings, runs, n, rng)
    fails_bad = int(np.sum(log2m_bad >= math.log2(1 / eps)))
    assert _tail_pvalue(fails_bad, runs, eps) < 1e-6, (fails_bad, runs)


def test_bias_bounded_pef_is_sound_for_biased_settings():
    """Settings drawn at the corners of the declared bias box (an adversarial RNG within the
    bound) still give failure frequency <= eps [KZB, partly known settings]."""
    eps = 0.05
    rng = np.random.default_rng(77)
    s = P.spot_settings(0.5, (0, 0), bias_x=0.1, bias_y=0.1)
    pef = P.build_pef(P.isotropic_box(0.95), s, 0.1)
    verts = _tight_vertices(pef)
    log2m, _ = _simulate(pef.factors, 0.1, verts, np.full(len(verts), 1 / len(verts)), s,
                         3000, 150, rng)
    fails = int(np.sum(log2m >= math.log2(1 / eps)))
    assert _tail_pvalue(fails, 3000, eps) > 1e-4


def test_local_devices_never_succeed():
    """Local devices: every LD box has E[F] <= 1 (fact (d)), checked exactly in float64, and
    simulated local strategies (random LD box per trial, including the 3-win boxes that make
    the rows tight) never reach the success threshold."""
    pef = P.build_pef(P.tsirelson_box(), P.uniform_settings(), 0.14, lam=1e-3)
    ld = P.local_deterministic_boxes()
    for box in ld:
        ef = math.fsum((pef.settings.nominal[:, None] * box * pef.factors).ravel())
        assert ef <= 1.0
    rng = np.random.default_rng(3)
    wins = np.array([sum(box[z, c] for z in range(4) for c in range(4)
                         if ((c >> 1) ^ (c & 1)) == (z >> 1) * (z & 1)) for box in ld])
    for p in (np.full(16, 1 / 16), (wins == 3) / np.sum(wins == 3)):
        _, log2t = _simulate(pef.factors, 0.14, ld, p, pef.settings, 200, 2000, rng)
        # Threshold for 64 bits at eps_PE = 2^-20: beta*64 + 20 = 28.96 bits.
        assert np.all(log2t < 0.14 * 64 + 20)
        # [Ville]: P(sup T >= 2^5) <= 1/32 for a test supermartingale under local realism.
        assert _tail_pvalue(int(np.sum(log2t >= 5)), 200, 1 / 32) > 1e-4
    # End to end through the accumulator: a local deterministic device log never succeeds.
    params = P.PefParams(beta=0.14, eps_pe=2.0 ** -20, sigma_target_bits=64, n_max=10 ** 6,
                         calibration="isotropic", calibration_chsh=2.8, lam=1e-3)
    z = rng.integers(0, 4, 10 ** 6)
    box = ld[np.flatnonzero(wins == 3)[0]]
    c = box[z].argmax(axis=1)
    codes = ((1 << 4) | (4 * z + c)).astype(np.uint8)
    res = P.certify_pef(codes, params)
    assert not res.accepted and res.certified_min_entropy_bits == 0.0


def test_quantum_device_reaches_target_and_estimate_holds():
    """Completeness side with soundness check: Tsirelson-box devices succeed, and the
    certified sigma_target is below the true -log2 nu(C|Z) of the harvested outcomes except with
    probability eps (here checked on every run)."""
    rng = np.random.default_rng(5)
    params = P.PefParams(beta=0.1, eps_pe=0.05, sigma_target_bits=40, n_max=5000,
                         calibration="isotropic", calibration_chsh=2.8, lam=1e-3)
    rho = P.tsirelson_box()
    pef = P.build_pef(P.box_from_chsh(2.8), P.uniform_settings(), 0.1, lam=1e-3)
    fails = ok = 0
    for _ in range(60):
        z = rng.integers(0, 4, 2000)
        c = np.minimum((rng.random(2000)[:, None] > np.cumsum(rho, axis=1)[z]).sum(axis=1), 3)
        codes = ((1 << 4) | (4 * z + c)).astype(np.uint8)
        res = P.certify_pef(codes, params, pef=pef)
        if res.accepted:
            ok += 1
            k = res.details["success_trial_index"] + 1
            true_h = -math.fsum(np.log2(rho[z[:k], c[:k]]))
            fails += true_h < params.sigma_target_bits
    assert ok >= 55
    assert _tail_pvalue(fails, ok, 0.05) > 1e-4


def test_local_devices_never_succeed_with_adaptive_calibration():
    """calibration = "adaptive": each block's PEF is fitted to the earlier trials, so a local
    adversary knows it before playing the block. It plays, trial by trial, a local
    deterministic box maximising E[F] under the PEF in force (the rows make E[F] <= 1 for every
    local box, methods note fact (d)); the product of the per-trial factors is still a test
    supermartingale [KZB], so no run succeeds and sup log2 T >= 5 happens in at most a
    Ville-compatible fraction [Ville]. Control: quantum (Tsirelson-box) devices succeed with
    the same protocol, so the check can fail."""
    beta, block, n_blocks, runs = 0.14, 2000, 4, 12
    params = P.PefParams(beta=beta, eps_pe=2.0 ** -20, sigma_target_bits=64,
                         n_max=block * n_blocks, calibration="adaptive", lam=1e-3,
                         initial="isotropic", calibration_chsh=2.8, block_trials=block)
    ld = P.local_deterministic_boxes()
    det_c = ld.argmax(axis=2)  # (16, 4): the outcome c each local box gives for settings z
    rng = np.random.default_rng(31)
    sups = []
    for _ in range(runs):
        acc = P.PefAccumulator(params)
        log2f = []
        for _k in range(n_blocks):
            for part in (1, block - 1):  # the first trial opens the block (and fixes its PEF)
                f = acc.pef.factors
                gain = (acc.pef.settings.nominal * f[np.arange(4), det_c]).sum(axis=1)
                assert gain.max() <= 1.0
                best = np.flatnonzero(gain >= gain.max() - 1e-12)
                z = rng.integers(0, 4, part)
                c = det_c[rng.choice(best, part), z]
                codes = ((1 << 4) | (4 * z + c)).astype(np.uint8)
                acc.update(codes)
                log2f.append(np.log2(acc.pef.factors[z, c]))  # the PEF that scored them
        res = acc.result()
        assert not res.accepted and res.certified_min_entropy_bits == 0.0
        assert res.details["blocks_total"] == n_blocks
        run = np.cumsum(np.concatenate(log2f))
        assert res.details["log2_t"] == pytest.approx(run[-1], abs=1e-9)
        sups.append(run.max())
    sups = np.array(sups)
    assert np.all(sups < params.threshold_log2)
    assert _tail_pvalue(int(np.sum(sups >= 5)), runs, 1 / 32) > 1e-4
    # Control: the same protocol on Tsirelson-box trials succeeds.
    rho = P.tsirelson_box()
    z = rng.integers(0, 4, block * n_blocks)
    c = np.minimum((rng.random(z.size)[:, None] > np.cumsum(rho, axis=1)[z]).sum(axis=1), 3)
    res = P.certify_pef(((1 << 4) | (4 * z + c)).astype(np.uint8), params)
    assert res.accepted
