"""The record's per-block CHSH series (estimate_blocks): values, grouping, verify re-derivation."""

from __future__ import annotations

import copy
import json
import math
import tomllib

import numpy as np
import pytest

from tests.helpers import ROOT, sim_trials


def _protocol(block_trials: int):
    from dicert.protocol import protocol_from_dict

    d = tomllib.loads((ROOT / "protocols" / "chsh-uniform.toml").read_text())
    d.setdefault("design", {})["block_trials"] = block_trials
    return protocol_from_dict(d, "test-uniform-blocks")


def _naive_block_chsh(trials, first: int, stop: int) -> float:
    """Per-trial loop: with uniform settings (every trial a test round) the martingale
    estimator is the mean of 4 (-1)^(x y) (-1)^(a + b); its mean is
    S = E00 + E01 + E10 - E11 (common practice: CHSH, Clauser, Horne, Shimony & Holt, PRL 23,
    880 (1969))."""
    total = 0.0
    for i in range(first, stop):
        sign = -1.0 if (trials.x[i] and trials.y[i]) else 1.0
        corr = 1.0 if trials.a[i] == trials.b[i] else -1.0
        total += 4.0 * sign * corr
    return total / (stop - first)


@pytest.fixture(scope="module")
def certified(tmp_path_factory):
    from dicert.certify import certify
    from dicert.logs import write_log

    tmp = tmp_path_factory.mktemp("blocks")
    trials = sim_trials(40_000, seed=5, visibility=0.98)
    log = tmp / "run.btl"
    write_log(log, trials)
    seed = tmp / "seed.bin"
    seed.write_bytes(np.random.default_rng(9).bytes(20_000))
    result = certify(log, _protocol(3_000), seed, tmp / "out")
    return trials, log, seed, result


def test_block_values_match_a_per_trial_oracle(certified):
    trials, _, _, result = certified
    sec = result.record["estimate_blocks"]
    blocks = sec["blocks"]
    # 40,000 trials in blocks of 3,000: 14 blocks, fewer than the 64-point cap, so no merging.
    assert [b["first_trial"] for b in blocks] == list(range(0, 40_000, 3_000))
    assert sum(b["trials"] for b in blocks) == 40_000
    for b in blocks:
        stop = b["first_trial"] + b["trials"]
        assert b["chsh_estimate"] == pytest.approx(_naive_block_chsh(trials, b["first_trial"], stop),
                                          abs=1e-12)
        # Azuma-Hoeffding half-width (8/gamma) sqrt(ln(1/eps) / (2 n)) with gamma = 1
        # (Azuma 1967; width of the estimator's range as in the methods note).
        half = 8.0 * math.sqrt(math.log(1 / sec["eps_per_side"]) / (2 * b["trials"]))
        assert b["chsh_upper_bound"] - b["chsh_estimate"] == pytest.approx(half, rel=1e-12)
        assert b["chsh_estimate"] - b["chsh_lower_bound"] == pytest.approx(half, rel=1e-12)
    total = np.sum([b["counts"] for b in blocks], axis=0)
    assert total.tolist() == np.asarray(result.record["counts"]["values"]).reshape(-1).tolist()


def test_grouping_caps_the_series():
    from dicert.certify import MAX_BLOCK_POINTS, group_blocks

    rng = np.random.default_rng(3)
    bc = rng.integers(0, 50, size=(1000, 2, 2, 2, 2, 2))
    firsts, counts = group_blocks(bc, 7)
    assert len(firsts) <= MAX_BLOCK_POINTS and counts.shape == (len(firsts), 32)
    assert counts.sum(axis=0).tolist() == bc.reshape(-1, 32).sum(axis=0).tolist()
    size = firsts[1] // 7
    assert all(f == k * size * 7 for k, f in enumerate(firsts))
    assert counts[0].tolist() == bc.reshape(-1, 32)[:size].sum(axis=0).tolist()


def test_verify_rederives_the_series_and_catches_tampering(certified, tmp_path):
    from dicert.audit.record import record_bytes, seal_record
    from dicert.errors import VerificationError
    from dicert.verify import verify

    _, log, seed, result = certified
    verify(result.record_file, log=log, seed=seed)  # with the log: re-scanned
    verify(result.record_file)  # without: re-derived from the recorded block counts
    body = {k: v for k, v in result.record.items() if k not in ("record_sha256", "signature")}

    moved = copy.deepcopy(body)  # one trial moved between two blocks: sums still agree
    b0, b1 = moved["estimate_blocks"]["blocks"][:2]
    j = next(i for i, v in enumerate(b0["counts"]) if v > 0)
    b0["counts"][j] -= 1
    b1["counts"][j] += 1
    p = tmp_path / "moved.json"
    p.write_bytes(record_bytes(seal_record(moved, None)))
    with pytest.raises(VerificationError) as info:
        verify(p)
    assert info.value.field.startswith("estimate_blocks")
    with pytest.raises(VerificationError):
        verify(p, log=log, seed=seed)

    lost = copy.deepcopy(body)  # counts that do not add up to the counts table
    lost["estimate_blocks"]["blocks"][0]["counts"][j] -= 1
    p2 = tmp_path / "lost.json"
    p2.write_bytes(record_bytes(seal_record(lost, None)))
    with pytest.raises(VerificationError, match="do not add up"):
        verify(p2)
    assert json.loads(p2.read_text())["estimate_blocks"]
