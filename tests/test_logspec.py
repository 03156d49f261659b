"""Log specs (dicert.logspec): value maps, delimiters, formats, the station join and its audit.

Oracle for the join: an independent per-trial Python dict join of the two stations' rows
(keyed by trial index, keeping keys present at both stations) - common practice for
joining two tables on a key. Value maps are checked against hand-coded per-trial mappings.
All data are simulated (invented).
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from dicert.errors import DicertError, LogFormatError, ParameterError
from dicert.logs import read_trials, summarize_log
from dicert.logspec import load_spec
from tests.helpers import ROOT, sim_trials, uniform_protocol

SIGN = ("+1", "-1")


def _need(module: str):
    """The optional format libraries (extra dicert[formats], in the test extra): skipped
    locally when absent, a failure under CI (CI=true), which must test them."""
    import importlib
    import os

    if os.environ.get("CI") == "true":
        return importlib.import_module(module)
    return pytest.importorskip(module)  # outcome bit 0 -> "+1", 1 -> "-1"


def _run(n=400, seed=3, t=False):
    arr = sim_trials(n, seed=seed, gamma=0.5 if t else 1.0)
    keys = np.arange(n, dtype=np.int64) * 3 + 10
    return arr, keys


def _write_station(path: Path, keys, s, o, *, delim=",", t=None, drop=(), dup=(), swap=None,
                   setting_codes=("1", "2"), outcome_codes=SIGN, extra_col=True):
    rows = []
    for i, k in enumerate(keys):
        if int(k) in drop:
            continue
        f = [str(int(k))]
        if extra_col:
            f.append(f"{int(k) * 125}")
        f += [setting_codes[int(s[i])], outcome_codes[int(o[i])]]
        if t is not None:
            f.append(str(int(t[i])))
        rows.append(delim.join(f))
        if int(k) in dup:
            rows.append(delim.join(f))
    if swap is not None:
        i, j = swap
        rows[i], rows[j] = rows[j], rows[i]
    head = ["pulse"] + (["time_ps"] if extra_col else []) + ["basis", "result"] \
        + (["test_round"] if t is not None else [])
    path.write_text("# invented\n" + delim.join(head) + "\n" + "\n".join(rows) + "\n")


def _spec(path: Path, a="a.csv", b="b.csv", *, delim=None, max_missing=None, test_at=None,
          fmt=None, outcome_map='{ "+1" = 0, "-1" = 1 }'):
    lines = ['format = "dicert-logspec/1"']
    if max_missing is not None:
        lines += ["[join]", f"max_missing = {max_missing}"]
    for name, f in (("A", a), ("B", b)):
        lines += [f"[stations.{name}]", f'files = ["{f}"]', 'key = "pulse"',
                  'setting = "basis"', 'outcome = "result"']
        if fmt:
            lines.append(f'format = "{fmt}"')
        if delim:
            lines.append(f'delimiter = "{delim}"')
        if test_at == name or test_at == "both":
            lines.append('test = "test_round"')
        lines += [f"[stations.{name}.values]", 'setting = { "1" = 0, "2" = 1 }',
                  f"outcome = {outcome_map}"]
    path.write_text("\n".join(lines) + "\n")
    return path


def _oracle(keys, arr, drop_a=(), drop_b=(), t=None):
    """Per-trial dict join (independent of the implementation)."""
    A = {int(k): (int(arr.x[i]), int(arr.a[i])) for i, k in enumerate(keys) if int(k) not in drop_a}
    B = {int(k): (int(arr.y[i]), int(arr.b[i])) for i, k in enumerate(keys) if int(k) not in drop_b}
    T = {int(k): int(t[i]) for i, k in enumerate(keys)} if t is not None else None
    counts = np.zeros((2,) * 5, np.int64)
    n = 0
    for k in sorted(set(A) & set(B)):
        (x, a), (y, b) = A[k], B[k]
        counts[T[k] if T is not None else 1, x, y, a, b] += 1
        n += 1
    return n, counts


def _two_station(tmp_path, n=400, drop_a=(), drop_b=(), delim=",", **kw):
    arr, keys = _run(n)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a, delim=delim, drop=drop_a)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, delim=delim, drop=drop_b)
    return arr, keys


# ------------------------------------------------------------------ mappings and counts


def test_joined_counts_equal_dict_join_oracle(tmp_path):
    arr, keys = _two_station(tmp_path, drop_b=(13, 40))
    spec = _spec(tmp_path / "run.toml", max_missing=2)
    s = summarize_log(spec, chunk_trials=37)  # many chunk boundaries inside the merge
    n, counts = _oracle(keys, arr, drop_b=(13, 40))
    assert s.trials == n == 398
    np.testing.assert_array_equal(s.counts, counts)
    j = s.log_spec["join"]
    assert (j["matched"], j["missing_at_a"], j["missing_at_b"]) == (398, 0, 2)


def test_joined_log_equals_clean_log_counts(tmp_path):
    """No missing trials: the joined log has exactly the counts of the clean x,y,a,b log."""
    from dicert.logs import write_log

    arr, keys = _two_station(tmp_path)
    write_log(tmp_path / "clean.csv", arr)
    joined = summarize_log(_spec(tmp_path / "run.toml"))
    clean = summarize_log(tmp_path / "clean.csv")
    np.testing.assert_array_equal(joined.counts, clean.counts)
    np.testing.assert_array_equal(joined.pair_counts, clean.pair_counts)
    t = read_trials(tmp_path / "run.toml")
    np.testing.assert_array_equal(t.codes(), arr.codes())


@pytest.mark.parametrize("codes,mapping", [
    (("+1", "-1"), '{ "+1" = 0, "-1" = 1 }'),
    (("none", "click"), '{ "click" = 1, "none" = 0 }'),
    (("1", "2"), "{ 1 = 0, 2 = 1 }"),
])
def test_outcome_value_maps(tmp_path, codes, mapping):
    arr, keys = _run(200)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a, outcome_codes=codes)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, outcome_codes=codes)
    t = read_trials(_spec(tmp_path / "run.toml", outcome_map=mapping))
    np.testing.assert_array_equal(t.codes(), arr.codes())


@pytest.mark.parametrize("delim,name", [(",", None), ("\t", "tab"), (";", "semicolon"),
                                        (";", ";")])
def test_delimiters(tmp_path, delim, name):
    arr, keys = _two_station(tmp_path, delim=delim)
    t = read_trials(_spec(tmp_path / "run.toml", delim=name))
    np.testing.assert_array_equal(t.codes(), arr.codes())


def test_wrong_delimiter_is_named(tmp_path):
    _two_station(tmp_path, delim=";")
    spec = _spec(tmp_path / "run.toml")
    with pytest.raises(LogFormatError) as e:
        read_trials(spec)
    assert str(e.value) == (
        f"{tmp_path / 'a.csv'}, line 2: header has no column 'pulse' (named by spec key "
        "'stations.A.key'); its columns: 'pulse;time_ps;basis;result'; the header looks "
        "semicolon-separated: set delimiter = \"semicolon\" in [stations.A]")


def test_test_flag_column_and_agreement(tmp_path):
    arr, keys = _run(300, t=True)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a, t=arr.t)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, t=arr.t)
    for at in ("A", "both"):
        t = read_trials(_spec(tmp_path / f"run-{at}.toml", test_at=at))
        np.testing.assert_array_equal(t.codes(), arr.codes())
    bad = arr.t.copy()
    bad[5] ^= 1
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, t=bad)
    with pytest.raises(LogFormatError, match=rf"b\.csv, key {int(keys[5])}: the stations "
                       "disagree on whether this trial is a test round"):
        read_trials(_spec(tmp_path / "run.toml", test_at="both"))


def test_combined_table_layout(tmp_path):
    arr, _ = _run(150)
    lines = ["SettingA\tSettingB\tOutA\tOutB"]
    for i in range(len(arr)):
        lines.append(f"{arr.x[i] + 1}\t{arr.y[i] + 1}\t{SIGN[arr.a[i]]}\t{SIGN[arr.b[i]]}")
    (tmp_path / "run.tsv").write_text("\n".join(lines) + "\n")
    (tmp_path / "t.toml").write_text('''format = "dicert-logspec/1"
[table]
files = "run.tsv"
columns = { x = "SettingA", y = "SettingB", a = "OutA", b = "OutB" }
[table.values]
x = { "1" = 0, "2" = 1 }
y = { "1" = 0, "2" = 1 }
a = { "+1" = 0, "-1" = 1 }
b = { "+1" = 0, "-1" = 1 }
''')
    t = read_trials(tmp_path / "t.toml")
    np.testing.assert_array_equal(t.codes(), arr.codes())


# ------------------------------------------------------------------ join defects


def test_missing_trial_is_an_error_by_default(tmp_path):
    _, keys = _two_station(tmp_path, drop_b=(13,))
    with pytest.raises(LogFormatError) as e:
        read_trials(_spec(tmp_path / "run.toml"))
    assert str(e.value) == (
        f"{tmp_path / 'b.csv'}, key 13: trial missing at station B (present at station A, "
        "a.csv); the spec tolerates 0 missing trials (join.max_missing); silently dropping "
        "trials can bias the test")


def test_missing_beyond_tolerance_names_first_excess_key(tmp_path):
    _two_station(tmp_path, drop_a=(16, 22), drop_b=(31,))
    with pytest.raises(LogFormatError, match=r"a\.csv, key 22: trial missing at station A"):
        read_trials(_spec(tmp_path / "run.toml", max_missing=1))
    s = summarize_log(_spec(tmp_path / "run.toml", max_missing=3))
    j = s.log_spec["join"]
    assert (j["missing_at_a"], j["missing_at_b"], j["matched"]) == (2, 1, 397)


def test_mismatched_lengths_trailing_trials_missing(tmp_path):
    """Station B stops early: its last trials are missing (counted, tolerated or refused)."""
    arr, keys = _run(100)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a)
    _write_station(tmp_path / "b.csv", keys[:95], arr.y[:95], arr.b[:95])
    with pytest.raises(LogFormatError, match=rf"b\.csv, key {int(keys[95])}: trial missing "
                       "at station B"):
        read_trials(_spec(tmp_path / "run.toml"))
    s = summarize_log(_spec(tmp_path / "run.toml", max_missing=5), chunk_trials=16)
    assert s.trials == 95 and s.log_spec["join"]["missing_at_b"] == 5
    n, counts = _oracle(keys, arr, drop_b=set(int(k) for k in keys[95:]))
    np.testing.assert_array_equal(s.counts, counts)


def test_duplicated_key(tmp_path):
    arr, keys = _run(100)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a, dup=(40,))
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b)
    with pytest.raises(LogFormatError) as e:
        read_trials(_spec(tmp_path / "run.toml", max_missing=10))
    assert str(e.value) == (
        f"{tmp_path / 'a.csv'}, key 40: duplicated trial key at station A (column 'pulse'); a "
        "trial recorded twice cannot be joined (remove the duplicate, or find why it was "
        "written twice)")


def test_out_of_order_key(tmp_path):
    arr, keys = _run(100)
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, swap=(7, 8))
    with pytest.raises(LogFormatError) as e:
        read_trials(_spec(tmp_path / "run.toml", max_missing=10))
    assert str(e.value) == (
        f"{tmp_path / 'b.csv'}, key {int(keys[7])}: out-of-order trial key at station B: "
        f"{int(keys[7])} follows {int(keys[8])}; the streaming join needs each station's rows "
        "sorted by increasing key (sort the file, e.g. sort -t, -k1,1n)")


def test_out_of_order_across_chunks_and_files(tmp_path):
    """Order is checked across chunk boundaries and from one file of a station to the next."""
    arr, keys = _run(100)
    _write_station(tmp_path / "a1.csv", keys[50:], arr.x[50:], arr.a[50:])
    _write_station(tmp_path / "a2.csv", keys[:50], arr.x[:50], arr.a[:50])
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b)
    spec = _spec(tmp_path / "run.toml", a='a1.csv", "a2.csv', max_missing=100)
    with pytest.raises(LogFormatError, match=rf"a2\.csv, key {int(keys[0])}: out-of-order"):
        summarize_log(spec, chunk_trials=8)


def test_ragged_row(tmp_path):
    _two_station(tmp_path)
    p = tmp_path / "b.csv"
    lines = p.read_text().splitlines()
    lines[10] = lines[10] + ",7"
    p.write_text("\n".join(lines) + "\n")
    with pytest.raises(LogFormatError) as e:
        read_trials(_spec(tmp_path / "run.toml"))
    assert str(e.value) == f"{p}, line 11: expected 4 fields as in the header, found 5"


def test_value_not_in_map(tmp_path):
    _two_station(tmp_path)
    p = tmp_path / "a.csv"
    lines = p.read_text().splitlines()
    lines[5] = lines[5].rsplit(",", 1)[0] + ",0"
    p.write_text("\n".join(lines) + "\n")
    with pytest.raises(LogFormatError) as e:
        read_trials(_spec(tmp_path / "run.toml"))
    assert str(e.value) == (f"{p}, line 6: column 'result' (outcome) has value '0', which the "
                            "value map does not list (it accepts '+1', '-1')")


def test_bad_key_value(tmp_path):
    _two_station(tmp_path)
    p = tmp_path / "a.csv"
    lines = p.read_text().splitlines()
    lines[4] = "-5," + lines[4].split(",", 1)[1]
    p.write_text("\n".join(lines) + "\n")
    with pytest.raises(LogFormatError, match=r"a\.csv, line 5: key column 'pulse' has value "
                       "'-5'; expected a non-negative integer"):
        read_trials(_spec(tmp_path / "run.toml"))


# ------------------------------------------------------------------ spec validation


@pytest.mark.parametrize("text,key,problem", [
    ('format = "other/1"', "format", "expected 'dicert-logspec/1', got 'other/1'"),
    ('format = "dicert-logspec/1"\ncolour = 1', "colour", "unknown key"),
    ('format = "dicert-logspec/1"', "stations", "give exactly one of [table]"),
    ('format = "dicert-logspec/1"\n[stations.A]\nfiles="a.csv"\nkey="k"\nsetting="s"\n'
     'outcome="o"', "stations", "expected exactly the tables [stations.A] and [stations.B]"),
    ('format = "dicert-logspec/1"\n[join]\nmax_missing = -1\n[stations.A]\nfiles="a.csv"\n'
     'key="k"\nsetting="s"\noutcome="o"\n[stations.B]\nfiles="b.csv"\nkey="k"\nsetting="s"\n'
     'outcome="o"', "join.max_missing", "expected a non-negative integer, got -1"),
    ('format = "dicert-logspec/1"\n[table]\nfiles="r.csv"\ndelimiter="colon"',
     "table.delimiter", "expected"),
    ('format = "dicert-logspec/1"\n[table]\nfiles="r.csv"\nvalues.a = {"+1" = 2}',
     "table.values.a.+1", "maps to 2; every value must map to 0 or 1"),
    ('format = "dicert-logspec/1"\n[table]\nfiles="r.xyz"', "table.format",
     "cannot tell the format"),
    ('format = "dicert-logspec/1"\n[table]\nfiles="r.csv"\nformat="excel"', "table.format",
     "expected one of csv, parquet, hdf5, got 'excel'"),
    ('format = "dicert-logspec/1"\n[stations.A]\nfiles="a.csv"\nsetting="s"\noutcome="o"\n'
     '[stations.B]\nfiles="b.csv"\nkey="k"\nsetting="s"\noutcome="o"', "stations.A.key",
     "missing: name the column that holds the trial index"),
    ('format = "dicert-logspec/1"\n[table]\nfiles="r.csv"\nvalues.key = {"1" = 0}',
     "table.values.key", "no such value role"),
])
def test_spec_validation_names_the_key(tmp_path, text, key, problem):
    p = tmp_path / "s.toml"
    p.write_text(text + "\n")
    with pytest.raises(LogFormatError) as e:
        load_spec(p)
    assert str(e.value).startswith(f"{p}, key {key!r}: ")
    assert problem in str(e.value)


def test_spec_is_recognised_by_format_key_not_extension(tmp_path):
    arr, _ = _two_station(tmp_path)
    spec = _spec(tmp_path / "run.toml")
    alt = tmp_path / "run.spec"
    shutil.copy(spec, alt)
    np.testing.assert_array_equal(read_trials(alt).codes(), arr.codes())


# ------------------------------------------------------------------ hints without a spec


def test_plain_csv_minus_one_suggests_value_map(tmp_path):
    p = tmp_path / "l.csv"
    p.write_text("x,y,a,b\n0,1,0,-1\n")
    with pytest.raises(LogFormatError) as e:
        read_trials(p)
    assert str(e.value) == (f"{p}, line 2: column 'b' has value '-1'; expected 0 or 1; for "
                            "+1/-1 outcomes describe the log in a log spec with a value map, "
                            'e.g. {"+1" = 0, "-1" = 1} (README, section Log specs)')


def test_plain_csv_setting_two_suggests_value_map(tmp_path):
    p = tmp_path / "l.csv"
    p.write_text("x,y,a,b\n2,1,0,1\n")
    with pytest.raises(LogFormatError, match=r"column 'x' has value '2'; expected 0 or 1; for "
                       r"1/2 settings describe the log in a log spec with a value map"):
        read_trials(p)


@pytest.mark.parametrize("delim,word", [("\t", "tab"), (";", "semicolon")])
def test_plain_csv_header_names_the_delimiter(tmp_path, delim, word):
    p = tmp_path / "l.csv"
    p.write_text(delim.join("xyab") + "\n" + delim.join("0101") + "\n")
    with pytest.raises(LogFormatError) as e:
        read_trials(p)
    assert str(e.value) == (
        f"{p}, line 1: header has no column 'x' (required: x,y,a,b; optional t); the header "
        f"looks {word}-separated, but a plain log is comma-separated: describe the file in a "
        f'log spec with delimiter = "{word}" (README, section Log specs)')


# ------------------------------------------------------------------ Parquet and HDF5


def _write_parquet(path, keys, s, o, drop=()):
    pa = _need("pyarrow")
    pq = _need("pyarrow.parquet")
    keep = np.array([int(k) not in drop for k in keys])
    tab = pa.table({"pulse": keys[keep], "basis": (s[keep] + 1).astype(np.int8),
                    "result": np.where(o[keep] == 1, -1, 1).astype(np.int8)})
    pq.write_table(tab, path, row_group_size=64)


def _write_hdf5(path, keys, s, o, drop=()):
    h5py = _need("h5py")
    keep = np.array([int(k) not in drop for k in keys])
    with h5py.File(path, "w") as f:
        g = f.create_group("run")
        g.create_dataset("pulse", data=keys[keep], chunks=(50,))
        g.create_dataset("basis", data=(s[keep] + 1).astype(np.int8))
        g.create_dataset("result", data=np.array(SIGN)[o[keep]].astype("S2"))


def _hdf5_spec(path, max_missing=2):
    lines = ['format = "dicert-logspec/1"', "[join]", f"max_missing = {max_missing}"]
    for n, f in (("A", "a.h5"), ("B", "b.h5")):
        lines += [f"[stations.{n}]", f'files = "{f}"', 'group = "/run"', 'key = "pulse"',
                  'setting = "basis"', 'outcome = "result"', f"[stations.{n}.values]",
                  'setting = { "1" = 0, "2" = 1 }', 'outcome = { "+1" = 0, "-1" = 1 }']
    path.write_text("\n".join(lines) + "\n")
    return path


def test_csv_parquet_hdf5_give_identical_records(tmp_path):
    """The same run as CSV, Parquet and HDF5: identical records apart from file digests."""
    _need("pyarrow")
    _need("h5py")
    from dicert.certify import certify

    arr = sim_trials(20000, seed=11)
    keys = np.arange(len(arr), dtype=np.int64) * 2 + 1
    drop = (101, 4001)
    dirs = {k: tmp_path / k for k in ("csv", "parquet", "hdf5")}
    for d in dirs.values():
        d.mkdir()
    _write_station(dirs["csv"] / "a.csv", keys, arr.x, arr.a)
    _write_station(dirs["csv"] / "b.csv", keys, arr.y, arr.b, drop=drop)
    _spec(dirs["csv"] / "run.toml", max_missing=2)
    _write_parquet(dirs["parquet"] / "a.parquet", keys, arr.x, arr.a)
    _write_parquet(dirs["parquet"] / "b.parquet", keys, arr.y, arr.b, drop=drop)
    _spec(dirs["parquet"] / "run.toml", a="a.parquet", b="b.parquet", max_missing=2)
    _write_hdf5(dirs["hdf5"] / "a.h5", keys, arr.x, arr.a)
    _write_hdf5(dirs["hdf5"] / "b.h5", keys, arr.y, arr.b, drop=drop)
    _hdf5_spec(dirs["hdf5"] / "run.toml")
    seed = bytes(np.random.default_rng(5).integers(0, 256, 8192, dtype=np.uint8))
    proto = uniform_protocol()
    bodies = {}
    for k, d in dirs.items():
        res = certify(d / "run.toml", proto, seed, d / "out", clock=lambda: "2026-01-01T00:00:00Z")
        rec = json.loads((d / "out" / "record.json").read_text())
        bodies[k] = rec
    n, counts = _oracle(keys, arr, drop_b=drop)
    for k, rec in bodies.items():
        assert rec["log"]["trials"] == n
        np.testing.assert_array_equal(np.array(rec["counts"]["values"]), counts)
        assert rec["log"]["spec"]["join"]["missing_at_b"] == 2

    def strip(rec):
        rec = json.loads(json.dumps(rec))
        for k in ("sha256", "files", "size_bytes", "bytes_read"):
            rec["log"].pop(k)
        for k in ("content", "sha256"):
            rec["log"]["spec"].pop(k)
        for k in [k for k in rec if k not in ("log", "counts", "estimate", "entropy",
                                               "harvest", "eps", "extractor", "status",
                                               "design", "certified_min_entropy_bits")]:
            rec.pop(k)
        return rec

    assert strip(bodies["csv"]) == strip(bodies["parquet"]) == strip(bodies["hdf5"])
    assert bodies["csv"]["status"] == "certified"


def test_plain_parquet_log_by_extension(tmp_path):
    pa = _need("pyarrow")
    pq = _need("pyarrow.parquet")
    arr = sim_trials(300, seed=2)
    pq.write_table(pa.table({k: getattr(arr, k) for k in "xyab"}), tmp_path / "l.parquet",
                   row_group_size=50)
    s = summarize_log(tmp_path / "l.parquet", chunk_trials=40)
    np.testing.assert_array_equal(read_trials(tmp_path / "l.parquet").codes(), arr.codes())
    assert s.log_spec is None and s.files[0].format == "parquet"


def test_hdf5_dataset_lengths_must_agree(tmp_path):
    h5py = _need("h5py")
    with h5py.File(tmp_path / "l.h5", "w") as f:
        f["x"] = np.zeros(10, np.int8)
        f["y"] = np.zeros(10, np.int8)
        f["a"] = np.zeros(9, np.int8)
        f["b"] = np.zeros(10, np.int8)
    with pytest.raises(LogFormatError) as e:
        read_trials(tmp_path / "l.h5")
    assert str(e.value) == (f"{tmp_path / 'l.h5'}, dataset 'a': has 9 entries, dataset 'x' "
                            "has 10")


@pytest.mark.parametrize("ext,what", [("parquet", "Parquet"), ("h5", "HDF5")])
def test_corrupt_files_one_line(tmp_path, ext, what):
    _need("pyarrow" if ext == "parquet" else "h5py")
    p = tmp_path / f"l.{ext}"
    p.write_bytes(b"PAR1 this is not really a file" * 10)
    with pytest.raises(LogFormatError) as e:
        read_trials(p)
    assert str(e.value).startswith(f"{p}: not a valid {what} file (")
    assert "\n" not in str(e.value)


def test_missing_extra_names_it(tmp_path, monkeypatch):
    import builtins

    real = builtins.__import__

    def fake(name, *a, **kw):
        if name.startswith("pyarrow"):
            raise ImportError(name)
        return real(name, *a, **kw)

    monkeypatch.setattr(builtins, "__import__", fake)
    import importlib

    monkeypatch.setattr(importlib, "import_module",
                        lambda n, *a: fake(n) if n.startswith("pyarrow") else real(n))
    p = tmp_path / "l.parquet"
    p.write_bytes(b"PAR1")
    with pytest.raises(ParameterError) as e:
        read_trials(p)
    assert str(e.value) == ("reading Parquet files needs the optional extra: pip install "
                            "'dicert[formats]'")


# ------------------------------------------------------------------ audit and verify


@pytest.fixture()
def example(tmp_path):
    src = ROOT / "examples" / "two-station"
    d = tmp_path / "ex"
    d.mkdir()
    for f in ("station-a.csv", "station-b.csv", "run.logspec.toml"):
        shutil.copy(src / f, d / f)
    return d


def _cli(*args):
    from typer.testing import CliRunner

    from dicert.cli.app import app

    return CliRunner().invoke(app, list(map(str, args)))


def test_example_certify_and_verify_rerun_join(example, tmp_path):
    seed = tmp_path / "seed.bin"
    seed.write_bytes(bytes(np.random.default_rng(9).integers(0, 256, 4096, dtype=np.uint8)))
    out = tmp_path / "out"
    r = _cli("certify", "--log-spec", example / "run.logspec.toml", "--protocol",
             ROOT / "protocols" / "chsh-uniform.toml", "--seed", seed, "--out", out, "--json")
    assert r.exit_code in (0, 3), r.output
    rec = json.loads((out / "record.json").read_text())
    spec = rec["log"]["spec"]
    text = (example / "run.logspec.toml").read_text()
    import hashlib

    assert spec["content"] == text
    assert spec["sha256"] == hashlib.sha256(text.encode()).hexdigest()
    charge = spec["join"].pop("charge")
    assert spec["join"] == {"matched": 3996, "missing_at_a": 0, "missing_at_b": 3,
                            "duplicated_keys": 0, "out_of_order_keys": 0, "max_missing": 4,
                            "first_key": 100001, "last_key": 104000, "keys": "consecutive",
                            "key_range": [100001, 104000], "missing_at_both": 1}
    # Dropped trials are charged, not assumed (tests/test_logspec_charge.py and
    # tests/test_logspec_gaps.py check the values).
    assert (charge["dropped_trials"], charge["lost_test_rounds_charged"],
            charge["raw_bits_subtracted"], charge["missing_at_both"]) == (4, 4, 8, 1)
    assert any("Trials dropped by the station join (4," in a and "checked / charged" in a
               for a in rec["assumptions"])
    assert not any("NOT charged" in a for a in rec["assumptions"])
    assert [f["name"] for f in rec["log"]["files"]] == ["station-a.csv", "station-b.csv"]
    for f in rec["log"]["files"]:
        data = (example / f["name"]).read_bytes()
        assert f["bytes"] == len(data) and f["sha256"] == hashlib.sha256(data).hexdigest()
    ok = _cli("verify", out / "record.json", "--log-spec", example / "run.logspec.toml",
              "--seed", seed)
    assert ok.exit_code == 4, ok.output  # unsigned: integrity checked, authenticity not
    assert "station join re-run" in ok.output
    alone = _cli("verify", out / "record.json")  # no log: the recorded spec's digest is checked
    assert alone.exit_code == 4, alone.output
    from dicert.audit.record import read_record, record_body, seal_record, write_record

    body = record_body(read_record(out / "record.json"))
    body["log"]["spec"]["content"] += "# edited\n"  # resealed: only the spec check can fail
    write_record(tmp_path / "edited.json", seal_record(body))
    edited = _cli("verify", tmp_path / "edited.json")
    assert edited.exit_code == 1 and "log.spec" in edited.output
    renamed = example / "renamed.toml"
    shutil.copy(example / "run.logspec.toml", renamed)
    ok2 = _cli("verify", out / "record.json", "--log-spec", renamed)
    assert ok2.exit_code == 4, ok2.output  # a renamed spec with the same content verifies
    # a changed tolerance in the spec: same trials, but not the spec certified
    (example / "run.logspec.toml").write_text(text.replace("max_missing = 4", "max_missing = 5"))
    bad = _cli("verify", out / "record.json", "--log-spec", example / "run.logspec.toml")
    assert bad.exit_code == 1 and "log.spec" in bad.output
    (example / "run.logspec.toml").write_text(text)
    # one outcome changed at station B: the join no longer gives the certified trials
    b = example / "station-b.csv"
    lines = b.read_text().splitlines()
    lines[10] = lines[10][:-2] + ("-1" if lines[10].endswith("+1") else "+1")
    b.write_text("\n".join(lines) + "\n")
    bad = _cli("verify", out / "record.json", "--log-spec", example / "run.logspec.toml")
    assert bad.exit_code == 1


def test_record_spec_digest_checked_without_log(example, tmp_path):
    from dicert.logspec import spec_entry_problem

    entry = {"format": "dicert-logspec/1", "content": "a", "sha256": "0" * 64}
    assert spec_entry_problem(entry) == ("the recorded SHA-256 is not that of the recorded "
                                         "spec content")


def test_convert_writes_joined_binary(example, tmp_path):
    out = tmp_path / "joined.btl"
    r = _cli("convert", "--log-spec", example / "run.logspec.toml", out, "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["trials"] == 3996
    a = read_trials(out)
    b = read_trials(example / "run.logspec.toml")
    np.testing.assert_array_equal(a.codes(), b.codes())


def test_cli_log_spec_and_log_exclusive(example):
    r = _cli("inspect", example / "station-a.csv", "--log-spec", example / "run.logspec.toml")
    assert r.exit_code == 2
    assert "give the log either as LOG or with --log-spec, not both" in r.output
    r = _cli("inspect", "--log-spec", example / "station-a.csv")
    assert r.exit_code == 2 and "not a log spec" in r.output


def test_inspect_and_entropy_accept_log_spec(example):
    r = _cli("inspect", "--log-spec", example / "run.logspec.toml", "--json")
    assert r.exit_code == 0, r.output
    doc = json.loads(r.output)
    assert doc["trials"] == 3996 and doc["log_spec"]["join"]["missing_at_b"] == 3
    assert doc["log_spec"]["join"]["missing_at_both"] == 1
    r = _cli("entropy", "--log-spec", example / "run.logspec.toml", "--method", "analytic",
             "--json")
    assert r.exit_code == 0, r.output
    assert json.loads(r.output)["log"]["trials"] == 3996


def test_errors_are_dicert_errors(tmp_path):
    p = tmp_path / "s.toml"
    p.write_text('format = "dicert-logspec/1"\n[table]\nfiles = "nope.csv"\n')
    with pytest.raises(DicertError, match="nope.csv: no such file"):
        read_trials(p)


def test_parquet_string_values_and_bad_value_row(tmp_path):
    pa = _need("pyarrow")
    pq = _need("pyarrow.parquet")
    arr = sim_trials(200, seed=4)
    word = np.array(["none", "click"])
    cols = {"x": arr.x, "y": arr.y, "a": word[arr.a], "b": word[arr.b]}
    pq.write_table(pa.table(cols), tmp_path / "r.parquet", row_group_size=64)
    (tmp_path / "s.toml").write_text('format = "dicert-logspec/1"\n[table]\nfiles = "r.parquet"\n'
                                     '[table.values]\na = { "click" = 1, "none" = 0 }\n'
                                     'b = { "click" = 1, "none" = 0 }\n')
    np.testing.assert_array_equal(read_trials(tmp_path / "s.toml").codes(), arr.codes())
    cols["b"] = cols["b"].copy()
    cols["b"][150] = "dark"
    pq.write_table(pa.table(cols), tmp_path / "r.parquet", row_group_size=64)
    with pytest.raises(LogFormatError) as e:
        read_trials(tmp_path / "s.toml")
    assert str(e.value) == (f"{tmp_path / 'r.parquet'}, row 150: column 'b' (b) has value "
                            "'dark', which the value map does not list (it accepts 'click', "
                            "'none')")


def test_hdf5_compound_table(tmp_path):
    h5py = _need("h5py")
    arr = sim_trials(300, seed=6)
    rec = np.zeros(len(arr), dtype=[("SetA", "i1"), ("SetB", "i1"), ("OutA", "i1"),
                                    ("OutB", "i1")])
    rec["SetA"], rec["SetB"] = arr.x + 1, arr.y + 1
    rec["OutA"], rec["OutB"] = 1 - 2 * arr.a.astype(np.int8), 1 - 2 * arr.b.astype(np.int8)
    with h5py.File(tmp_path / "r.h5", "w") as f:
        f.create_dataset("runs/r1", data=rec, chunks=(64,))
    (tmp_path / "s.toml").write_text('''format = "dicert-logspec/1"
[table]
files = "r.h5"
group = "/runs/r1"
columns = { x = "SetA", y = "SetB", a = "OutA", b = "OutB" }
values.x = { 1 = 0, 2 = 1 }
values.y = { 1 = 0, 2 = 1 }
values.a = { "+1" = 0, "-1" = 1 }
values.b = { "+1" = 0, "-1" = 1 }
''')
    s = summarize_log(tmp_path / "s.toml", chunk_trials=50)
    np.testing.assert_array_equal(read_trials(tmp_path / "s.toml").codes(), arr.codes())
    assert s.files[0].format == "hdf5" and s.log_spec["layout"] == "table"


@pytest.mark.parametrize("seed", range(6))
def test_random_drops_and_chunkings_match_oracle(tmp_path, seed):
    """Random missing trials at both stations, random chunk sizes, and irregular lines (a
    comment, spaces, CR LF) that force the exact per-line parser in some blocks."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(50, 600))
    arr, keys = _run(n, seed=seed + 20)
    drop_a = set(int(k) for k in rng.choice(keys, int(rng.integers(0, 6)), replace=False))
    drop_b = set(int(k) for k in rng.choice(keys, int(rng.integers(0, 6)), replace=False))
    _write_station(tmp_path / "a.csv", keys, arr.x, arr.a, drop=drop_a)
    _write_station(tmp_path / "b.csv", keys, arr.y, arr.b, drop=drop_b)
    if seed % 2:
        p = tmp_path / "b.csv"
        lines = p.read_text().splitlines()
        lines.insert(len(lines) // 2, "# a comment in the middle")
        lines[-3] = lines[-3].replace(",", " , ")
        p.write_bytes(("\r\n".join(lines) + "\r\n").encode())
    both = drop_a & drop_b
    missing = len(drop_a ^ drop_b)
    spec = _spec(tmp_path / "run.toml", max_missing=missing)
    s = summarize_log(spec, chunk_trials=int(rng.integers(1, 80)))
    m, counts = _oracle(keys, arr, drop_a=drop_a, drop_b=drop_b)
    assert s.trials == m == n - len(drop_a | drop_b)
    np.testing.assert_array_equal(s.counts, counts)
    j = s.log_spec["join"]
    assert (j["missing_at_a"], j["missing_at_b"]) == (len(drop_a - both), len(drop_b - both))
    if missing:
        with pytest.raises(LogFormatError, match="trial missing at station"):
            summarize_log(_spec(tmp_path / "tight.toml", max_missing=missing - 1))


def test_explicit_format_reads_parquet_with_other_extension(tmp_path):
    pa = _need("pyarrow")
    pq = _need("pyarrow.parquet")
    arr = sim_trials(100, seed=8)
    pq.write_table(pa.table({k: getattr(arr, k) for k in "xyab"}), tmp_path / "l.dat")
    np.testing.assert_array_equal(read_trials(tmp_path / "l.dat", format="parquet").codes(),
                                  arr.codes())


def test_hdf5_data_outside_the_file_refused(tmp_path):
    """The digest covers the file's bytes only, so data held elsewhere are refused."""
    h5py = _need("h5py")
    arr = sim_trials(50, seed=9)
    with h5py.File(tmp_path / "other.h5", "w") as f:
        f["a"] = arr.a
    with h5py.File(tmp_path / "l.h5", "w") as f:
        for k in "xyb":
            f[k] = getattr(arr, k)
        f["a"] = h5py.ExternalLink("other.h5", "/a")
    with pytest.raises(LogFormatError) as e:
        read_trials(tmp_path / "l.h5")
    assert str(e.value) == (f"{tmp_path / 'l.h5'}, dataset 'a': is an external link to "
                            "'other.h5'; data outside this file are not covered by its digest "
                            "(copy them into the file)")
    raw = tmp_path / "raw.bin"
    raw.write_bytes(arr.a.astype(np.uint8).tobytes())
    with h5py.File(tmp_path / "m.h5", "w") as f:
        for k in "xyb":
            f[k] = getattr(arr, k)
        f.create_dataset("a", shape=(50,), dtype="u1", external=[(str(raw), 0, 50)])
    with pytest.raises(LogFormatError, match=r"m\.h5, dataset 'a': stores its data outside "
                       "this file"):
        read_trials(tmp_path / "m.h5")


@pytest.mark.parametrize("seed", range(4))
def test_match_sorted_against_set_intersection(seed):
    """The key matcher of the merge against Python's set intersection (common practice)."""
    from dicert.logspec import _match_sorted

    rng = np.random.default_rng(seed)
    for _ in range(30):
        universe = np.unique(rng.integers(0, 400, int(rng.integers(0, 300))))
        ka = universe[rng.random(universe.size) < rng.uniform(0.5, 1.0)]
        kb = universe[rng.random(universe.size) < rng.uniform(0.5, 1.0)]
        for steps in (0, 2, 16):
            ia, ib = _match_sorted(ka, kb, max_steps=steps)
            assert ka[ia].tolist() == kb[ib].tolist() == sorted(set(ka.tolist()) & set(kb.tolist()))


@pytest.mark.parametrize("dtype", [np.int8, np.int16, np.int64, np.uint8])
def test_two_value_map_on_integer_columns(dtype):
    """The two-value fast path (1/2 and +1/-1 codes) gives the table's bits and the same
    error, naming the first value outside the map."""
    from pathlib import Path as _P

    from dicert.logspec import _ValueMap

    vm = _ValueMap("setting", "basis", {"1": 0, "2": 1})
    arr = np.array([1, 2, 2, 1, 1], dtype=dtype)
    np.testing.assert_array_equal(vm.map_numbers(arr, _P("f.parquet"), 0), [0, 1, 1, 0, 0])
    bad = np.array([1, 2, 3, 1], dtype=dtype)
    with pytest.raises(LogFormatError, match=r"f\.parquet, row 12: column 'basis' \(setting\) "
                       r"has value '3'"):
        vm.map_numbers(bad, _P("f.parquet"), 10)
    if np.dtype(dtype).kind == "i":
        pm = _ValueMap("outcome", "result", {"+1": 0, "-1": 1})
        np.testing.assert_array_equal(
            pm.map_numbers(np.array([1, -1, -1], dtype=dtype), _P("f"), 0), [0, 1, 1])
    else:  # a key outside the column's type (-1 in uint8) is never matched
        pm = _ValueMap("outcome", "result", {"+1": 0, "-1": 1})
        with pytest.raises(LogFormatError, match="row 1: column 'result'"):
            pm.map_numbers(np.array([1, 255], dtype=dtype), _P("f"), 0)
