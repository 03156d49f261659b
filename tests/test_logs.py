"""Trial-log reading, validation, streaming and writing.

Oracles: numpy's ``bincount`` (reference counting) and per-trial Python loops; the formats
themselves are this project's own contract (README, "Trial-log formats").
"""

from __future__ import annotations

import gzip
import struct

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from dicert._kernels import count_blocks, count_blocks_numpy
from dicert.errors import LogFormatError
from dicert.logs import (
    BINARY_MAGIC,
    BinaryLogWriter,
    TrialArrays,
    convert_log,
    open_log,
    read_trials,
    summarize_log,
    write_log,
)


def random_trials(rng, n, with_t=True):
    cols = {k: rng.integers(0, 2, n, dtype=np.uint8) for k in "xyab"}
    if with_t:
        cols["t"] = rng.integers(0, 2, n, dtype=np.uint8)
    return TrialArrays(**cols)


def per_trial_counts(tr: TrialArrays) -> np.ndarray:
    """Naive oracle: one Python loop over trials."""
    c = np.zeros((2, 2, 2, 2, 2), dtype=np.int64)
    t = tr.t if tr.t is not None else np.ones(len(tr), np.uint8)
    for i in range(len(tr)):
        c[t[i], tr.x[i], tr.y[i], tr.a[i], tr.b[i]] += 1
    return c


EXTS = ["csv", "csv.gz", "btl", "npz"]


@pytest.mark.parametrize("ext", EXTS)
@pytest.mark.parametrize("with_t", [True, False])
def test_round_trip_and_counts(tmp_path, rng, ext, with_t):
    tr = random_trials(rng, 5003, with_t)
    p = tmp_path / f"log.{ext}"
    assert write_log(p, tr) == 5003
    back = read_trials(p)
    assert back.has_test_flag == with_t
    np.testing.assert_array_equal(back.codes(), tr.codes())
    s = summarize_log(p, block_trials=1000, chunk_trials=777)
    assert s.trials == 5003
    np.testing.assert_array_equal(s.counts, per_trial_counts(tr))
    assert s.block_counts.shape == (6, 2, 2, 2, 2, 2)
    assert s.block_counts[:5].sum(axis=(1, 2, 3, 4, 5)).tolist() == [1000] * 5
    np.testing.assert_array_equal(s.block_counts.sum(axis=0), s.counts)
    if not with_t:
        assert s.counts[0].sum() == 0  # no t column: every trial is a test round


@given(
    codes=st.lists(st.integers(0, 31), min_size=1, max_size=300),
    ext=st.sampled_from(EXTS),
    chunk=st.integers(1, 64),
    block=st.integers(1, 50),
)
def test_round_trip_property(tmp_path_factory, codes, ext, chunk, block):
    tr = TrialArrays.from_codes(np.array(codes, np.uint8), True)
    p = tmp_path_factory.mktemp("rt") / f"log.{ext}"
    write_log(p, tr)
    np.testing.assert_array_equal(read_trials(p).codes(), tr.codes())
    s = summarize_log(p, block_trials=block, chunk_trials=chunk)
    # Count conservation against numpy's bincount (reference library).
    np.testing.assert_array_equal(s.counts.reshape(-1), np.bincount(codes, minlength=32))
    assert s.counts.sum() == len(codes)


@given(st.lists(st.integers(0, 31), min_size=0, max_size=2000), st.integers(1, 300))
def test_kernel_matches_bincount(codes, block):
    arr = np.array(codes, dtype=np.uint8)
    fast, or_fast = count_blocks(arr, block)
    ref, or_ref = count_blocks_numpy(arr, block)
    np.testing.assert_array_equal(fast, ref)
    assert or_fast == or_ref


