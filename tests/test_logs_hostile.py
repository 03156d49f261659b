"""Hostile and corrupt logs: every reader keeps to its documented limits and turns every
failure into one LogFormatError naming the file (exit code 2 on the command line).

Logs may come from other institutions (a beacon setting), so a file is an adversary here:
decompression bombs, endless lines, huge declared shapes, pickled arrays, random corruption,
unreadable or dangling parts of a directory log.
"""

from __future__ import annotations

import errno
import gzip
import io
import os
import resource
import subprocess
import sys
import tempfile
import zipfile
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from typer.testing import CliRunner

from dicert.cli.app import app
from dicert.errors import LogFormatError, ParameterError
from dicert.logs import (
    ReadLimits,
    TrialArrays,
    current_read_limits,
    open_log,
    read_limits,
    read_trials,
    resolve_sources,
    summarize_log,
    write_log,
)

runner = CliRunner()


def _trials(n: int = 64, with_t: bool = True, seed: int = 3) -> TrialArrays:
    rng = np.random.default_rng(seed)
    cols = {k: rng.integers(0, 2, n, dtype=np.uint8) for k in ("x", "y", "a", "b")}
    if with_t:
        cols["t"] = rng.integers(0, 2, n, dtype=np.uint8)
    return TrialArrays(**cols)


def _one_line_error(res) -> str:
    assert res.exit_code == 2, (res.exit_code, res.output)
    lines = [ln for ln in res.stderr.splitlines() if ln.strip()]
    assert len(lines) == 1, res.stderr
    assert "Traceback" not in res.output and "Traceback" not in res.stderr
    return lines[0]


def _npy_bytes(arr=None, *, header: dict | None = None, payload: bytes = b"") -> bytes:
    buf = io.BytesIO()
    if header is None:
        np.save(buf, arr, allow_pickle=True)
    else:
        np.lib.format.write_array_header_1_0(buf, header)
        buf.write(payload)
    return buf.getvalue()


def _npz(path: Path, members: dict[str, bytes]) -> Path:
    with zipfile.ZipFile(path, "w", zipfile.ZIP_DEFLATED) as z:
        for name, data in members.items():
            z.writestr(name, data)
    return path


# ------------------------------------------------------------------------------ limits


def test_limits_are_documented_defaults_and_overridable(monkeypatch):
    lim = current_read_limits()
    assert lim == ReadLimits()
    with read_limits(max_line_bytes=123) as inner:
        assert inner.max_line_bytes == 123 and current_read_limits().max_line_bytes == 123
    assert current_read_limits().max_line_bytes == ReadLimits().max_line_bytes
    monkeypatch.setenv("DICERT_READ_LIMITS", "max_line_bytes=4096, max_compression_ratio=1000")
    assert current_read_limits().max_line_bytes == 4096
    assert current_read_limits().max_compression_ratio == 1000.0
    for bad in ("max_lines=3", "max_line_bytes=inf", "max_columns=-1", "max_columns"):
        monkeypatch.setenv("DICERT_READ_LIMITS", bad)
        with pytest.raises(ParameterError):
            current_read_limits()
    with pytest.raises(ParameterError):
        ReadLimits(max_columns=0)


@pytest.mark.parametrize("name", ["long.csv", "long.csv.gz"])
def test_a_line_longer_than_the_limit_is_refused_with_its_line_number(tmp_path, name):
    p = tmp_path / name
    body = b"x,y,a,b,note\n0,0,1,1,ok\n1,0,1,0," + b"z" * 5000 + b"\n0,1,0,0,ok\n"
    p.write_bytes(gzip.compress(body, mtime=0) if name.endswith(".gz") else body)
    assert len(read_trials(p)) == 3  # within the default limit: a valid log
    with read_limits(max_line_bytes=1000), pytest.raises(LogFormatError) as info:
        read_trials(p)
    assert info.value.where == "line 3" and str(p) in str(info.value)


def test_a_line_without_newline_is_caught_while_streaming(tmp_path):
    # No newline at all after the header: the reader must stop after max_line_bytes, not
    # accumulate the whole file (the check happens per block).
    p = tmp_path / "endless.csv"
    p.write_bytes(b"x,y,a,b\n" + b"0" * 200_000)
    with read_limits(max_line_bytes=50_000), pytest.raises(LogFormatError, match="line 2"):
        read_trials(p)


