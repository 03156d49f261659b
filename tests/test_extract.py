"""Tests of dicert.extract: Toeplitz hashing against a dense oracle, its algebra, LHL sizing."""

from __future__ import annotations

import hashlib
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.stats
from hypothesis import given
from hypothesis import strategies as st

from dicert.errors import ParameterError, SeedError
from dicert.extract import (
    extract_toeplitz,
    lhl_output_length,
    lhl_sizing,
    seed_bits_required,
    seed_bytes_required,
)


def bits_of(data: bytes, count: int) -> np.ndarray:
    return np.unpackbits(np.frombuffer(data, dtype=np.uint8))[:count].astype(np.int64)


def oracle(x: bytes, seed: bytes, n: int, m: int) -> bytes:
    """Dense GF(2) product with T[i][j] = s[i - j + n - 1], built with scipy.linalg.toeplitz.

    scipy.linalg.toeplitz(c, r) has first column c and first row r (SciPy reference docs); with
    c = s[n-1 .. n+m-2] and r = s[n-1], s[n-2], ..., s[0] this is the documented convention.
    """
    xv = bits_of(x, n)
    s = bits_of(seed, n + m - 1)
    T = scipy.linalg.toeplitz(s[n - 1: n + m - 1], s[n - 1:: -1])
    assert T.shape == (m, n)
    return np.packbits((T @ xv) & 1).tobytes()


