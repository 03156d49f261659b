"""Disk full, read-only and unwritable outputs: every command that writes fails with one line
naming the path and the cause (exit code 2), leaves nothing half-written and does not touch
the outputs of earlier runs.

Tests run as root in CI, where a chmod 0500 folder does not stop writes; the failures are
therefore injected three ways that also work as root: a write wrapper that raises ENOSPC, a
path below a regular file (ENOTDIR), and a small tmpfs (real ENOSPC, and EROFS after a
read-only remount) where the machine lets the tests mount one.
"""

from __future__ import annotations

import errno
import os
import shutil
import subprocess
from pathlib import Path

import pytest
from typer.testing import CliRunner

from dicert.cli.app import app

runner = CliRunner()
EARLIER = b"output of an earlier run\n"


def _make_inputs(base: Path) -> dict[str, Path]:
    import numpy as np

    from dicert.logs import TrialArrays, write_log

    base.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(5)
    tr = TrialArrays(**{k: rng.integers(0, 2, 2000, dtype=np.uint8) for k in "xyab"})
    log = base / "in.btl"
    write_log(log, tr)
    raw = base / "raw.bin"
    raw.write_bytes(rng.bytes(100))
    seed = base / "seed.bin"
    seed.write_bytes(rng.bytes(4096))
    return {"log": log, "raw": raw, "seed": seed}


def _commands(inp: dict[str, Path], out: Path) -> dict[str, tuple[list[str], list[Path]]]:
    """command name -> (argv, output files it writes)."""
    return {
        "convert": (["convert", str(inp["log"]), str(out / "c.csv.gz")], [out / "c.csv.gz"]),
        "convert-npz": (["convert", str(inp["log"]), str(out / "c.npz")], [out / "c.npz"]),
        "extract": (["extract", "--input", str(inp["raw"]), "--seed", str(inp["seed"]),
                     "--bits", "64", "--out", str(out / "e.bits")], [out / "e.bits"]),
        "simulate": (["simulate", "-n", "5000", "-o", str(out / "s.btl"), "--rng-stream", "1"],
                     [out / "s.btl"]),
        "simulate-csv": (["simulate", "-n", "5000", "-o", str(out / "s.csv"), "--rng-stream", "1"],
                         [out / "s.csv"]),
        "keygen": (["keygen", "--out", str(out / "k.pem"), "--force"],
                   [out / "k.pem", out / "k.pem.pub"]),
        "inspect-plot": (["inspect", str(inp["log"]), "--plot", str(out / "p.png")],
                         [out / "p.png"]),
    }


COMMANDS = ["convert", "convert-npz", "extract", "simulate", "simulate-csv", "keygen",
            "inspect-plot"]


def _assert_one_line(res, *needles: str) -> str:
    assert res.exit_code == 2, (res.exit_code, res.output)
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, res.stderr
    assert "Traceback" not in res.output
    for n in needles:
        assert n in lines[0], (n, lines[0])
    return lines[0]


def _state(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


class _FullDisk:
    """A file object whose every write fails as on a full disk."""

    def __init__(self, fh) -> None:
        self._fh = fh

    def write(self, data) -> int:
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    def __getattr__(self, name):
        return getattr(self._fh, name)

    def __enter__(self):
        return self

    def __exit__(self, *exc) -> None:
        self._fh.close()


@pytest.mark.parametrize("name", COMMANDS)
def test_disk_full_write_wrapper(tmp_path, monkeypatch, name):
    inp = _make_inputs(tmp_path / "in")
    out = tmp_path / "out"
    out.mkdir()
    argv, files = _commands(inp, out)[name]
    for f in files:
        f.write_bytes(EARLIER)
    before = _state(out)
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda *a, **k: _FullDisk(real_fdopen(*a, **k)))
    res = runner.invoke(app, argv)
    line = _assert_one_line(res, "No space left on device", "ENOSPC")
    assert any(str(f) in line for f in files), line
    assert _state(out) == before  # earlier outputs untouched, no temporary file left


@pytest.mark.parametrize("name", COMMANDS)
def test_output_below_a_regular_file(tmp_path, name):
    # ENOTDIR does not depend on permissions, so it holds as root too.
    inp = _make_inputs(tmp_path / "in")
    blocker = tmp_path / "blocker"
    blocker.write_bytes(EARLIER)
    argv, files = _commands(inp, blocker / "sub")[name]
    res = runner.invoke(app, argv)
    _assert_one_line(res, str(files[0]), "ENOTDIR")
    assert blocker.read_bytes() == EARLIER


