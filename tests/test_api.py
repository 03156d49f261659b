"""The public face: ``import dicert`` is cheap, its names work, results show themselves briefly.

Checks of the public API of issue 17: lazy re-exports with an explicit ``__all__``, no name
that is also a module, old module paths still importing, short reprs with the headline
numbers, ``summary()``, JSON-ready ``to_dict()``, ``_repr_html_`` tables, plain dict and
list inputs, and the notebook-style example script.
"""

from __future__ import annotations

import html.parser
import importlib.util
import json
import math
import subprocess
import sys
import tomllib
from pathlib import Path

import numpy as np
import pytest

import dicert
from helpers import ROOT, sim_trials, uniform_protocol

HEAVY = ("scipy", "cvxpy", "matplotlib", "cryptography")
REPR_MAX = 240  # characters; the walls of issue 17 were 2.3 to 10.8 kB


def _fresh(code: str) -> str:
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True, cwd=ROOT)
    return out.stdout.strip()


def test_import_dicert_imports_no_heavy_library():
    code = ("import sys, dicert; "
            f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))")
    assert _fresh(code) == ""


def test_all_is_complete_importable_and_free_of_module_clashes():
    pkg = Path(dicert.__file__).parent
    assert len(dicert.__all__) == len(set(dicert.__all__))
    assert set(dicert.__all__) == {"__version__", *dicert._EXPORTS}
    for name in dicert.__all__:
        value = getattr(dicert, name)
        assert value is not None, name
        if name == "__version__":
            continue
        # A public name is never also a module or package file (the clash of issue 17).
        assert not (pkg / f"{name}.py").exists() and not (pkg / name).is_dir(), name
        assert callable(value), name
    assert set(dir(dicert)) >= set(dicert.__all__)
    with pytest.raises(AttributeError, match="no attribute 'nonexistent'"):
        dicert.nonexistent  # noqa: B018


def test_recipes_are_functions_in_a_fresh_interpreter():
    code = ("import inspect, dicert; print(all(inspect.isfunction(getattr(dicert, n)) "
            "for n in ('certify', 'verify', 'plan', 'read_log', 'inspect_log', 'load_protocol')))")
    assert _fresh(code) == "True"


def test_old_module_paths_import_the_real_modules_and_stay_callable():
    import dicert.certification as certification
    import dicert.certify as old_certify
    import dicert.plan as old_plan
    import dicert.planning as planning
    from dicert.verify import VerifyReport, verify

    assert old_certify is certification and old_plan is planning
    assert old_certify.__spec__.name == "dicert.certification"
    assert verify is dicert.verification.verify and VerifyReport.__module__ == "dicert.verification"
    # After `import dicert.certify` the package attribute may be the module: calling it still
    # calls the recipe (here: refuses a missing protocol file with the recipe's own error).
    assert callable(dicert.certify) and callable(dicert.plan)
    with pytest.raises(dicert.DicertError, match="no-such-protocol"):
        dicert.plan("no-such-protocol.toml")


# --------------------------------------------------------------------------- results


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = tmp_path_factory.mktemp("api")
    log = d / "log.btl"
    dicert.write_log(log, sim_trials(20_000, seed=11))
    seed = d / "seed.bin"
    seed.write_bytes(np.random.default_rng(5).bytes(20_000))
    proto = uniform_protocol()
    res = dicert.certify(log, proto, seed, d / "out")
    rep = dicert.verify(res.record_file, log=log, seed=seed, bits=res.bits_file)
    return d, log, seed, proto, res, rep