def test_header_line_and_column_limits(tmp_path):
    p = tmp_path / "wide.csv"
    p.write_text("x,y,a,b," + ",".join(f"c{i}" for i in range(20_000)) + "\n0,0,0,0" + ",1" * 20_000 + "\n")
    with pytest.raises(LogFormatError, match="20004 columns") as info:
        read_trials(p)
    assert info.value.where == "line 1"
    with read_limits(max_columns=30_000, max_line_bytes=1 << 20):
        assert len(read_trials(p)) == 1  # the set-based duplicate check is linear
    q = tmp_path / "header.csv"
    q.write_bytes(b"# comment\n" + b"x" * 3000 + b"\n")
    with read_limits(max_line_bytes=1000), pytest.raises(LogFormatError, match="line 2"):
        read_trials(q)


def test_duplicate_column_is_still_refused(tmp_path):
    p = tmp_path / "dup.csv"
    p.write_text("x,y,a,b,extra,a\n0,0,0,0,1,0\n")
    with pytest.raises(LogFormatError, match="'a' appears twice"):
        read_trials(p)


def test_dev_zero_ends_with_one_line():
    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero on this system")
    with pytest.raises(LogFormatError, match="longer than") as info:
        read_trials("/dev/zero")
    assert info.value.path == "/dev/zero" and info.value.where == "line 1"


def _gzip_bomb(path: Path, expanded_mib: int, header: bytes = b"x,y,a,b\n") -> None:
    """A gzip file of many members, each 1 MiB of one repeated byte: a few KB per GiB.

    Concatenated members are one valid gzip stream (RFC 1952, section 2.2)."""
    member = gzip.compress(b"0" * (1 << 20), compresslevel=9, mtime=0)
    with open(path, "wb") as fh:
        fh.write(gzip.compress(header, mtime=0))
        for _ in range(expanded_mib):
            fh.write(member)


def test_gzip_bomb_of_one_3_gib_line_ends_quickly_with_one_line(tmp_path):
    # 3 MB on disk, 3 GiB decompressed, no newline after the header. The reader stops after
    # one block (before: 182 s and a MemoryError traceback).
    p = tmp_path / "bomb.csv.gz"
    _gzip_bomb(p, 3072)
    assert p.stat().st_size < 4_000_000
    with pytest.raises(LogFormatError, match="longer than"):
        read_trials(p)


def test_gzip_compression_ratio_limit(tmp_path):
    # Valid lines that compress far beyond any real log: refused once past the grace size.
    p = tmp_path / "ratio.csv.gz"
    body = b"x,y,a,b\n" + b"0,0,0,0\n" * 200_000
    p.write_bytes(gzip.compress(body, compresslevel=9, mtime=0))
    assert len(read_trials(p)) == 200_000
    with read_limits(ratio_grace_bytes=100_000, max_compression_ratio=50), \
            pytest.raises(LogFormatError, match="compressed size"):
        read_trials(p)


def test_cli_gzip_bomb_bounded_memory(tmp_path):
    # Peak resident memory of the child stays far below the 3 GiB the bomb expands to. Not a
    # timing test: the limit is generous. The child reads the high-water mark of its own
    # address space (VmHWM, KiB): ru_maxrss keeps the forking parent's mark across exec on
    # Linux, so it reported the size of the test process itself.
    p = tmp_path / "bomb.csv.gz"
    _gzip_bomb(p, 3072)
    code = ("import resource, sys\n"
            "from dicert.cli.app import app\n"
            "sys.argv = ['dicert', 'inspect', sys.argv[1]]\n"
            "try:\n    app()\nexcept SystemExit as exc:\n    rc = exc.code\n"
            "try:\n"
            "    with open('/proc/self/status') as fh:\n"
            "        print(next(ln.split()[1] for ln in fh if ln.startswith('VmHWM:')))\n"
            "except OSError:\n"
            "    print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss)\n"
            "sys.exit(rc)\n")
    proc = subprocess.run([sys.executable, "-c", code, str(p)], capture_output=True, text=True,
                          timeout=300)
    peak_kib = int(proc.stdout.strip().splitlines()[-1])  # this child's own peak
    assert proc.returncode == 2
    lines = proc.stderr.strip().splitlines()
    assert len(lines) == 1 and str(p) in lines[0] and "longer than" in lines[0]
    assert peak_kib < 600 * 1024


# ------------------------------------------------------------------------------ npz


def test_npz_declared_shape_is_checked_before_allocating(tmp_path):
    hdr = {"descr": "|u1", "fortran_order": False, "shape": (10**12,)}
    members = {f"{k}.npy": _npy_bytes(header=hdr, payload=b"\0" * 16) for k in "xyab"}
    p = _npz(tmp_path / "huge.npz", members)
    with pytest.raises(LogFormatError, match=r"declares shape \(1000000000000,\)") as info:
        read_trials(p)
    assert info.value.where == "array 'x'"


