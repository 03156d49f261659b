"""Records of earlier formats (stored fixtures written by dicert-record/1, /2 and /3, see
tests/fixtures/records/README.md) keep verifying, alone and in a chain that continues with
dicert-record/4 pulses; report and the beacon site read them under today's names, mapped in
one place (dicert.stages.record_compat)."""

from __future__ import annotations

import json
import math
import shutil
from pathlib import Path

import numpy as np
import pytest

from helpers import ROOT, sim_trials

FIX = ROOT / "tests" / "fixtures" / "records"
KEY = FIX / "fixture.key"
PUB = FIX / "fixture.key.pub"
V2 = ("martingale", "eat", "pef", "aborted")


def _rec(path: Path) -> dict:
    return json.loads(path.read_bytes())


@pytest.mark.parametrize("folder", ("v2", "v3"))
@pytest.mark.parametrize("name", V2)
def test_stored_records_verify_authenticated(folder, name):
    from dicert.verification import verify

    rec_path = FIX / folder / name / "record.json"
    assert _rec(rec_path)["format"] == f"dicert-record/{folder[1:]}"
    rep = verify(rec_path, public_key=PUB)
    assert rep.authenticated and rep.result in ("VERIFIED", "VERIFIED-PARTIAL")


@pytest.mark.parametrize("folder", ("v2", "v3"))
@pytest.mark.parametrize("name", ("martingale", "pef"))
def test_stored_records_verify_in_full_with_log_and_seed(folder, name):
    from dicert.verification import verify

    d = FIX / folder / name
    rep = verify(d / "record.json", log=d / "log.btl", seed=d / "seed.bin",
                 bits=d / "random.bits", public_key=PUB)
    assert rep.result == "VERIFIED" and rep.scope == "full"


def test_stored_v1_record_verifies_and_says_what_it_lacks():
    from dicert.verification import verify

    m = FIX / "v2" / "martingale"
    rec_path = FIX / "v1" / "martingale" / "record.json"
    assert _rec(rec_path)["format"] == "dicert-record/1"
    rep = verify(rec_path, log=m / "log.btl", seed=m / "seed.bin", bits=m / "random.bits",
                 public_key=PUB)
    assert rep.result == "VERIFIED"
    assert any("dicert-record/1" in n and "design-conformance" in n for n in rep.notes)


@pytest.mark.parametrize("record,edit,field", [
    ("v2/eat", lambda r: r["eps"]["terms"].__setitem__("eps_ext", 1e-30),
     "error_budget.terms[3].value"),
    ("v2/eat", lambda r: r["eps"].__setitem__("total", 1e-30), "error_budget.total"),
    ("v2/eat", lambda r: r["entropy"]["finite_size"].__setitem__("min_entropy_bits", 1e9),
     "entropy.finite_size.certified_min_entropy_bits"),
    ("v2/eat", lambda r: r["harvest"].__setitem__("rounds", "generation"), "harvest.select"),
    ("v2/eat", lambda r: r["estimate"].__setitem__("chsh_lower", 2.9),
     "estimate.chsh_lower_bound"),
    ("v3/martingale", lambda r: r["estimate"].__setitem__("chsh_martingale", 2.9),
     "estimate.chsh_estimate"),
    ("v3/martingale", lambda r: r["estimate"].__setitem__("chsh_estimate", 2.9),
     "estimate.chsh_ratio_estimate"),
    ("v3/martingale",
     lambda r: r["entropy"]["finite_size"].__setitem__("certified_min_entropy_bits", 1e9),
     "entropy.finite_size.certified_min_entropy_bits"),
])
def test_a_changed_old_record_fails_under_the_new_name(tmp_path, record, edit, field):
    # Re-sealed without the key (unsigned): the recomputation under today's names still
    # catches each changed number and names its field.
    from dicert.audit.record import record_bytes, seal_record
    from dicert.errors import VerificationError
    from dicert.verification import verify

    rec = _rec(FIX / record / "record.json")
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    edit(body)
    p = tmp_path / "forged.json"
    p.write_bytes(record_bytes(seal_record(body, None)))
    with pytest.raises(VerificationError) as info:
        verify(p)
    assert info.value.field == field


