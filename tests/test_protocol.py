"""Protocol files: loading, validation with one-line errors naming the key, shipped files."""

from __future__ import annotations

import hashlib
import tomllib
from pathlib import Path

import pytest

from dicert.errors import ProtocolError
from dicert.protocol import load_protocol, protocol_from_dict, shipped_protocol_path

ROOT = Path(__file__).resolve().parents[1]
SHIPPED = ("chsh-uniform", "chsh-spotcheck")


def _base() -> dict:
    return tomllib.loads((ROOT / "protocols" / "chsh-uniform.toml").read_text())


def _write(tmp_path: Path, text: str) -> Path:
    p = tmp_path / "p.toml"
    p.write_text(text)
    return p


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_protocols_load(name):
    path = ROOT / "protocols" / f"{name}.toml"
    p = load_protocol(path)
    assert p.name == name
    # The digest is SHA-256 (FIPS 180-4) over the file bytes, checked with hashlib (common practice).
    assert p.sha256 == hashlib.sha256(path.read_bytes()).hexdigest()
    assert p.text == path.read_text()


def test_uniform_protocol_contents():
    p = load_protocol(ROOT / "protocols" / "chsh-uniform.toml")
    assert p.method == "martingale"
    assert p.design.gamma == 1.0
    assert (p.harvest.parties, p.harvest.select) == ("AB", "all")
    # A CHSH threshold must lie strictly between the local bound 2 and Tsirelson's bound
    # 2*sqrt(2) (Cirel'son 1980) for the protocol to separate classical from quantum devices.
    assert 2.0 < p.analysis.chsh_threshold < 2.0 * 2**0.5
    assert p.extractor.kind == "toeplitz"


def test_spotcheck_protocol_contents():
    p = load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml")
    assert p.method == "eat"
    assert 0.0 < p.design.gamma < 1.0
    assert p.design.generation == (0, 0)
    # Raw output A^n B^n of every round (entropy-accumulation methods note, section 1).
    assert (p.harvest.parties, p.harvest.select) == ("AB", "all")
    # omega_exp - delta must exceed the classical CHSH-game value 3/4 (common practice).
    assert p.analysis.expected_win_probability - p.analysis.tolerance > 0.75


@pytest.mark.parametrize("name", SHIPPED)
def test_packaged_copy_matches(name):
    # `dicert demo` must work from an installed wheel, so the package carries copies.
    packaged = shipped_protocol_path(name)
    if not packaged.exists():
        pytest.skip("packaged copy not present")
    assert packaged.read_bytes() == (ROOT / "protocols" / f"{name}.toml").read_bytes()


@pytest.mark.parametrize(
    ("mutate", "key"),
    [
        (lambda d: d.pop("name"), "name"),
        (lambda d: d.__setitem__("colour", 1), "colour"),
        (lambda d: d.__setitem__("format", "dicert-protocol/9"), "format"),
        (lambda d: d["bell"].__setitem__("kind", "cglmp"), "bell.kind"),
        (lambda d: d["bell"].__setitem__("coefficients", [1.0] * 16), "bell.coefficients"),
        (lambda d: d["settings"].__setitem__("gamma", 0.0), "settings.gamma"),
        (lambda d: d["settings"].__setitem__("gamma", 1.5), "settings.gamma"),
        (lambda d: d["settings"].__setitem__("gamma", "half"), "settings.gamma"),
        (lambda d: d["settings"].__setitem__("generation", [0, 2]), "settings.generation"),
        (lambda d: d["harvest"].__setitem__("parties", "B"), "harvest.parties"),
        (lambda d: d["harvest"].__setitem__("select", "generation"), "harvest.select"),
        (lambda d: d["analysis"].__setitem__("method", "magic"), "analysis.method"),
        (lambda d: d["analysis"].__setitem__("chsh_threshold", 3.5), "chsh_threshold"),
        (lambda d: d["analysis"].pop("eps_est"), "eps_est"),
        (lambda d: d["analysis"].__setitem__("typo_key", 1), "typo_key"),
        (lambda d: d["extractor"].__setitem__("eps_ext", 0.0), "extractor.eps_ext"),
        (lambda d: d["extractor"].__setitem__("kind", "trevisan"), "extractor.kind"),
        (lambda d: d["extractor"].__setitem__("output_rule", "greedy"), "extractor.output_rule"),
        (lambda d: d.pop("extractor"), "extractor"),
        (lambda d: d.__setitem__("harvest", 3), "harvest"),
    ],
)
def test_bad_protocol_names_the_key(mutate, key):
    d = _base()
    mutate(d)
    with pytest.raises(ProtocolError) as info:
        protocol_from_dict(d, "bad.toml")
    msg = str(info.value)
    assert "\n" not in msg
    assert msg.startswith("bad.toml")
    assert f"'{key}'" in msg