def _results(run):
    from dicert.logs import summarize_log

    _d, log, _seed, proto, res, rep = run
    look = dicert.inspect_log(log, protocol=proto)
    counts = look.log.counts
    bits = np.unpackbits(np.frombuffer(res.bits_file.read_bytes(), np.uint8))
    return {
        "certify": (res, [f"output_bits={res.output_bits}", "status='certified'",
                          f"trials={res.trials}"]),
        "verify": (rep, ["authenticated=False", f"output_bits={res.output_bits}"]),
        "plan": (dicert.plan(proto, chsh=2.74, trials=10**6, n_points=4, gamma_points=3),
                 ["trials=1000000", "chsh=2.74"]),
        "protocol": (proto, [f"name='{proto.name}'", "method='martingale'"]),
        "log": (summarize_log(log), ["trials=20000", "has_test_flag=False"]),
        "inspect": (look, ["trials=20000", f"chsh_estimate={look.chsh_estimate:.6g}"]),
        "estimate": (look.estimate, [f"chsh_lower_bound={look.estimate.chsh_lower_bound:.6g}"]),
        "finite": (dicert.certify_counts(counts, proto), ["accepted=True"]),
        "entropy": (dicert.entropy_bound(chsh=2.5), ["measure='min'", "parties='A'"]),
        "health": (dicert.run_health_checks(bits), [f"n_bits={bits.size}"]),
        "trials": (sim_trials(1_000, seed=3), ["trials=1000"]),
        "extract": (dicert.extract_toeplitz(bytes(range(256)) * 8, bytes(range(255)) * 16,
                                            1024, n_bits=16_384), ["m_bits=1024", "n_bits=16384"]),
    }


def test_reprs_are_short_and_carry_the_headline_numbers(run):
    for key, (obj, headline) in _results(run).items():
        text = repr(obj)
        assert len(text) <= REPR_MAX, (key, len(text), text)
        assert text.startswith(type(obj).__name__ + "("), text
        for part in headline:
            assert part in text, (key, part, text)
    res = run[4]
    assert res.record_sha256 not in repr(res) and "caution" not in repr(res)
    ext = _results(run)["extract"][0]
    assert len(ext.output) == 128 and "output=" not in repr(ext)  # the bytes stay an attribute
    assert "format =" not in repr(run[3])  # the protocol's TOML text stays an attribute


def test_summary_to_dict_and_html(run):
    class Cells(html.parser.HTMLParser):
        def __init__(self):
            super().__init__()
            self.tags: list[str] = []

        def handle_starttag(self, tag, attrs):
            self.tags.append(tag)

    for key, (obj, _headline) in _results(run).items():
        if key == "trials":
            continue
        if key != "extract":  # ExtractionResult.summary() is the record's dict (audit layer)
            s = obj.summary()
            assert s.splitlines()[0] == type(obj).__name__ and len(s.splitlines()) >= 4, key
        # JSON per RFC 8259 has no NaN or infinity (common practice: allow_nan=False).
        d = obj.to_dict()
        assert isinstance(d, dict) and json.loads(json.dumps(d, allow_nan=False)) == d, key
        page = obj._repr_html_()
        p = Cells()
        p.feed(page)
        assert p.tags[0] == "table" and p.tags.count("tr") >= 4, key
    res = run[4]
    assert res.to_dict()["record"] == json.loads(res.record_file.read_text())  # record in full
    assert f"{res.certified_min_entropy_bits:.6g}" in res.summary()


def test_entropy_bound_is_the_published_formula():
    # Pironio et al., Nature 464, 1021 (2010), eq. (3): f(S) = 1 - log2(1 + sqrt(2 - S^2/4)).
    b = dicert.entropy_bound(chsh=2.5)
    assert b.single_round_bound_bits == pytest.approx(1 - math.log2(1 + math.sqrt(2 - 2.5**2 / 4)),
                                                      rel=1e-12)
    assert f"single_round_bound_bits={b.single_round_bound_bits:.6g}" in repr(b)
    assert b.entropy_bits == b.h_min_bits == b.single_round_bound_bits  # former names, read-only


# --------------------------------------------------------------------------- plain inputs


def test_write_log_takes_a_dict_of_columns_and_lists(tmp_path):
    tr = sim_trials(2_000, seed=4)
    dicert.write_log(tmp_path / "a.csv", tr)
    dicert.write_log(tmp_path / "b.csv", {k: getattr(tr, k).tolist() for k in "xyab"})
    assert (tmp_path / "a.csv").read_bytes() == (tmp_path / "b.csv").read_bytes()
    back = dicert.read_log(tmp_path / "b.csv")
    np.testing.assert_array_equal(back.codes, tr.codes)
    # The trial code (t<<4)|(x<<3)|(y<<2)|(a<<1)|b of the binary log format (protocols/).
    assert dicert.TrialArrays(x=[1], y=[0], a=[1], b=[1], t=[1]).codes.tolist() == [0b11011]


