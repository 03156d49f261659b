"""Helpers shared by the certification tests (simulated logs, the shipped uniform protocol)."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]


def uniform_protocol(**analysis):
    """The shipped protocols/chsh-uniform.toml, with [analysis] keys overridden."""
    from dicert.protocol import protocol_from_dict

    d = tomllib.loads((ROOT / "protocols" / "chsh-uniform.toml").read_text())
    d["analysis"].update(analysis)
    return protocol_from_dict(d, "test-uniform")


def sim_trials(n: int, seed: int = 1, model: str = "quantum", visibility: float = 1.0,
               gamma: float = 1.0):
    """n simulated trials (TrialArrays) from a fixed seed."""
    from dicert.simulate import device_model, simulate_trials

    rng = np.random.Generator(np.random.PCG64(np.random.SeedSequence(seed)))
    src = device_model(model) if model != "quantum" else device_model("quantum", visibility=visibility)
    return simulate_trials(n, src, gamma=gamma, rng=rng)


def cli(*args):
    """Run the dicert CLI in-process (arguments turned into strings)."""
    from typer.testing import CliRunner

    from dicert.cli.app import app

    return CliRunner().invoke(app, list(map(str, args)))


def seed_file(tmp_path: Path, n: int = 8192) -> Path:
    """An extractor seed file of n bytes from a fixed stream."""
    p = tmp_path / "seed.bin"
    p.write_bytes(bytes(np.random.default_rng(5).integers(0, 256, n, dtype=np.uint8)))
    return p


def certify_spec_unsigned(spec, tmp_path: Path):
    """certify a log spec's run under chsh-uniform (unsigned) and check that verify re-derives
    it with the spec and seed (exit 4: integrity checked, authenticity not); returns (seed,
    record path, record body)."""
    from dicert.audit.record import read_record, record_body

    seed = seed_file(tmp_path)
    out = tmp_path / "out"
    r = cli("certify", "--log-spec", spec, "--protocol", ROOT / "protocols" / "chsh-uniform.toml",
            "--seed", seed, "--out", out)
    assert r.exit_code in (0, 3), r.output
    rec = out / "record.json"
    ok = cli("verify", rec, "--log-spec", spec, "--seed", seed)
    assert ok.exit_code == 4, ok.output
    return seed, rec, record_body(read_record(rec))


def edit_join(body: dict, path: tuple, value, tmp_path: Path) -> Path:
    """A copy of a record body with ``log.spec.join.<path>`` set to ``value`` (deleted for
    None), re-sealed unsigned into tmp_path/edited.json."""
    import json

    from dicert.audit.record import seal_record, write_record

    b = json.loads(json.dumps(body))
    node = b["log"]["spec"]["join"]
    for k in path[:-1]:
        node = node[k]
    if value is None:
        del node[path[-1]]
    else:
        node[path[-1]] = value
    write_record(tmp_path / "edited.json", seal_record(b))
    return tmp_path / "edited.json"


def write_station_csv(path: Path, keys, s, o, drop=()) -> None:
    """A lab-style station file (pulse key, setting 1/2, outcome +1/-1) without the keys in
    ``drop``."""
    sign = ("+1", "-1")
    rows = [f"{int(k)},{'12'[int(s[i])]},{sign[int(o[i])]}" for i, k in enumerate(keys)
            if int(k) not in drop]
    path.write_text("pulse,basis,result\n" + "\n".join(rows) + "\n")


def station_spec(path: Path, max_missing: int, keys: str | None = None, first=None,
                 last=None) -> Path:
    """A log spec joining a.csv and b.csv (written by :func:`write_station_csv`) on ``pulse``."""
    lines = ['format = "dicert-logspec/1"', "[join]", f"max_missing = {max_missing}"]
    if keys is not None:
        lines.append(f'keys = "{keys}"')
    if first is not None:
        lines.append(f"first_key = {first}")
    if last is not None:
        lines.append(f"last_key = {last}")
    for name, f in (("A", "a.csv"), ("B", "b.csv")):
        lines += [f"[stations.{name}]", f'files = ["{f}"]', 'key = "pulse"',
                  'setting = "basis"', 'outcome = "result"', f"[stations.{name}.values]",
                  'setting = { "1" = 0, "2" = 1 }', 'outcome = { "+1" = 0, "-1" = 1 }']
    path.write_text("\n".join(lines) + "\n")
    return path