@pytest.mark.parametrize("name", V2)
def test_upgraded_budget_sums_to_the_recorded_total(name):
    from dicert.stages.record_compat import upgrade_body

    old = _rec(FIX / "v2" / name / "record.json")
    new = upgrade_body(old)
    assert new["format"] == old["format"]  # the format stays as written
    assert "eps" not in new and new["soundness_error"] == old["eps"]["total"]
    terms = new["error_budget"]["terms"]
    assert math.fsum(t["value"] for t in terms) == pytest.approx(old["eps"]["total"], rel=1e-15)
    assert new["entropy"]["finite_size"]["certified_min_entropy_bits"] == \
        old["entropy"]["finite_size"]["min_entropy_bits"]
    assert new["harvest"]["select"] == old["harvest"]["rounds"]
    assert new["log"]["coverage"] == old["log"]["scope"]
    assert new["extractor"]["seed_bits"] == old["extractor"]["seed_bits_used"]


def test_the_missing_eat_term_is_listed():
    # dicert-record/2 listed eps_ea, eps_s, eps_ext (3e-8) under a total of 4e-8: entropy
    # accumulation's soundness error is eps_ea + 2 eps_s + eps_ext (Arnon-Friedman, Renner &
    # Vidick, SIAM J. Comput. 48, 181 (2019); the factor 2 for a purified-distance smoothing:
    # Tomamichel, Schaffner, Smith & Renner, IEEE Trans. Inf. Theory 57, 5524 (2011)).
    from dicert.stages.record_compat import upgrade_body

    old = _rec(FIX / "v2" / "eat" / "record.json")
    assert math.fsum(old["eps"]["terms"].values()) == pytest.approx(3e-8)
    assert old["eps"]["total"] == pytest.approx(4e-8)
    terms = upgrade_body(old)["error_budget"]["terms"]
    assert [t["name"] for t in terms] == ["eps_ea", "eps_s", "eps_s", "eps_ext"]
    assert math.fsum(t["value"] for t in terms) == pytest.approx(4e-8, rel=1e-15)


def test_chain_mixing_v2_and_v3_pulses_verifies(tmp_path):
    from dicert.certification import certify
    from dicert.errors import DicertError
    from dicert.logs import write_log
    from dicert.verification import verify_chain

    chain = tmp_path / "chain"
    shutil.copytree(FIX / "v2" / "chain", chain)
    log, seed = tmp_path / "new.btl", tmp_path / "seed.bin"
    write_log(log, sim_trials(20_000, seed=77))
    seed.write_bytes(np.random.default_rng(78).bytes(12_000))
    uniform = ROOT / "protocols" / "chsh-uniform.toml"
    # The protocol file changed (its keys were renamed): an undeclared change is refused.
    with pytest.raises(DicertError):
        certify(log, uniform, seed, tmp_path / "out0", key=KEY, chain=chain)
    res = certify(log, uniform, seed, tmp_path / "out", key=KEY, chain=chain,
                  protocol_change="protocol keys renamed ([harvest] select)")
    assert res.status == "certified" and res.record["format"] == "dicert-record/4"
    formats = [_rec(p)["format"] for p in sorted(chain.glob("pulse-*.json"))]
    assert formats == ["dicert-record/2", "dicert-record/2", "dicert-record/4"]
    rep = verify_chain(chain, public_key=PUB)
    assert rep.pulses == 3 and rep.authenticated