def test_trial_arrays_from_lists_and_the_codes_attribute():
    tr = dicert.TrialArrays(x=[0, 1, 1], y=[1, 0, 1], a=[0, 0, 1], b=[True, 1, 0])
    assert all(isinstance(getattr(tr, k), np.ndarray) and getattr(tr, k).dtype == np.uint8
               for k in "xyab")
    assert tr.codes.tolist() == [0b0101, 0b1001, 0b1110]
    assert tr.codes().tolist() == tr.codes.tolist()  # the earlier method form still works
    assert type(tr.codes()) is np.ndarray


@pytest.mark.parametrize("columns, message", [
    ({"x": [0, 2], "y": [0, 0], "a": [0, 0], "b": [0, 0]},
     "column 'x' holds 2 at index 1; every value must be 0 or 1"),
    ({"x": [0], "y": [0], "a": [0]}, "write_log: missing column 'b'"),
    ({"x": [0], "y": [0], "a": [0], "b": [0], "z": [0]}, "write_log: unknown column 'z'"),
    ({"x": [0, 1], "y": [0], "a": [0, 0], "b": [0, 0]}, "column 'y' has a different length"),
])
def test_bad_columns_are_refused_naming_column_and_index(tmp_path, columns, message):
    with pytest.raises(dicert.DicertError, match=message.replace("(", r"\(")):
        dicert.write_log(tmp_path / "bad.csv", columns)
    assert not (tmp_path / "bad.csv").exists()


def test_protocol_from_a_dict_a_path_or_an_object():
    path = ROOT / "protocols" / "chsh-uniform.toml"
    tables = tomllib.loads(path.read_text())
    from_file = dicert.load_protocol(path)
    from_dict = dicert.load_protocol(tables)
    assert dicert.load_protocol(from_file) is from_file
    assert (from_dict.name, from_dict.analysis, from_dict.design) == (
        from_file.name, from_file.analysis, from_file.design)
    tables["analysis"]["eps_est"] = 2.0
    with pytest.raises(dicert.DicertError, match="eps_est"):
        dicert.load_protocol(tables)
    a = dicert.plan(path, chsh=2.7, trials=10**6, n_points=4, gamma_points=3)
    b = dicert.plan(from_file, chsh=2.7, trials=10**6, n_points=4, gamma_points=3)
    assert a.to_dict() == b.to_dict()


# --------------------------------------------------------------------------- the example


def test_the_library_quickstart_example_runs(tmp_path, capsys):
    spec = importlib.util.spec_from_file_location(
        "library_quickstart", ROOT / "examples" / "library_quickstart.py")
    mod = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(mod)
    assert mod.main(tmp_path) == 0
    out = capsys.readouterr().out
    assert "INVENTED" in out and "CertifyResult(status='certified'" in out
    assert "VerifyReport(result=" in out
    assert sorted(p.name for p in (tmp_path / "certified").iterdir()) == ["random.bits", "record.json"]


def test_inspect_log_agrees_with_the_command_line(run):
    from typer.testing import CliRunner

    from dicert.cli.app import app

    _d, log, _seed, _proto, _res, _rep = run
    look = dicert.inspect_log(log, eps=1e-6)
    r = CliRunner().invoke(app, ["inspect", str(log), "--json"])
    assert r.exit_code == 0, r.output
    cli = json.loads(r.stdout)
    assert (cli["trials"], cli["chsh_ratio_estimate"], cli["chsh_lower_bound"], cli["gamma_source"]) == (
        look.trials, look.chsh, look.chsh_lower, look.design_source)
    # The same refusal, with the same message, from both doors.
    with pytest.raises(dicert.DicertError) as lib:
        dicert.inspect_log(log, gamma=0.5)
    r = CliRunner().invoke(app, ["inspect", str(log), "--gamma", "0.5"])
    assert r.exit_code == 2 and str(lib.value) in r.stderr


def test_display_formats_numpy_scalars_and_escapes_html():
    import dataclasses

    from dicert._display import displayed

    @displayed
    @dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
    class Probe:
        n: object
        label: str

        def _headline(self, full):
            return [("n", self.n), ("label", self.label)]

    p = Probe(n=np.int64(7), label="<b>&</b>")
    assert repr(p) == "Probe(n=7, label='<b>&</b>')"
    assert "&lt;b&gt;&amp;&lt;/b&gt;" in p._repr_html_() and "<b>&</b>" not in p._repr_html_()
    assert p.summary().splitlines() == ["Probe", "  n      7", "  label  <b>&</b>"]