@pytest.mark.parametrize(("member", "match"), [
    (lambda: _npy_bytes(np.array([0, 1, None], dtype=object)), "object"),
    (lambda: b"not an npy file at all", "not a valid .npy"),
    (lambda: _npy_bytes(np.array(["0", "1"])), "dtype"),
    (lambda: _npy_bytes(np.zeros((2, 2), np.uint8)), "one-dimensional"),
    (lambda: _npy_bytes(np.array([0, 2], np.int64)), "expected 0 or 1"),
    (lambda: _npy_bytes(np.array([0.0, np.nan])), "expected 0 or 1"),
])
def test_npz_bad_members_are_one_line_errors(tmp_path, member, match):
    good = {f"{k}.npy": _npy_bytes(np.array([0, 1], np.uint8)) for k in "yab"}
    p = _npz(tmp_path / "bad.npz", {"x.npy": member(), **good})
    with pytest.raises(LogFormatError, match=match) as info:
        read_trials(p)
    assert str(p) in str(info.value)


def test_npz_size_limit(tmp_path):
    p = tmp_path / "log.npz"
    write_log(p, _trials(1000))
    assert len(read_trials(p)) == 1000
    with read_limits(max_npz_bytes=100), pytest.raises(LogFormatError, match="max_npz_bytes"):
        read_trials(p)


def test_npz_streams_in_chunks_with_the_same_result(tmp_path):
    tr = _trials(10_001)
    p = tmp_path / "log.npz"
    write_log(p, tr)
    chunks = [c.codes for c in open_log(p).iter_chunks(997)]
    assert max(c.size for c in chunks) == 997
    # Oracle: per-trial codes computed directly from the arrays (DEVELOPERS.md convention).
    np.testing.assert_array_equal(np.concatenate(chunks), tr.codes())


# ------------------------------------------------------------------------------ directories


def test_broken_symlink_in_a_directory_log_is_an_error(tmp_path):
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "part-1.btl", _trials())
    (d / "part-2.btl").symlink_to(tmp_path / "unmounted-share" / "part-2.btl")
    with pytest.raises(LogFormatError, match="broken symbolic link") as info:
        resolve_sources(d)
    assert info.value.path.endswith("part-2.btl")
    with pytest.raises(LogFormatError, match="broken symbolic link"):
        resolve_sources(str(d / "*.btl"))


def test_symlink_loop_in_a_directory_log_is_an_error(tmp_path):
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "part-1.csv", _trials())
    (d / "part-2.csv").symlink_to(d / "part-2.csv")
    with pytest.raises(LogFormatError, match="link loop"):
        summarize_log(d)
    with pytest.raises(LogFormatError, match="link loop"):
        summarize_log(str(d / "part-*.csv"))


def _deny(monkeypatch, target: Path, fn_name: str):
    """Make one os function fail with EACCES for ``target`` (tests run as root in CI, where
    chmod 000 does not stop reads, so the denial is injected)."""
    real = getattr(os, fn_name)

    def fake(path, *args, **kwargs):
        if Path(os.fsdecode(path)) == target:
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), os.fsdecode(path))
        return real(path, *args, **kwargs)

    monkeypatch.setattr(os, fn_name, fake)


def test_unreadable_directory_is_one_line(tmp_path, monkeypatch):
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "a.btl", _trials())
    _deny(monkeypatch, d, "scandir")
    _deny(monkeypatch, d, "listdir")
    with pytest.raises(LogFormatError, match="Permission denied") as info:
        resolve_sources(d)
    assert str(d) in str(info.value)


def test_unlistable_glob_base_is_reported(tmp_path, monkeypatch):
    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "a.btl", _trials())
    _deny(monkeypatch, d, "scandir")
    _deny(monkeypatch, d, "listdir")
    with pytest.raises(LogFormatError, match="Permission denied") as info:
        resolve_sources(str(d / "*.btl"))
    assert str(d) in str(info.value)


def test_unreadable_member_is_one_line(tmp_path, monkeypatch):
    import builtins

    d = tmp_path / "run"
    d.mkdir()
    write_log(d / "a.btl", _trials())
    write_log(d / "b.csv", _trials())
    real_open = builtins.open

    def fake_open(file, *args, **kwargs):
        if isinstance(file, (str, os.PathLike)) and Path(file) == d / "b.csv":
            raise PermissionError(errno.EACCES, "Permission denied", str(file))
        return real_open(file, *args, **kwargs)

    monkeypatch.setattr(builtins, "open", fake_open)
    with pytest.raises(LogFormatError, match="ermission denied") as info:
        summarize_log(d)
    assert info.value.path.endswith("b.csv")


