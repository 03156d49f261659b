"""Scale-out on dask.distributed: identical bits and records, and clean failure.

One distributed.LocalCluster (2 worker processes, one thread each, small memory limit) serves
the whole module. References: the single-machine code path of dicert itself, and for the
bits the dense Toeplitz product with scipy.linalg.toeplitz (test_extract.oracle).
"""

from __future__ import annotations

import hashlib
import json
import os
import sys

import numpy as np
import pytest
from helpers import sim_trials, uniform_protocol
from test_extract import oracle, random_case

distributed = pytest.importorskip("distributed")

from dicert import cluster  # noqa: E402
from dicert.extract import extract_toeplitz  # noqa: E402
from dicert.logs import TrialArrays, summarize_log, write_log  # noqa: E402


@pytest.fixture(scope="module")
def kill_marker(tmp_path_factory):
    # Present = disarmed; a test removes it to make the next task kill its own worker once.
    marker = tmp_path_factory.mktemp("fault") / "killed-once"
    marker.write_bytes(b"")
    return marker


@pytest.fixture(scope="module")
def local_cluster(kill_marker):
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  dashboard_address=None, memory_limit="1GiB",
                                  env={"DICERT_TEST_KILL_ONCE": str(kill_marker)}) as lc:
        yield lc


@pytest.fixture(scope="module")
def address(local_cluster):
    return local_cluster.scheduler_address


def _split_log(tmp_path, n_files=3, trials=9000, binary=True):
    tr = sim_trials(trials, seed=11, visibility=0.98)
    cuts = np.linspace(0, trials, n_files + 1).astype(int)
    cuts[1] += 7  # file lengths that are not multiples of the block size
    d = tmp_path / "log"
    d.mkdir()
    ext = "btl" if binary else "csv"
    for i in range(n_files):
        sl = slice(int(cuts[i]), int(cuts[i + 1]))
        part = TrialArrays(x=tr.x[sl], y=tr.y[sl], a=tr.a[sl], b=tr.b[sl],
                           t=None if tr.t is None else tr.t[sl])
        write_log(d / f"part{i:02d}.{ext}", part)
    return d


def test_split_extraction_identical_bits(address, tmp_path, rng):
    n, m = 6000, 2500
    x, s = random_case(rng, n, m)
    local = extract_toeplitz(x, s, m, strategy="four-step", memory_budget=1)
    remote = extract_toeplitz(x, s, m, strategy="four-step", memory_budget=1,
                              scheduler=address, temp_dir=tmp_path)
    assert remote.blocks > 10  # really split into many tasks
    assert remote.output == local.output == oracle(x, s, n, m)
    assert remote.summary() == local.summary()
    # Paths are opened by the workers; a larger budget uses the packed sources instead.
    (tmp_path / "x.bin").write_bytes(x)
    (tmp_path / "s.bin").write_bytes(s)
    by_path = extract_toeplitz(tmp_path / "x.bin", tmp_path / "s.bin", m, strategy="four-step",
                               memory_budget=1, scheduler=address, temp_dir=tmp_path)
    packed = extract_toeplitz(x, s, m, strategy="four-step", memory_budget=1 << 20,
                              scheduler=address, temp_dir=tmp_path)
    assert by_path.output == packed.output == local.output
    assert sorted(os.listdir(tmp_path)) == ["s.bin", "x.bin"]  # work files removed


def test_multi_file_log_summary_identical(address, tmp_path):
    d = _split_log(tmp_path)
    for bt in (1000, 3000):  # file ends off and (almost) on block boundaries
        here = summarize_log(d, block_trials=bt, digest=True)
        there = cluster.summarize_log(d, scheduler=address, block_trials=bt)
        assert there.trials == here.trials
        assert np.array_equal(there.counts, here.counts)
        assert np.array_equal(there.block_counts, here.block_counts)
        assert [f.sha256 for f in there.files] == [f.sha256 for f in here.files]
        assert [f.trials for f in there.files] == [f.trials for f in here.files]
        assert np.array_equal(there.pair_counts, here.pair_counts)  # pairs across files too
        assert there.sha256 == here.sha256
    # The multi-file digest: SHA-256 of the RFC 8785 canonical JSON of the per-file list
    # (RFC 8785 section 3.2: sorted keys, no whitespace; ASCII strings and integers here).
    items = [{"bytes": p.stat().st_size, "name": p.name,
              "sha256": hashlib.sha256(p.read_bytes()).hexdigest()} for p in sorted(d.iterdir())]
    text = json.dumps(items, sort_keys=True, separators=(",", ":")).encode()
    assert there.sha256 == hashlib.sha256(text).hexdigest()
    one = cluster.summarize_log(sorted(d.iterdir())[0], scheduler=address)
    assert one.sha256 == items[0]["sha256"]