def test_report_and_site_read_v2_records(tmp_path):
    from dicert.beacon import build_site
    from dicert.reporting import render_markdown, write_report
    from dicert.stages.record_compat import upgrade_body

    rec_path = FIX / "v2" / "eat" / "record.json"
    old = _rec(rec_path)
    res = write_report(rec_path, tmp_path / "r.md", with_plan=False)
    assert res.soundness_error == old["eps"]["total"]
    assert res.certified_min_entropy_bits == old["certified_min_entropy_bits"]
    assert res.chsh_lower_bound == old["estimate"]["chsh_lower"]
    text, _ = render_markdown(old, with_plan=False)
    new = upgrade_body(old)
    for t in new["error_budget"]["terms"]:
        assert f"| `{t['name']}` | {t['value']!r} |" in text
    site = build_site(FIX / "v2" / "chain", tmp_path / "site", public_key=PUB)
    page = (Path(site.site_dir) / "pulses" / "pulse-000001.html").read_text(encoding="utf-8")
    first = upgrade_body(_rec(FIX / "v2" / "chain" / "pulse-000001.json"))
    assert f'<td class="num">{first["soundness_error"]!r}</td>' in page
    assert "CHSH estimate per block" in page


def test_upgrade_of_a_v4_record_is_the_identity():
    from dicert.stages.record_compat import upgrade_body

    old = _rec(FIX / "v3" / "martingale" / "record.json")
    new = upgrade_body(old)
    new["format"] = "dicert-record/4"
    assert upgrade_body(new) == new


# --------------------------------------------------------------------------- dicert-record/3

def test_v3_estimate_names_are_swapped_to_the_glossary_meaning():
    # /3 wrote the ratio estimate as estimate.chsh_estimate and the weighted one as
    # chsh_martingale; /4 (and the glossary) call the weighted one chsh_estimate. External
    # check: with every trial a test round and uniform settings, the weighted estimate is the
    # CHSH-game relation S = 8 P(win) - 4 (Clauser, Horne, Shimony & Holt 1969, rewritten as a
    # nonlocal game; common practice).
    from dicert.stages.record_compat import upgrade_body

    old = _rec(FIX / "v3" / "martingale" / "record.json")
    new = upgrade_body(old)
    est = new["estimate"]
    assert est["chsh_estimate"] == old["estimate"]["chsh_martingale"]
    assert est["chsh_ratio_estimate"] == old["estimate"]["chsh_estimate"]
    assert "chsh_martingale" not in est
    assert est["chsh_estimate"] == pytest.approx(8 * est["wins"] / est["test_rounds"] - 4,
                                                 abs=1e-12)
    # the lower bound belongs to the weighted estimate: estimate - margin
    assert est["chsh_lower_bound"] == pytest.approx(est["chsh_estimate"] - est["margin"],
                                                    abs=1e-12)
    sr = new["entropy"]["single_round"]
    assert "single_round_bound_bits_at_chsh_ratio_estimate" in sr
    assert "single_round_bound_bits_at_chsh_estimate" not in sr


def test_new_record_pairs_the_weighted_estimate_with_its_bound(tmp_path):
    from dicert.certification import certify
    from dicert.logs import write_log

    d = FIX / "v3" / "martingale"
    res = certify(d / "log.btl", ROOT / "protocols" / "chsh-uniform.toml", d / "seed.bin",
                  tmp_path / "out")
    est = res.record["estimate"]
    old = _rec(d / "record.json")["estimate"]
    assert res.record["format"] == "dicert-record/4"
    assert est["chsh_estimate"] == old["chsh_martingale"]
    assert est["chsh_ratio_estimate"] == old["chsh_estimate"]
    assert est["chsh_lower_bound"] == pytest.approx(est["chsh_estimate"] - est["margin"])
    sr = res.record["entropy"]["single_round"]
    assert {"single_round_bound_bits_at_chsh_estimate",
            "single_round_bound_bits_at_chsh_ratio_estimate",
            "single_round_bound_bits_at_chsh_lower_bound"} <= set(sr)
    assert "chsh_martingale" not in est and "chsh" not in est