def test_multi_file_directory_and_glob(tmp_path, rng):
    parts = [random_trials(rng, n) for n in (10, 2000, 333)]
    d = tmp_path / "run"
    d.mkdir()
    for i, (tr, ext) in enumerate(zip(parts, ["btl", "csv", "csv.gz"])):
        write_log(d / f"part{i:02d}.{ext}", tr)
    whole = np.concatenate([p.codes() for p in parts])
    for src in (d, str(d / "part*")):
        s = summarize_log(src, block_trials=100)
        assert s.trials == whole.size
        np.testing.assert_array_equal(s.counts.reshape(-1), np.bincount(whole, minlength=32))
        np.testing.assert_array_equal(read_trials(src).codes(), whole)
        assert len(s.files) == 3 and [f.trials for f in s.files] == [10, 2000, 333]


def test_digest_is_sha256_of_bytes(tmp_path, rng):
    import hashlib

    p = tmp_path / "log.btl"
    write_log(p, random_trials(rng, 1234))
    assert summarize_log(p).sha256 == hashlib.sha256(p.read_bytes()).hexdigest()  # FIPS 180-4 via hashlib
    g = tmp_path / "log.csv.gz"
    write_log(g, random_trials(rng, 1234))
    assert summarize_log(g).sha256 == hashlib.sha256(g.read_bytes()).hexdigest()


def test_csv_comments_blank_lines_extra_columns_crlf(tmp_path):
    p = tmp_path / "log.csv"
    p.write_bytes(
        b"# invented test log\r\n"
        b"time_ns,x,y,a,b,t\r\n"
        b"100,0,1,1,0,1\r\n"
        b"\r\n"
        b"# comment in the middle\n"
        b"200, 1 ,1,0,0,0\n"
        b"300,1,0,1,1,1"  # no final newline
    )
    tr = read_trials(p)
    assert tr.x.tolist() == [0, 1, 1]
    assert tr.y.tolist() == [1, 1, 0]
    assert tr.a.tolist() == [1, 0, 1]
    assert tr.b.tolist() == [0, 0, 1]
    assert tr.t.tolist() == [1, 0, 1]


def test_csv_with_byte_order_mark(tmp_path):
    # Spreadsheet exports often start with a UTF-8 byte-order mark (Unicode 15, section 23.8).
    p = tmp_path / "bom.csv"
    p.write_bytes(b"\xef\xbb\xbfx,y,a,b\n0,1,1,0\n")
    assert read_trials(p).codes().tolist() == [0b0110]


def test_binary_streamed_writer_and_trailer(tmp_path, rng):
    tr = random_trials(rng, 500)
    p = tmp_path / "live.btl"
    w = BinaryLogWriter(p, has_test_flag=True, streamed=True)
    w.append(tr.codes()[:200])
    w.append(tr.codes()[200:])
    w.close()
    np.testing.assert_array_equal(read_trials(p).codes(), tr.codes())
    # Without its trailer a streamed file is reported as truncated.
    data = p.read_bytes()
    (tmp_path / "cut.btl").write_bytes(data[:-9])
    with pytest.raises(LogFormatError, match="truncated"):
        read_trials(tmp_path / "cut.btl")


def test_convert_streams_between_formats(tmp_path, rng):
    tr = random_trials(rng, 3000)
    write_log(tmp_path / "a.csv", tr)
    assert convert_log(tmp_path / "a.csv", tmp_path / "b.btl", chunk_trials=512) == 3000
    assert convert_log(tmp_path / "b.btl", tmp_path / "c.npz") == 3000
    np.testing.assert_array_equal(read_trials(tmp_path / "c.npz").codes(), tr.codes())


# ---------------------------------------------------------------------------------------------
# Malformed input: one LogFormatError naming the file and the line or byte offset.
# ---------------------------------------------------------------------------------------------