def test_io_error_while_reading_is_one_line(tmp_path, monkeypatch):
    # An EIO in the middle of a file (failing disk, vanished network share).
    p = tmp_path / "log.csv"
    write_log(p, _trials(5000))

    class Failing(io.RawIOBase):
        def __init__(self, fh):
            self._fh, self._n = fh, 0

        def readable(self):
            return True

        def readinto(self, b):
            self._n += 1
            if self._n > 1:
                raise OSError(errno.EIO, "Input/output error")
            return self._fh.readinto(b)

        def close(self):
            self._fh.close()
            super().close()

    import dicert.logs as logs

    real = logs._open_checked
    monkeypatch.setattr(logs, "_open_checked", lambda path: io.BufferedReader(Failing(real(path)), 64))
    with pytest.raises(LogFormatError, match="Input/output error") as info:
        read_trials(p)
    assert info.value.path == str(p)


# ------------------------------------------------------------------------------ fuzzing


def _valid_bytes(fmt: str) -> tuple[bytes, np.ndarray]:
    tr = _trials(40)
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / {"csv": "v.csv", "gz": "v.csv.gz", "btl": "v.btl", "npz": "v.npz"}[fmt]
        write_log(p, tr)
        return p.read_bytes(), tr.codes()


_VALID = {fmt: _valid_bytes(fmt) for fmt in ("csv", "gz", "btl", "npz")}
_SUFFIX = {"csv": ".csv", "gz": ".csv.gz", "btl": ".btl", "npz": ".npz"}


def _read_or_format_error(fmt: str, data: bytes):
    """Read ``data`` as a log of format ``fmt``: TrialArrays, or None after a LogFormatError.
    Any other exception fails the test."""
    with tempfile.TemporaryDirectory() as d:
        p = Path(d) / f"f{_SUFFIX[fmt]}"
        p.write_bytes(data)
        try:
            return read_trials(p)
        except LogFormatError as exc:
            assert "\n" not in str(exc) and str(p) in str(exc)
            return None


_FUZZ = settings(max_examples=120, suppress_health_check=[HealthCheck.too_slow])


@pytest.mark.parametrize("fmt", ["csv", "gz", "btl", "npz"])
@_FUZZ
@given(data=st.data())
def test_fuzz_single_byte_corruption(fmt, data):
    raw, codes = _VALID[fmt]
    pos = data.draw(st.integers(0, len(raw) - 1), label="offset")
    val = data.draw(st.integers(0, 255), label="byte")
    buf = bytearray(raw)
    buf[pos] = val
    got = _read_or_format_error(fmt, bytes(buf))
    if got is not None and fmt == "gz" and pos >= 10:
        # Past the gzip header every byte is covered by the stream structure or the CRC-32
        # (RFC 1952, section 2.3.1), so a read that succeeds returns the original trials.
        np.testing.assert_array_equal(got.codes(), codes)


@pytest.mark.parametrize("fmt", ["csv", "gz", "btl", "npz"])
@_FUZZ
@given(data=st.data())
def test_fuzz_truncation(fmt, data):
    raw, codes = _VALID[fmt]
    cut = data.draw(st.integers(0, len(raw) - 1), label="length")
    got = _read_or_format_error(fmt, raw[:cut])
    if got is not None:
        # A shorter text log is a prefix of the trials; binary, gzip and npz logs know their
        # length (header count, ISIZE/CRC, zip directory), so they cannot read short.
        assert fmt == "csv"
        np.testing.assert_array_equal(got.codes(), codes[: len(got)])


@pytest.mark.parametrize("fmt", ["csv", "gz", "btl", "npz"])
@_FUZZ
@given(blob=st.binary(max_size=600))
def test_fuzz_arbitrary_bytes(fmt, blob):
    _read_or_format_error(fmt, blob)