def test_eat_requires_pair_of_outcomes():
    d = tomllib.loads((ROOT / "protocols" / "chsh-spotcheck.toml").read_text())
    d["harvest"]["parties"] = "A"
    with pytest.raises(ProtocolError, match="'harvest.parties'"):
        protocol_from_dict(d, "x.toml")
    d["harvest"]["parties"] = "AB"
    d["harvest"]["select"] = "generation"
    with pytest.raises(ProtocolError, match="'harvest.select'"):
        protocol_from_dict(d, "x.toml")


def test_npa_pair_bound_requires_pair():
    d = _base()
    d["analysis"]["single_round"] = "npa-AB"
    d["harvest"]["parties"] = "A"
    with pytest.raises(ProtocolError, match="'harvest.parties'"):
        protocol_from_dict(d, "x.toml")


def test_file_errors(tmp_path):
    with pytest.raises(ProtocolError, match="not found"):
        load_protocol(tmp_path / "missing.toml")
    bad = _write(tmp_path, "name = 'x'\n[bell\nkind='chsh'\n")
    with pytest.raises(ProtocolError) as info:
        load_protocol(bad)
    assert "invalid TOML" in str(info.value) and str(bad) in str(info.value)
    with pytest.raises(ProtocolError, match="not UTF-8"):
        load_protocol(_write_bytes(tmp_path, b"name = '\xff'\n"))


def _write_bytes(tmp_path: Path, data: bytes) -> Path:
    p = tmp_path / "b.toml"
    p.write_bytes(data)
    return p


def test_digest_changes_with_any_byte(tmp_path):
    src = (ROOT / "protocols" / "chsh-uniform.toml").read_text()
    a = load_protocol(_write(tmp_path, src))
    b = load_protocol(_write(tmp_path, src + "\n# a comment\n"))
    assert a.sha256 != b.sha256
    assert a.analysis == b.analysis


# Old keys: the two `rounds` keys meant different things (the harvest selection and the
# pre-declared trial count); neither is read silently, each error names the new key.
@pytest.mark.parametrize("old,new,edit", [
    ("harvest.rounds", "harvest.select",
     lambda t: t.replace('select = "all"', 'rounds = "all"', 1)),
    ("analysis.rounds", "design.trials",
     lambda t: t.replace("eps_ea = 1e-8", "eps_ea = 1e-8\nrounds = 1000000", 1)),
])
def test_old_protocol_keys_name_the_new_key(tmp_path, old, new, edit):
    from typer.testing import CliRunner

    from dicert.cli.app import app

    text = edit((ROOT / "protocols" / "chsh-spotcheck.toml").read_text())
    assert old.split(".")[1] + " =" in text  # the edit took
    path = _write(tmp_path, text)
    with pytest.raises(ProtocolError) as info:
        load_protocol(path)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(str(path))
    assert f"'{old}'" in msg and f"'{new}'" in msg
    res = CliRunner().invoke(app, ["plan", "--protocol", str(path), "--trials", "1e6"])
    assert res.exit_code == 2
    err = res.stderr.strip()
    assert len(err.splitlines()) == 1 and f"'{old}'" in err and f"'{new}'" in err
    assert "Traceback" not in res.output


def test_shipped_protocols_use_no_old_key():
    for name in ("chsh-uniform", "chsh-spotcheck", "chsh-spotcheck-pair", "ch-photonic"):
        d = tomllib.loads((ROOT / "protocols" / f"{name}.toml").read_text())
        assert "rounds" not in d["harvest"] and "rounds" not in d["analysis"]
        assert d["harvest"]["select"] in ("all", "generation")
