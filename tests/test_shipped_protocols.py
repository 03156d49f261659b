"""Protocols ship inside the package: identical copies, `dicert protocols`, names for --protocol,
and the README's commands from a wheel installed outside the checkout."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
import sysconfig
import tomllib
from pathlib import Path

import pytest
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.protocol import (
    SHIPPED_DIR,
    load_protocol,
    shipped_protocol_names,
    shipped_protocol_path,
)

ROOT = Path(__file__).resolve().parents[1]
runner = CliRunner()


def test_every_file_of_protocols_ships_identically():
    # One folder users copy from (protocols/) and the package copy the wheel carries: the same
    # files, byte for byte, in both directions.
    top = {p.name: p.read_bytes() for p in (ROOT / "protocols").iterdir() if p.is_file()}
    pkg = {p.name: p.read_bytes() for p in SHIPPED_DIR.iterdir() if p.is_file()}
    assert {"README.md", "binary-trial-log.md", "ch-photonic.toml"} <= set(top)
    assert set(pkg) == set(top)
    for name, data in top.items():
        assert pkg[name] == data, f"dicert/data/protocols/{name} differs from protocols/{name}"


def test_shipped_protocol_path_exists_for_every_shipped_protocol():
    names = shipped_protocol_names()
    assert set(names) == {p.stem for p in (ROOT / "protocols").glob("*.toml")}
    for name in names:
        path = shipped_protocol_path(name)
        assert path.is_file()
        assert shipped_protocol_path(f"{name}.toml") == path
        assert load_protocol(path).name == name  # file name and `name` key agree


def test_protocol_argument_accepts_a_shipped_name(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    by_name = load_protocol("chsh-spotcheck")
    assert by_name.sha256 == load_protocol(ROOT / "protocols" / "chsh-spotcheck.toml").sha256
    assert load_protocol("chsh-spotcheck.toml").sha256 == by_name.sha256
    # An existing file of that name always wins (a user's edited copy is never shadowed).
    d = tomllib.loads((ROOT / "protocols" / "chsh-uniform.toml").read_text())
    edited = (ROOT / "protocols" / "chsh-uniform.toml").read_text().replace(
        f'name = "{d["name"]}"', 'name = "my-edit"')
    (tmp_path / "chsh-uniform.toml").write_text(edited)
    assert load_protocol("chsh-uniform.toml").name == "my-edit"
    # A path with a directory part is never replaced by a shipped protocol.
    r = runner.invoke(app, ["plan", "--protocol", "sub/chsh-spotcheck.toml"])
    assert r.exit_code == 2 and "sub/chsh-spotcheck.toml" in r.stderr
    r = runner.invoke(app, ["plan", "--protocol", "no-such-protocol"])
    assert r.exit_code == 2 and "no-such-protocol" in r.stderr


def test_protocols_command_lists_every_shipped_protocol():
    r = runner.invoke(app, ["protocols", "--json"])
    assert r.exit_code == 0, r.output
    rows = json.loads(r.stdout)
    assert [x["name"] for x in rows] == list(shipped_protocol_names())
    by = {x["name"]: x for x in rows}
    # Side information of each method (common practice: the martingale and PEF bounds hold
    # against classical side information, entropy accumulation against quantum; Dupuis, Fawzi
    # & Renner 2020; Knill, Zhang & Bierhorst 2020).
    assert (by["chsh-uniform"]["method"], by["chsh-uniform"]["side_information"]) == \
        ("martingale", "classical")
    assert (by["chsh-spotcheck"]["method"], by["chsh-spotcheck"]["side_information"]) == \
        ("eat", "quantum")
    assert (by["ch-photonic"]["method"], by["ch-photonic"]["side_information"]) == \
        ("pef", "classical")
    assert all(x["description"] and "\n" not in x["description"] for x in rows)
    r = runner.invoke(app, ["protocols"])
    assert r.exit_code == 0
    for name in shipped_protocol_names():
        assert name in r.stdout


def test_protocols_copy_refuses_to_overwrite_unless_forced(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    r = runner.invoke(app, ["protocols", "copy", "ch-photonic"])
    assert r.exit_code == 0, r.output
    dest = tmp_path / "ch-photonic.toml"
    assert dest.read_bytes() == (ROOT / "protocols" / "ch-photonic.toml").read_bytes()
    dest.write_text("# my edits\n")
    r = runner.invoke(app, ["protocols", "copy", "ch-photonic"])
    assert r.exit_code == 2 and "already exists" in r.stderr and "--force" in r.stderr
    assert dest.read_text() == "# my edits\n"  # untouched
    r = runner.invoke(app, ["protocols", "copy", "ch-photonic", "--force"])
    assert r.exit_code == 0
    assert dest.read_bytes() == (ROOT / "protocols" / "ch-photonic.toml").read_bytes()
    sub = tmp_path / "sub"
    sub.mkdir()
    r = runner.invoke(app, ["protocols", "copy", "chsh-uniform.toml", "--to", str(sub), "--json"])
    assert r.exit_code == 0 and json.loads(r.stdout)["copied_to"] == str(sub / "chsh-uniform.toml")
    r = runner.invoke(app, ["protocols", "copy", "nope"])
    assert r.exit_code == 2 and "chsh-uniform" in r.stderr  # names the shipped ones
    r = runner.invoke(app, ["protocols", "copy", "chsh-uniform", "--to", str(tmp_path / "none")])
    assert r.exit_code == 2
    assert sorted(p.name for p in tmp_path.iterdir()) == ["ch-photonic.toml", "sub"]  # no temp left


def test_records_cite_published_papers_not_an_unshipped_note():
    # Texts that go into records: no reference to a document the package does not carry.
    from dicert.design import TRIAL_COUNT_REFERENCE
    from dicert.finite.eat import CONSERVATIVE_CONSTANTS

    for text in (TRIAL_COUNT_REFERENCE, CONSERVATIVE_CONSTANTS):
        assert "note" not in text.lower()
        assert re.search(r"\b(19|20)\d\d\b", text)  # a dated publication


def _readme_run_block() -> list[str]:
    text = (ROOT / "README.md").read_text()
    m = re.search(r"## What a run looks like\s+```bash\n(.*?)```", text, re.S)
    assert m, "README: the 'What a run looks like' block moved"
    return [ln for ln in m.group(1).splitlines() if ln.strip()]


def _copy_source(dest: Path) -> None:
    ignore = shutil.ignore_patterns(".venv", ".git", "build", "dist", "*.egg-info", "__pycache__",
                                    ".pytest_cache", ".hypothesis", "*.so", "tests", "out")
    shutil.copytree(ROOT, dest, ignore=ignore)


@pytest.mark.slow
def test_wheel_outside_checkout_runs_the_readme_commands(tmp_path):
    # Build the wheel once (no build isolation: nothing is downloaded; setuptools and wheel come
    # from the test extra), install it with --no-deps into a fresh venv whose dependencies are
    # this interpreter's site-packages, then run the README's commands from an empty directory.
    src = tmp_path / "src"
    _copy_source(src)
    wheels = tmp_path / "wheels"
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "PYTHONHOME")}
    env["PIP_NO_INDEX"] = "1"
    subprocess.run([sys.executable, "-m", "pip", "wheel", "-q", "--no-deps",
                    "--no-build-isolation", "-w", str(wheels), str(src)],
                   check=True, env=env, cwd=tmp_path, capture_output=True)
    (wheel,) = wheels.glob("dicert-*.whl")
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True)
    vpy = venv / "bin" / "python"
    purelib = subprocess.run([str(vpy), "-c", "import sysconfig; print(sysconfig.get_paths()"
                              "['purelib'])"], check=True, capture_output=True, text=True
                             ).stdout.strip()
    # The test interpreter's site directories supply the dependencies. A .pth only appends
    # them to sys.path; their own .pth files (e.g. an editable install of this checkout) are
    # not run, so `import dicert` can only find the installed wheel.
    deps = {sysconfig.get_paths()["purelib"], sysconfig.get_paths()["platlib"]}
    Path(purelib, "_test_deps.pth").write_text("\n".join(sorted(deps)) + "\n")
    subprocess.run([sys.executable, "-m", "pip", "--python", str(vpy), "install", "-q",
                    "--no-deps", "--no-index", str(wheel)], check=True, env=env,
                   capture_output=True)
    work = tmp_path / "work"
    work.mkdir()
    env["PATH"] = f"{venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
    where = subprocess.run([str(vpy), "-c", "import dicert; print(dicert.__file__)"], cwd=work,
                           env=env, check=True, capture_output=True, text=True).stdout.strip()
    assert Path(where).is_relative_to(venv), where
    assert not Path(where).is_relative_to(ROOT)
    shipped = subprocess.run(["dicert", "protocols", "--json"], cwd=work, env=env, check=True,
                             capture_output=True, text=True).stdout
    assert {x["name"] for x in json.loads(shipped)} == {
        p.stem for p in (ROOT / "protocols").glob("*.toml")}
    ran = []
    for line in _readme_run_block():
        # Each line exactly as the README shows it, run by bash in the empty directory.
        r = subprocess.run(["bash", "-c", line], cwd=work, env=env, capture_output=True,
                           text=True, timeout=300)
        assert r.returncode == 0, f"README command failed ({r.returncode}): {line}\n{r.stderr}"
        ran.append(line.split()[1] if line.startswith("dicert ") else line.split()[0])
    assert ran[:1] == ["simulate"] and {"inspect", "plan", "keygen", "certify", "verify",
                                        "protocols"} <= set(ran)
    assert (work / "out" / "random.bits").stat().st_size > 0
    r = subprocess.run(["dicert", "protocols", "copy", "chsh-spotcheck"], cwd=work, env=env,
                       capture_output=True, text=True)
    assert r.returncode == 0 and (work / "chsh-spotcheck.toml").read_bytes() == \
        (ROOT / "protocols" / "chsh-spotcheck.toml").read_bytes()


def test_verify_reads_records_with_the_earlier_citation_text(tmp_path):
    # Records written before the citation named the paper stay verifiable; any other text in
    # that member still fails the recomputation.
    from helpers import sim_trials

    from dicert.audit.record import read_record, seal_record, write_record
    from dicert.certification import certify
    from dicert.errors import VerificationError
    from dicert.finite.eat import CONSERVATIVE_CONSTANTS, LEGACY_CONSERVATIVE_CONSTANTS
    from dicert.logs import write_log
    from dicert.verification import verify

    write_log(tmp_path / "r.btl", sim_trials(30_000, seed=3, gamma=0.05))
    (tmp_path / "s.bin").write_bytes(b"\x05" * 4096)
    res = certify(tmp_path / "r.btl", "chsh-spotcheck", tmp_path / "s.bin", tmp_path / "out")
    rec = read_record(res.record_file)
    body = {k: v for k, v in rec.items() if k not in ("record_sha256", "signature")}
    details = body["entropy"]["finite_size"]["details"]
    assert details["constants"] == CONSERVATIVE_CONSTANTS
    for text, ok in ((LEGACY_CONSERVATIVE_CONSTANTS, True), (CONSERVATIVE_CONSTANTS + "!", False)):
        details["constants"] = text
        path = write_record(tmp_path / f"{ok}.json", seal_record(body, None))
        if ok:
            verify(path, log=tmp_path / "r.btl", seed=tmp_path / "s.bin")
        else:
            with pytest.raises(VerificationError) as info:
                verify(path, log=tmp_path / "r.btl", seed=tmp_path / "s.bin")
            assert info.value.field == "entropy.finite_size.details.constants"