@_FUZZ
@given(blob=st.binary(min_size=1, max_size=300))
def test_fuzz_arbitrary_bytes_with_a_valid_prefix(blob):
    # Valid magic or headers followed by garbage reach deeper parsing code.
    for fmt in ("csv", "btl", "npz"):
        raw, _ = _VALID[fmt]
        _read_or_format_error(fmt, raw[: len(raw) // 2] + blob)


def test_fuzz_npz_member_corruption():
    # Corrupt the bytes of one member inside a stored (uncompressed) archive, so that the
    # .npy header itself is hit (exhaustive over the header bytes).
    good = {f"{k}.npy": _npy_bytes(np.array([0, 1, 1, 0], np.uint8)) for k in "xyab"}
    for pos in range(0, 128):
        for val in (0x00, 0x20, 0x7B, 0xFF):
            x = bytearray(good["x.npy"])
            x[pos] = val
            buf = io.BytesIO()
            with zipfile.ZipFile(buf, "w", zipfile.ZIP_STORED) as z:
                z.writestr("x.npy", bytes(x))
                for k in "yab":
                    z.writestr(f"{k}.npy", good[f"{k}.npy"])
            _read_or_format_error("npz", buf.getvalue())


# ------------------------------------------------------------------------------ CLI


def _hostile_files(tmp_path: Path) -> dict[str, Path]:
    out = {}
    p = tmp_path / "long.csv"
    p.write_bytes(b"x,y,a,b\n" + b"0" * 2_000_000)
    out["long-line"] = p
    p = tmp_path / "bomb.csv.gz"
    _gzip_bomb(p, 64)
    out["gzip-bomb"] = p
    hdr = {"descr": "<i8", "fortran_order": False, "shape": (10**12,)}
    out["npz-shape"] = _npz(tmp_path / "huge.npz", {f"{k}.npy": _npy_bytes(header=hdr) for k in "xyab"})
    out["npz-pickle"] = _npz(tmp_path / "pickle.npz", {
        f"{k}.npy": _npy_bytes(np.array([0, None], dtype=object)) for k in "xyab"})
    raw, _ = _VALID["npz"]
    bad = bytearray(raw)
    info = zipfile.ZipFile(io.BytesIO(raw)).getinfo("x.npy")
    name_len, extra_len = np.frombuffer(raw, "<u2", 2, info.header_offset + 26)
    bad[info.header_offset + 30 + int(name_len) + int(extra_len) + 8] ^= 0xFF  # x's deflate data
    p = tmp_path / "crc.npz"
    p.write_bytes(bytes(bad))
    out["npz-corrupt"] = p
    raw, _ = _VALID["gz"]
    p = tmp_path / "trunc.csv.gz"
    p.write_bytes(raw[: len(raw) - 12])
    out["gzip-truncated"] = p
    p = tmp_path / "wide.csv"
    p.write_text("x,y,a,b," + ",".join("c" * 5000) + "\n")
    out["wide-header"] = p
    d = tmp_path / "dangling"
    d.mkdir()
    write_log(d / "a.btl", _trials())
    (d / "b.btl").symlink_to(tmp_path / "nowhere.btl")
    out["dangling-dir"] = d
    return out


@pytest.mark.parametrize("case", ["long-line", "gzip-bomb", "npz-shape", "npz-pickle",
                                  "npz-corrupt", "gzip-truncated", "wide-header", "dangling-dir"])
def test_cli_hostile_logs_exit_2_with_one_line(tmp_path, case):
    path = _hostile_files(tmp_path)[case]
    res = runner.invoke(app, ["inspect", str(path)])
    line = _one_line_error(res)
    assert line.startswith("dicert: error: ") and str(path.name) in line
    res = runner.invoke(app, ["convert", str(path), str(tmp_path / "out.btl")])
    _one_line_error(res)
    assert not (tmp_path / "out.btl").exists()
    proto = Path(__file__).resolve().parents[1] / "protocols" / "chsh-uniform.toml"
    seed = tmp_path / "seed.bin"
    seed.write_bytes(bytes(4096))
    res = runner.invoke(app, ["certify", str(path), "--protocol", str(proto), "--seed", str(seed),
                              "--out", str(tmp_path / "cert")])
    _one_line_error(res)
    assert not (tmp_path / "cert" / "record.json").exists()


def test_cli_read_limits_from_the_environment(tmp_path):
    p = tmp_path / "long.csv"
    p.write_bytes(b"x,y,a,b,note\n0,0,1,1," + b"n" * 3000 + b"\n")
    res = runner.invoke(app, ["inspect", str(p), "--json"], env={"DICERT_READ_LIMITS": "max_line_bytes=1000"})
    assert "line 2" in _one_line_error(res)
    res = runner.invoke(app, ["inspect", str(p), "--json"])
    assert res.exit_code == 0


def test_cli_inspect_dev_zero_one_line():
    if not os.path.exists("/dev/zero"):
        pytest.skip("no /dev/zero on this system")
    line = _one_line_error(runner.invoke(app, ["inspect", "/dev/zero"]))
    assert "/dev/zero, line 1" in line and "max_line_bytes" in line