CSV_CASES = [
    (b"x,y,a,b\n0,1,2,0\n", "line 2", "column 'a' has value '2'"),
    (b"x,y,a\n0,1,1\n", "line 1", "no column 'b'"),
    (b"x,y,a,b\n0,1,1,0\n0,1\n", "line 3", "expected 4 fields"),
    (b"x,y,a,b\n0,1,1,0\n1,0,one,0\n", "line 3", "column 'a' has value 'one'"),
    (b"x,y,a,b\n0,1,1,0\n1,0,NaN,0\n", "line 3", "'NaN'"),
    (b"x,y,a,b\n0,1,1,0\n1,0,,0\n", "line 3", "column 'a' has value ''"),
    (b"", "", "empty file"),
    (b"# only a comment\n", "", "empty file"),
    (b"x,y,a,b\n", "", "contains no trials"),
    (b"x,y,a,b,x\n0,0,0,0,0\n", "line 1", "appears twice"),
]


@pytest.mark.parametrize("content,where,what", CSV_CASES)
def test_malformed_csv(tmp_path, content, where, what):
    p = tmp_path / "bad.csv"
    p.write_bytes(content)
    with pytest.raises(LogFormatError) as exc:
        summarize_log(p)
    msg = str(exc.value)
    assert str(p) in msg and where in msg and what in msg
    assert "\n" not in msg


def test_malformed_csv_deep_in_large_file(tmp_path, rng):
    tr = random_trials(rng, 300_000, with_t=False)
    p = tmp_path / "big.csv"
    write_log(p, tr)
    data = bytearray(p.read_bytes())
    line = 250_001  # header is line 1, so trial k is on line k + 2
    off = 8 + (line - 2) * 8
    data[off + 2] = ord("7")  # the y field of that trial
    p.write_bytes(bytes(data))
    with pytest.raises(LogFormatError, match=rf"line {line}: column 'y' has value '7'"):
        summarize_log(p)