def test_multi_file_csv_log(address, tmp_path):
    d = _split_log(tmp_path, n_files=2, trials=3000, binary=False)
    here = summarize_log(d, block_trials=512, digest=True)
    there = cluster.summarize_log(d, scheduler=address, block_trials=512)
    assert np.array_equal(there.block_counts, here.block_counts)


def test_certify_record_identical_on_the_cluster(address, tmp_path, monkeypatch):
    import dicert.extract as ex
    from dicert.certify import certify

    monkeypatch.setattr(ex, "SINGLE_LIMIT", 1000)  # small enough log, still four-step
    d = _split_log(tmp_path, trials=20000)
    proto = uniform_protocol()
    seed = np.random.default_rng(5).bytes(20000 * 4 // 8 + 64)
    clock = lambda: "2026-01-01T00:00:00Z"  # noqa: E731
    a = certify(d, proto, seed, tmp_path / "a", clock=clock)
    b = certify(d, proto, seed, tmp_path / "b", clock=clock, scheduler=address)
    assert a.status == b.status == "certified"
    assert a.record["extractor"]["method"] == "fft-four-step"
    assert (tmp_path / "a" / "random.bits").read_bytes() == (
            tmp_path / "b" / "random.bits").read_bytes()
    # Only the volatile section (timings) and the digest over the whole record may differ.
    ra, rb = dict(a.record), dict(b.record)
    for key in ("volatile", "record_sha256"):
        ra.pop(key, None)
        rb.pop(key, None)
    assert ra == rb
    assert ra["log"]["sha256"] and ra["extractor"]["output_sha256"]


def test_killed_worker_is_retried_with_identical_bits(address, kill_marker, rng, tmp_path):
    n, m = 4000, 1500
    x, s = random_case(rng, n, m)
    local = extract_toeplitz(x, s, m, strategy="four-step", memory_budget=1)
    kill_marker.unlink()  # arm: the next task kills its worker
    remote = extract_toeplitz(x, s, m, strategy="four-step", memory_budget=1,
                              scheduler=address, temp_dir=tmp_path)
    assert kill_marker.exists()  # a worker really died
    assert remote.output == local.output
    assert os.listdir(tmp_path) == []


def test_worker_death_without_retries_fails_cleanly(local_cluster, address, kill_marker,
                                                     tmp_path, monkeypatch):
    import dicert.extract as ex
    from dicert.certify import certify

    monkeypatch.setattr(ex, "SINGLE_LIMIT", 1000)  # the extraction runs on the cluster
    d = _split_log(tmp_path, trials=20000)
    seed = np.random.default_rng(5).bytes(20000 * 4 // 8 + 64)
    probe = certify(d, uniform_protocol(), seed, tmp_path / "probe")
    assert probe.status == "certified"  # so the run below reaches the extraction
    out = tmp_path / "out"
    # the extraction's first task kills its worker; no retry allowed
    _certify_killed_without_retries(local_cluster, address, kill_marker, d, seed, out)


def _certify_killed_without_retries(local_cluster, address, kill_marker, log, seed, out):
    """certify on the cluster with retries off while the next task kills its worker: a clean
    error, and nothing half-written (no record, no bits, no work or spill files)."""
    from dicert.certify import certify

    sched = local_cluster.scheduler
    old = sched.allowed_failures
    sched.allowed_failures = 0
    kill_marker.unlink()
    try:
        with pytest.raises(cluster.ClusterError, match="dask task"):
            certify(log, uniform_protocol(), seed, out, scheduler=address)
    finally:
        sched.allowed_failures = old
    assert kill_marker.exists()
    assert not out.exists() or os.listdir(out) == []


def _no_volatile(record):
    r = dict(record)
    for key in ("volatile", "record_sha256"):
        r.pop(key, None)
    return r


def test_certify_and_verify_scan_the_files_on_the_workers(address, tmp_path, monkeypatch):
    # Each file of a multi-file log is counted, hashed and harvested by a task; the record
    # and bits equal the single-process run (the reference is dicert's own local path, whose
    # numbers test_certify checks against the published formulas). File lengths give raw-bit
    # counts that are not multiples of 8, so the files' bits are joined at bit level.
    from dicert.certify import certify
    from dicert.verify import verify

    calls = []
    real = cluster.scan_files
    monkeypatch.setattr(cluster, "scan_files", lambda *a, **k: calls.append(1) or real(*a, **k))
    d = _split_log(tmp_path, n_files=4, trials=24001)
    proto = uniform_protocol()
    seed = tmp_path / "seed.bin"
    seed.write_bytes(np.random.default_rng(5).bytes(24001 * 4 // 8 + 64))
    clock = lambda: "2026-01-01T00:00:00Z"  # noqa: E731
    a = certify(d, proto, seed, tmp_path / "a", clock=clock)
    assert not calls
    b = certify(d, proto, seed, tmp_path / "b", clock=clock, scheduler=address)
    assert calls == [1]
    assert a.status == b.status == "certified"
    assert (tmp_path / "a" / "random.bits").read_bytes() == (
        tmp_path / "b" / "random.bits").read_bytes()
    assert _no_volatile(a.record) == _no_volatile(b.record)
    rep = verify(tmp_path / "b" / "record.json", log=d, seed=seed, scheduler=address)
    assert calls == [1, 1]
    assert rep.scope == "full" and "extraction re-run from log and seed" in rep.checked
    # Nothing of the cluster scan is left next to the outputs.
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".lock")) == \
        ["a", "b", "log", "seed.bin"]


def test_certify_on_the_cluster_text_log(address, tmp_path):
    # The same for a multi-file CSV log (each task reads its file with the text reader).
    from dicert.certify import certify

    d = _split_log(tmp_path, n_files=2, trials=6001, binary=False)
    seed = np.random.default_rng(5).bytes(6001 * 4 // 8 + 64)
    clock = lambda: "2026-01-01T00:00:00Z"  # noqa: E731
    a = certify(d, uniform_protocol(), seed, tmp_path / "a", clock=clock)
    b = certify(d, uniform_protocol(), seed, tmp_path / "b", clock=clock, scheduler=address)
    assert _no_volatile(a.record) == _no_volatile(b.record)
    assert a.raw_bits == b.raw_bits and a.raw_bits % 8  # joined at bit level


def test_worker_killed_during_the_scan(local_cluster, address, kill_marker, tmp_path):
    # Retried by the engine: same record. Not retried: a clean failure, nothing written.
    from dicert.certify import certify

    d = _split_log(tmp_path, n_files=3, trials=12000)
    seed = np.random.default_rng(5).bytes(12000 * 4 // 8 + 64)
    clock = lambda: "2026-01-01T00:00:00Z"  # noqa: E731
    ref = certify(d, uniform_protocol(), seed, tmp_path / "ref", clock=clock)
    kill_marker.unlink()
    again = certify(d, uniform_protocol(), seed, tmp_path / "again", clock=clock,
                    scheduler=address)
    assert kill_marker.exists()  # a worker really died, and its task ran again
    assert _no_volatile(again.record) == _no_volatile(ref.record)
    out = tmp_path / "out"
    _certify_killed_without_retries(local_cluster, address, kill_marker, d, seed, out)
    assert sorted(p.name for p in tmp_path.iterdir() if not p.name.endswith(".lock")) == \
        ["again", "log", "ref"]


def test_missing_extra_names_it(monkeypatch):
    from dicert.errors import DicertError

    monkeypatch.setitem(sys.modules, "distributed", None)
    for call in (lambda: cluster.summarize_log(".", scheduler="tcp://127.0.0.1:1"),
                 lambda: extract_toeplitz(b"\x01" * 8, b"\x01" * 9, 8, strategy="four-step",
                                          scheduler="tcp://127.0.0.1:1")):
        with pytest.raises(DicertError, match=r"^running on a dask cluster needs the optional "
                                              r"extra: pip install 'dicert\[cluster\]'$"):
            call()


def test_cli_scheduler_option_same_output(address, tmp_path, monkeypatch, rng):
    from typer.testing import CliRunner

    import dicert.extract as ex
    from dicert.cli.app import app

    runner = CliRunner()
    d = _split_log(tmp_path, trials=5000)
    here = runner.invoke(app, ["inspect", str(d), "--block-trials", "999", "--json"])
    there = runner.invoke(app, ["inspect", str(d), "--block-trials", "999", "--json",
                                "--scheduler", address])
    assert here.exit_code == there.exit_code == 0, there.output
    assert json.loads(here.stdout) == json.loads(there.stdout)
    # extract with the address from the environment variable
    monkeypatch.setattr(ex, "SINGLE_LIMIT", 1000)
    x, s = random_case(rng, 5000, 2000)
    (tmp_path / "x.bin").write_bytes(x)
    (tmp_path / "s.bin").write_bytes(s)
    work = tmp_path / "work"
    work.mkdir()
    outs = []
    for i, env in enumerate(({}, {"DICERT_SCHEDULER": address})):
        res = runner.invoke(app, ["extract", "--input", str(tmp_path / "x.bin"), "--seed",
                                  str(tmp_path / "s.bin"), "--bits", "2000", "--out",
                                  str(tmp_path / f"y{i}.bin"), "--work-dir", str(work),
                                  "--json"], env=env)
        assert res.exit_code == 0, res.output
        outs.append((tmp_path / f"y{i}.bin").read_bytes())
    assert outs[0] == outs[1] == oracle(x, s, 5000, 2000)
    assert os.listdir(work) == []