def test_demo_output_below_a_regular_file(tmp_path):
    blocker = tmp_path / "blocker"
    blocker.write_bytes(EARLIER)
    res = runner.invoke(app, ["demo", "--out", str(blocker / "demo")])
    _assert_one_line(res, "blocker", "ENOTDIR")


def test_demo_disk_full_leaves_its_folder_as_it_was(tmp_path, monkeypatch):
    out = tmp_path / "demo"
    out.mkdir()
    real_fdopen = os.fdopen
    monkeypatch.setattr(os, "fdopen", lambda *a, **k: _FullDisk(real_fdopen(*a, **k)))
    res = runner.invoke(app, ["demo", "--out", str(out)])
    _assert_one_line(res, str(out), "ENOSPC")
    assert out.is_dir() and not any(out.iterdir())


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into a chmod 0500 folder; "
                    "covered by the ENOSPC wrapper, ENOTDIR and tmpfs tests")
@pytest.mark.parametrize("name", COMMANDS)
def test_unwritable_folder_chmod(tmp_path, name):
    inp = _make_inputs(tmp_path / "in")
    out = tmp_path / "ro"
    out.mkdir()
    argv, files = _commands(inp, out)[name]
    for f in files:
        f.write_bytes(EARLIER)
    before = _state(out)
    out.chmod(0o500)
    try:
        res = runner.invoke(app, argv)
    finally:
        out.chmod(0o700)
    _assert_one_line(res, "Permission denied", str(files[0]))
    assert _state(out) == before


@pytest.fixture
def small_tmpfs(tmp_path):
    """A 512 KiB tmpfs (needs root and permission to mount; skipped otherwise)."""
    mnt = tmp_path / "mnt"
    mnt.mkdir()
    if shutil.which("mount") is None:
        pytest.skip("no mount command")
    proc = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=512k", "tmpfs", str(mnt)],
                          capture_output=True)
    if proc.returncode != 0:
        pytest.skip("cannot mount a tmpfs here: " + proc.stderr.decode(errors="replace").strip())
    try:
        yield mnt
    finally:
        subprocess.run(["umount", "-l", str(mnt)], capture_output=True)


def _fill(mnt: Path) -> None:
    with open(mnt / "filler", "wb", buffering=0) as fh:
        try:
            while True:
                fh.write(b"\0" * 4096)
        except OSError as exc:
            assert exc.errno == errno.ENOSPC


def test_real_disk_full_and_read_only_on_tmpfs(tmp_path, small_tmpfs):
    inp = _make_inputs(tmp_path / "in")
    out = small_tmpfs / "out"
    out.mkdir()
    cmds = _commands(inp, out)
    for name in COMMANDS:
        for f in cmds[name][1]:
            f.write_bytes(EARLIER)
    _fill(small_tmpfs)
    before = _state(out)
    for name in COMMANDS:
        argv, files = cmds[name]
        res = runner.invoke(app, argv)
        line = _assert_one_line(res, "ENOSPC")
        assert any(str(f) in line for f in files), (name, line)
        assert _state(out) == before, name
    proc = subprocess.run(["mount", "-o", "remount,ro", str(small_tmpfs)], capture_output=True)
    if proc.returncode != 0:
        pytest.skip("cannot remount the tmpfs read-only")
    for name in COMMANDS:
        argv, files = cmds[name]
        res = runner.invoke(app, argv)
        line = _assert_one_line(res, "EROFS")
        assert any(str(f) in line for f in files), (name, line)
    assert _state(out) == before


def test_endless_seed_device_is_refused(tmp_path, monkeypatch):
    # A seed given as a device that never ends is read up to a cap, then refused in one line.
    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero on this system")
    import dicert._io as dio
    from dicert.errors import SeedError

    monkeypatch.setattr(dio, "MAX_STREAM_BYTES", 1 << 16)
    with pytest.raises(SeedError, match="not a regular file"):
        dio.read_user_file("/dev/zero", "seed file (raw bytes)", SeedError)
    small = tmp_path / "seed.bin"
    small.write_bytes(b"abc")
    assert dio.read_user_file(small, "seed file", SeedError) == b"abc"