def random_case(rng, n, m, extra_seed_bytes=0):
    x = rng.integers(0, 256, -(-n // 8), dtype=np.uint8).tobytes()
    s = rng.integers(0, 256, -(-(n + m - 1) // 8) + extra_seed_bytes, dtype=np.uint8).tobytes()
    return x, s


# --------------------------------------------------------------------------- oracle


@pytest.mark.parametrize(
    ("n", "m", "block_bits", "extra"),
    [
        (1, 1, None, 0),  # n = 1, m = 1
        (8, 1, None, 0),  # m = 1
        (1, 37, None, 0),  # n = 1, m > n
        (13, 40, None, 2),  # n not a multiple of 8, m > n, seed longer than needed
        (100, 1, None, 5),
        (999, 333, None, 0),
        (999, 333, 16, 1),  # tiled path, several blocks each way
        (1000, 333, 7, 0),  # tile width not a multiple of 8
        (997, 2001, 64, 3),  # tiled, m > n
        (4096, 4096, 1000, 0),  # ragged last blocks
    ],
)
def test_matches_dense_toeplitz_oracle(n, m, block_bits, extra, rng):
    # Naive oracle: common practice (dense matrix product over GF(2)).
    x, s = random_case(rng, n, m, extra)
    res = extract_toeplitz(x, s, m, n_bits=n, block_bits=block_bits)
    assert res.output == oracle(x, s, n, m)
    assert len(res.output) == math.ceil(m / 8)
    assert res.m_bits == m and res.n_bits == n
    assert res.seed_bits == n + m - 1 and res.seed_bits_used == res.seed_bits
    assert res.output_sha256 == hashlib.sha256(res.output).hexdigest()
    assert res.input_sha256 == hashlib.sha256(x[: math.ceil(n / 8)]).hexdigest()
    assert res.seed_sha256 == hashlib.sha256(s).hexdigest()
    # Zero padding of the last output byte.
    if m % 8:
        assert res.output[-1] & ((1 << (8 - m % 8)) - 1) == 0


def test_methods_note_vector_b1():
    # Regression value computed from the formulas in the methods note (section B1, a self-made
    # vector, not published): n=8, m=4, s = 10110011101, x = 11010010 gives z = 0110.
    s = np.array([int(c) for c in "10110011101"], dtype=np.uint8)
    x = np.array([int(c) for c in "11010010"], dtype=np.uint8)
    res = extract_toeplitz(np.packbits(x).tobytes(), np.packbits(s).tobytes(), 4)
    assert bits_of(res.output, 4).tolist() == [0, 1, 1, 0]
    assert res.output == bytes([0b01100000])


def test_known_answers_pinned_by_sha256():
    # Regression values (fixed-seed runs; each also checked against the dense oracle above).
    rng = np.random.default_rng(20240401)
    x = rng.integers(0, 256, 512, dtype=np.uint8).tobytes()
    s = rng.integers(0, 256, 640, dtype=np.uint8).tobytes()
    res = extract_toeplitz(x, s, 1000)
    assert res.output == oracle(x, s, 4096, 1000)
    assert res.output_sha256 == "355621787c0664178d9f51f8847276ac03f697abde491001d50028b1f17967ea"
    rng = np.random.default_rng(7)
    x = rng.integers(0, 256, 8193, dtype=np.uint8).tobytes()
    s = rng.integers(0, 256, 9000, dtype=np.uint8).tobytes()
    for bb in (None, 1024):
        res = extract_toeplitz(x, s, 777, n_bits=65539, block_bits=bb)
        assert res.output_sha256 == (
            "c23dc0a4cd0b7bfdff3e2e43a261ebc132a15dd940f21cedb9712a3fa7000e5d")


# --------------------------------------------------------------------------- paths


def test_blockwise_equals_single_shot_and_path_input(tmp_path, rng):
    n, m = 20000, 7001
    x, s = random_case(rng, n, m)
    single = extract_toeplitz(x, s, m)
    assert single.method == "fft-cyclic" and single.blocks == 1
    (tmp_path / "raw.bin").write_bytes(x)
    (tmp_path / "seed.bin").write_bytes(s)
    for bb in (512, 3000, 4999):
        tiled = extract_toeplitz(tmp_path / "raw.bin", str(tmp_path / "seed.bin"), m, block_bits=bb)
        assert tiled.method == "fft-cyclic-tiled"
        assert tiled.output == single.output
        assert tiled.input_sha256 == single.input_sha256
        assert tiled.seed_sha256 == single.seed_sha256
    # A tiny memory budget forces several passes over the input; same bits.
    multi = extract_toeplitz(x, s, m, block_bits=1000, memory_budget=1)
    assert multi.passes == 8
    assert multi.output == single.output
    # numpy input and a single thread give the same bits.
    arr = extract_toeplitz(np.frombuffer(x, dtype=np.uint8), s, m, workers=1, block_bits=2048)
    assert arr.output == single.output


def test_two_threads_equal_one_thread(rng):
    # Large enough (FFT length >= 2**16) for the two-thread path; cross-checked with tiles.
    n, m = 80000, 70001
    x, s = random_case(rng, n, m)
    two = extract_toeplitz(x, s, m, workers=2)
    one = extract_toeplitz(x, s, m, workers=1)
    tiled = extract_toeplitz(x, s, m, workers=2, block_bits=32768)  # 3 x 3 tiles, F = 2**16
    tiled1 = extract_toeplitz(x, s, m, workers=1, block_bits=32768)
    assert two.fft_length >= 2**16 and tiled.fft_length == 2**16 and tiled.blocks == 9
    assert two.output == one.output == tiled.output == tiled1.output


def test_exact_fallback_is_exercised_and_agrees(rng):
    n, m = 3001, 1203
    x, s = random_case(rng, n, m)
    normal = extract_toeplitz(x, s, m, n_bits=n, block_bits=500)
    assert normal.fallback_blocks == 0
    assert normal.max_rounding_error <= 0.25
    forced = extract_toeplitz(x, s, m, n_bits=n, block_bits=500, rounding_threshold=-1.0)
    assert forced.fallback_blocks == math.ceil(m / 500)
    assert "exact-integer fallback" in forced.method
    assert forced.output == normal.output == oracle(x, s, n, m)


def test_progress_reports_all_tiles(rng):
    x, s = random_case(rng, 800, 300)
    calls = []
    res = extract_toeplitz(x, s, 300, block_bits=100, progress=lambda d, t: calls.append((d, t)))
    assert calls[-1] == (res.blocks, res.blocks) == (24, 24)
    assert [d for d, _ in calls] == sorted(d for d, _ in calls)


# --------------------------------------------------------------------------- algebra


@given(
    n=st.integers(1, 70),
    m=st.integers(1, 70),
    data=st.data(),
)
def test_linearity_over_gf2(n, m, data):
    # Toeplitz hashing is GF(2)-linear in its input (common practice; Krawczyk 1994).
    nb = -(-n // 8)
    x1 = data.draw(st.binary(min_size=nb, max_size=nb))
    x2 = data.draw(st.binary(min_size=nb, max_size=nb))
    k = -(-(n + m - 1) // 8)
    s = data.draw(st.binary(min_size=k, max_size=k))
    bb = data.draw(st.sampled_from([None, 3, 16]))
    x12 = bytes(a ^ b for a, b in zip(x1, x2, strict=True))
    y1 = extract_toeplitz(x1, s, m, n_bits=n, block_bits=bb).output
    y2 = extract_toeplitz(x2, s, m, n_bits=n, block_bits=bb).output
    y12 = extract_toeplitz(x12, s, m, n_bits=n, block_bits=bb).output
    assert y12 == bytes(a ^ b for a, b in zip(y1, y2, strict=True))


@given(n=st.integers(1, 60), m=st.integers(1, 60), data=st.data())
def test_shifting_seed_by_one_bit_shifts_rows(n, m, data):
    # T[i][j] = s[i - j + n - 1]: with s'[k] = s[k + 1], T'[i] = T[i + 1] (row shift).
    k = n + m  # one bit more than the m + 1 rows below need
    sbits = np.array(data.draw(st.lists(st.integers(0, 1), min_size=k, max_size=k)), np.uint8)
    xbits = np.array(data.draw(st.lists(st.integers(0, 1), min_size=n, max_size=n)), np.uint8)
    x = np.packbits(xbits).tobytes()
    y_long = bits_of(extract_toeplitz(x, np.packbits(sbits).tobytes(), m + 1, n_bits=n).output,
                     m + 1)
    y_shift = bits_of(extract_toeplitz(x, np.packbits(sbits[1:]).tobytes(), m, n_bits=n).output, m)
    assert y_shift.tolist() == y_long[1:].tolist()


def test_universality_exhaustive_small():
    # Toeplitz matrices are a universal_2 family (Mansour, Nisan, Tiwari, STOC 1990; Krawczyk,
    # CRYPTO '94): for every nonzero d, T_s d = 0 for exactly 2^(n+m-1) / 2^m seeds.
    n, m = 5, 3
    seeds = [np.packbits(np.array([(v >> (6 - i)) & 1 for i in range(7)], np.uint8)).tobytes()
             for v in range(2 ** (n + m - 1))]
    for d in range(1, 2**n):
        x = np.packbits(np.array([(d >> (4 - i)) & 1 for i in range(5)], np.uint8)).tobytes()
        zeros = sum(extract_toeplitz(x, s, m, n_bits=n).output == b"\x00" for s in seeds)
        assert zeros == 2 ** (n + m - 1) // 2**m


def test_universality_collision_rate_spot_check():
    # Collision rate of random pairs x != x' under random seeds is 2^-m (Mansour-Nisan-Tiwari 1990;
    # Krawczyk 1994); two-sided binomial test (scipy.stats.binomtest) at level 1e-4.
    rng = np.random.default_rng(12345)
    m, trials = 4, 3000  # n = 64 input bits (8 bytes)
    coll = 0
    for _ in range(trials):
        x1, x2, s = (rng.integers(0, 256, 8, dtype=np.uint8).tobytes(),
                     rng.integers(0, 256, 8, dtype=np.uint8).tobytes(),
                     rng.integers(0, 256, 9, dtype=np.uint8).tobytes())
        if x1 == x2:
            continue
        coll += extract_toeplitz(x1, s, m).output == extract_toeplitz(x2, s, m).output
    p = scipy.stats.binomtest(coll, trials, 2.0**-m).pvalue
    assert p > 1e-4, (coll, trials)


# --------------------------------------------------------------------------- errors


def test_short_seed_says_bytes_needed():
    with pytest.raises(SeedError, match=r"3 bytes given, 4 bytes needed"):
        extract_toeplitz(b"\x01\x02", b"abc", 17)  # n + m - 1 = 32 bits = 4 bytes
    # exactly enough is fine
    assert extract_toeplitz(b"\x01\x02", b"abcd", 17).m_bits == 17


@pytest.mark.parametrize(
    ("kwargs", "pattern"),
    [
        ({"m_bits": 0}, "m_bits"),
        ({"m_bits": 2.5}, "m_bits"),
        ({"m_bits": 4, "n_bits": 17}, "n_bits=17 exceeds the 16 bits"),
        ({"m_bits": 4, "n_bits": 0}, "n_bits"),
        ({"m_bits": 4, "block_bits": 0}, "block_bits"),
        ({"m_bits": 4, "rounding_threshold": 0.5}, "rounding_threshold"),
    ],
)
def test_bad_parameters(kwargs, pattern):
    m = kwargs.pop("m_bits")
    with pytest.raises(ParameterError, match=pattern):
        extract_toeplitz(b"\xff\x00", b"\x00" * 8, m, **kwargs)


def test_bad_inputs(tmp_path):
    with pytest.raises(ParameterError, match="empty"):
        extract_toeplitz(b"", b"\x00" * 8, 3)
    with pytest.raises(ParameterError, match="uint8"):
        extract_toeplitz(np.zeros(4, dtype=np.int32), b"\x00" * 8, 3)
    with pytest.raises(ParameterError, match="no such file"):
        extract_toeplitz(tmp_path / "missing.bin", b"\x00" * 8, 3)
    with pytest.raises(SeedError, match="no such file"):
        extract_toeplitz(b"\x00", tmp_path / "missing-seed.bin", 3)


# --------------------------------------------------------------------------- sizing


def test_seed_bits_required():
    # n + m - 1 seed bits (Mansour, Nisan, Tiwari 1990).
    assert seed_bits_required(8, 4) == 11
    assert seed_bits_required(1, 1) == 1
    assert seed_bytes_required(8, 4) == 2
    assert seed_bytes_required(2**24, 2**23) == (2**24 + 2**23 - 1 + 7) // 8
    with pytest.raises(ParameterError):
        seed_bits_required(0, 4)


def test_lhl_output_length_examples():
    # Methods note B3 example (computed from m = floor(H - 2 log2(1/eps_h))): H = 1000, eps = 1e-10
    # gives 933 with the conservative rule.
    assert lhl_output_length(1000.0, 1e-10) == 933
    # Exact powers of two: 1000 - 2*20 = 960 exactly (no float loss), and 40.0 - 40 = 0.
    assert lhl_output_length(1000.0, 2.0**-20) == 960
    assert lhl_output_length(40.0, 2.0**-20) == 0
    assert lhl_output_length(39.9, 2.0**-20) == 0
    assert lhl_output_length(0.0, 0.5) == 0
    assert lhl_output_length(10.5, 0.5) == 8


@given(k=st.floats(0, 1e7), e=st.floats(1e-30, 0.999))
def test_lhl_output_length_is_never_optimistic(k, e):
    # The TSSR 2011 bound (Tomamichel, Schaffner, Smith, Renner, IEEE TIT 57(8), Thm. 1 with
    # delta = 2^-m) for the hashing term is (1/2) 2^(-(k - m)/2); the rule must keep it <= eps/2.
    m = lhl_output_length(k, e)
    assert m >= 0
    if m > 0:
        assert m <= k - 2 * math.log2(1 / e) + 1e-9 * max(1.0, k)
        assert 0.5 * 2.0 ** (-(k - m) / 2) <= e / 2 * (1 + 1e-9)
    # one more bit would exceed the rule (up to float slack)
    assert m + 1 > k - 2 * math.log2(1 / e) - 1e-9 * max(1.0, k)


def test_lhl_sizing_accounting():
    z = lhl_sizing(1000.0, 1e-10, eps_smooth=1e-8)
    assert z.output_bits == 933
    assert z.total_error == pytest.approx(2e-8 + 1e-10, rel=1e-15)
    assert z.rule == "lhl-conservative"
    with pytest.raises(ParameterError):
        lhl_sizing(10.0, 1e-3, eps_smooth=1.0)
    for bad in ((float("nan"), 0.1), (-1.0, 0.1), (10.0, 0.0), (10.0, 1.0)):
        with pytest.raises(ParameterError):
            lhl_output_length(*bad)


def test_fast_length_matches_scipy():
    # Reference library: scipy.fft.next_fast_len(k, real=True) returns the smallest 5-smooth
    # integer >= k (SciPy docs); the extractor's own helper must agree.
    import scipy.fft

    from dicert.extract import _fast_length

    for k in [*range(1, 3000), 2**22 - 1, 2**22 + 1, 3 * 2**21 + 5, 10**7 + 1]:
        assert _fast_length(k) == scipy.fft.next_fast_len(k, real=True)