def test_malformed_gzip(tmp_path):
    p = tmp_path / "bad.csv.gz"
    good = gzip.compress(b"x,y,a,b\n" + b"0,1,1,0\n" * 1000)
    p.write_bytes(good[: len(good) // 2])
    with pytest.raises(LogFormatError, match="bad.csv.gz"):
        summarize_log(p)


def _header(flags=1, count=3, version=1, reserved=bytes(6), magic=BINARY_MAGIC):
    return struct.pack("<8sBB6sQ", magic, version, flags, reserved, count)


BIN_CASES = [
    (_header(count=5) + bytes([1, 2, 3]), "byte offset 27", "truncated"),
    (b"NOTALOG!" + bytes(20), "byte offset 0", "wrong magic"),
    (_header(version=9) + bytes(3), "byte offset 8", "version 9"),
    (_header(flags=0x81) + bytes(3), "byte offset 9", "reserved header flag"),
    (_header(reserved=b"\x00\x01" + bytes(4)) + bytes(3), "byte offset 10", "reserved header bytes"),
    (_header() + bytes([1, 0x40, 2]), "byte offset 25", "reserved bits set"),
    (_header(flags=0) + bytes([1, 0x13, 2]), "byte offset 25", "test-round bit set"),
    (_header(count=2) + bytes([1, 2, 3]), "byte offset 26", "unexpected bytes"),
    (BINARY_MAGIC[:5], "byte offset 0", "wrong magic"),
    (_header()[:20], "byte offset 20", "truncated header"),
]


@pytest.mark.parametrize("content,where,what", BIN_CASES)
def test_malformed_binary(tmp_path, content, where, what):
    p = tmp_path / "bad.btl"
    p.write_bytes(content)
    with pytest.raises(LogFormatError) as exc:
        summarize_log(p)
    msg = str(exc.value)
    assert str(p) in msg and where in msg and what in msg


def test_reserved_bits_offset_in_later_chunk(tmp_path):
    codes = np.zeros(10_000, np.uint8)
    codes[7777] = 0x20
    p = tmp_path / "bad.btl"
    p.write_bytes(_header(count=codes.size) + codes.tobytes())
    with pytest.raises(LogFormatError, match=f"byte offset {24 + 7777}"):
        summarize_log(p, chunk_trials=1000)


def test_malformed_npz(tmp_path):
    p = tmp_path / "bad.npz"
    np.savez(p, x=np.zeros(3), y=np.zeros(3), a=np.array([0, 1, np.nan]), b=np.zeros(3))
    with pytest.raises(LogFormatError, match=r"array 'a', index 2"):
        summarize_log(p)
    np.savez(p, x=np.zeros(3), y=np.zeros(3), a=np.zeros(3))
    with pytest.raises(LogFormatError, match="array 'b' missing"):
        summarize_log(p)
    np.savez(p, x=np.zeros(3), y=np.zeros(2), a=np.zeros(3), b=np.zeros(3))
    with pytest.raises(LogFormatError, match="array 'y'"):
        summarize_log(p)
    p.write_bytes(b"PK\x03\x04garbage")
    with pytest.raises(LogFormatError, match="not a valid .npz"):
        summarize_log(p)


def test_missing_file_and_empty_glob(tmp_path):
    with pytest.raises(LogFormatError, match="no such file"):
        open_log(tmp_path / "nope.csv")
    with pytest.raises(LogFormatError, match="no file matches"):
        open_log(str(tmp_path / "nope*.csv"))


def test_writer_is_atomic_on_failure(tmp_path, rng):
    good = random_trials(rng, 10)

    def chunks():
        yield good
        raise RuntimeError("acquisition failed")

    for ext in ("btl", "csv"):
        p = tmp_path / f"out.{ext}"
        with pytest.raises(RuntimeError):
            write_log(p, chunks())
        assert not p.exists()
        assert list(tmp_path.iterdir()) == []


def test_compiled_kernel_is_in_use():
    """The package builds its C counting kernel; a silent fallback would cost 10x in speed."""
    import os

    from dicert._kernels import kernel_name

    if os.environ.get("DICERT_PURE_PYTHON"):
        pytest.skip("pure-Python mode requested")
    assert kernel_name() == "C"


@given(data=st.binary(max_size=400), ext=st.sampled_from(["csv", "btl", "npz", "csv.gz"]))
def test_arbitrary_bytes_give_a_log_error_or_a_log(tmp_path_factory, data, ext):
    """Fuzz: any file content either reads or raises LogFormatError (never another exception)."""
    p = tmp_path_factory.mktemp("fz") / f"f.{ext}"
    p.write_bytes(data)
    try:
        s = summarize_log(p)
    except LogFormatError as exc:
        assert str(p) in str(exc) and "\n" not in str(exc)
    else:
        assert s.trials > 0


@given(
    codes=st.lists(st.integers(0, 31), min_size=1, max_size=50),
    pos=st.integers(0, 10_000),
    byte=st.integers(0, 255),
)
def test_corrupted_binary_log_is_read_or_rejected(tmp_path_factory, codes, pos, byte):
    """Fuzz: one corrupted byte in a valid binary log is either harmless or a LogFormatError."""
    p = tmp_path_factory.mktemp("fb") / "f.btl"
    write_log(p, TrialArrays.from_codes(np.array(codes, np.uint8), True))
    data = bytearray(p.read_bytes())
    data[pos % len(data)] = byte
    p.write_bytes(bytes(data))
    try:
        s = summarize_log(p)
    except LogFormatError as exc:
        assert "byte offset" in str(exc)
    else:
        assert s.trials == len(codes)


@given(text=st.text(alphabet="01,\n\r #xyabt2", max_size=200))
def test_csv_like_text_gives_a_log_error_or_a_log(tmp_path_factory, text):
    """Fuzz near the CSV grammar: read, or one LogFormatError naming the file."""
    p = tmp_path_factory.mktemp("fc") / "f.csv"
    p.write_bytes(text.encode())
    try:
        s = summarize_log(p)
    except LogFormatError as exc:
        assert str(p) in str(exc)
    else:
        assert s.counts.sum() == s.trials > 0
