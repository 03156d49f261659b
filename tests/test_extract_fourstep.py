"""The four-step (bounded-memory) path of dicert.extract against the dense definition.

The reference is the dense GF(2) product with scipy.linalg.toeplitz (the oracle of
test_extract.py; common practice), the tiled path, and the pinned digests of fixed-seed runs.
"""

from __future__ import annotations

import errno
import fcntl
import math
import os

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from dicert import _fourstep, _workfile
from dicert.errors import ParameterError
from dicert.extract import MEMORY_BUDGET, extract_toeplitz

from test_extract import oracle, random_case


@pytest.mark.parametrize(
    ("n", "m", "budget"),
    [
        (1, 1, 1),  # one row (N2 = 1)
        (8, 1, 1),
        (13, 40, 1),  # m > n, n not a multiple of 8
        (999, 333, 1),  # N2 = 3 (odd: every row but 0 has a distinct partner)
        (70, 4500, 1),  # N2 = 9, m >> n
        (5000, 3000, 1),  # N2 = 16 (even: row N2/2 pairs with itself)
        (5000, 3000, 1 << 29),  # whole array in memory
        (36764, 200, 1),  # N2 = 40, most rows hold no wanted output
        (12000, 2500, 500_000),  # larger blocks, work array in files
    ],
)
def test_four_step_matches_dense_oracle(n, m, budget, rng, tmp_path):
    x, s = random_case(rng, n, m, 1)
    res = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", memory_budget=budget,
                           temp_dir=tmp_path)
    assert res.method == "fft-four-step"
    assert res.output == oracle(x, s, n, m)
    assert res.fft_length >= n + m - 1 and res.max_rounding_error <= 0.25
    # The work files are anonymous: nothing is left in (or ever named in) the directory.
    assert os.listdir(tmp_path) == []


def test_four_step_reproduces_pinned_digests():
    # Same fixed-seed runs and digests as test_known_answers_pinned_by_sha256 (test_extract.py).
    rng = np.random.default_rng(20240401)
    x = rng.integers(0, 256, 512, dtype=np.uint8).tobytes()
    s = rng.integers(0, 256, 640, dtype=np.uint8).tobytes()
    for budget in (1, None):
        res = extract_toeplitz(x, s, 1000, strategy="four-step", memory_budget=budget)
        assert res.output_sha256 == (
            "355621787c0664178d9f51f8847276ac03f697abde491001d50028b1f17967ea")
    rng = np.random.default_rng(7)
    x = rng.integers(0, 256, 8193, dtype=np.uint8).tobytes()
    s = rng.integers(0, 256, 9000, dtype=np.uint8).tobytes()
    res = extract_toeplitz(x, s, 777, n_bits=65539, strategy="four-step", memory_budget=1)
    assert res.output_sha256 == "c23dc0a4cd0b7bfdff3e2e43a261ebc132a15dd940f21cedb9712a3fa7000e5d"


@settings(max_examples=25, deadline=None)
@given(n=st.integers(1, 3000), m=st.integers(1, 3000), budget=st.sampled_from([1, 1 << 20]),
       data=st.data())
def test_four_step_equals_tiled(n, m, budget, data):
    # Two independent computations of the same dense definition must agree bit for bit.
    x = data.draw(st.binary(min_size=-(-n // 8), max_size=-(-n // 8)))
    s = data.draw(st.binary(min_size=-(-(n + m - 1) // 8), max_size=-(-(n + m - 1) // 8)))
    four = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", memory_budget=budget)
    tiled = extract_toeplitz(x, s, m, n_bits=n, block_bits=97)
    assert four.output == tiled.output


def test_auto_uses_four_step_above_the_single_limit(monkeypatch, rng):
    import dicert.extract as ex

    monkeypatch.setattr(ex, "SINGLE_LIMIT", 1000)
    x, s = random_case(rng, 2000, 700)
    res = extract_toeplitz(x, s, 700)
    assert res.method == "fft-four-step"
    assert res.output == oracle(x, s, 2000, 700)


def test_guard_failure_recomputes_exactly(rng):
    # A negative threshold fails every guard: the tiled recomputation and its exact-integer
    # fallback must still give the dense result, and the method must say so.
    n, m = 1500, 700
    x, s = random_case(rng, n, m)
    res = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", rounding_threshold=-1.0)
    assert res.method.startswith("fft-four-step failed the rounding guard")
    assert "exact-integer fallback" in res.method
    assert res.output == oracle(x, s, n, m)


def test_default_budget_does_not_grow_with_the_input():
    # Plans for 2^24 ... 2^34 input bits all keep their blocks within fixed sizes.
    piece, slab_piece = _fourstep._PIECE, _fourstep._SLAB_PIECE
    for k in (24, 28, 30, 32, 34):
        n = 1 << k
        plan = _fourstep.plan_four_step(n, n // 2, MEMORY_BUDGET)
        assert plan.L >= n + n // 2 - 1
        assert 16 * plan.N2 * plan.slab <= slab_piece or plan.slab == 8
        assert 16 * plan.N1 * plan.rows <= piece or plan.rows == 1
        assert 4 * plan.N1 * plan.fill <= piece
        # three pieces in flight: three slabs, or three times lead rows and partners
        assert 3 * slab_piece <= MEMORY_BUDGET and 6 * piece <= MEMORY_BUDGET
        assert not plan.in_memory


def test_named_work_file_is_private(tmp_path):
    # The named files used with a cluster: private, and their space reserved up front.
    plan = _fourstep.plan_four_step(5000, 3000, 1)
    stores = [_fourstep.named_store(plan, plan.N2, tmp_path),
              _fourstep.open_packed(plan, tmp_path, named=True)]
    try:
        for st, size in zip(stores, (16 * plan.L, plan.L // 4), strict=True):
            assert os.stat(st.path).st_mode & 0o777 == 0o600
            assert os.path.getsize(st.path) == size
    finally:
        for st in stores:
            st.close()
            os.unlink(st.path)


def test_bad_strategy():
    with pytest.raises(ParameterError, match="strategy must be one of"):
        extract_toeplitz(b"\x01", b"\x01", 1, strategy="magic")
    with pytest.raises(ParameterError, match="memory_budget"):
        extract_toeplitz(b"\x01", b"\x01", 1, memory_budget=0)
    with pytest.raises(ParameterError, match="not a directory"):
        extract_toeplitz(b"\x01", b"\x01", 1, strategy="four-step", temp_dir="/nonexistent/x")


def test_progress_counts_every_piece(rng):
    x, s = random_case(rng, 3000, 1000)
    calls = []
    res = extract_toeplitz(x, s, 1000, strategy="four-step", memory_budget=1,
                           progress=lambda d, t: calls.append((d, t)))
    assert calls[-1] == (res.blocks, res.blocks)
    assert [d for d, _ in calls] == list(range(1, res.blocks + 1))
    assert math.prod((res.input_block_bits, res.output_block_bits)) == res.fft_length


def test_certify_with_spilled_bits_and_four_step_leaves_only_outputs(tmp_path, monkeypatch):
    # The raw bits spill to a private file and the extraction uses its anonymous work files in
    # the output directory; afterwards only the two outputs remain, and the bits equal a run
    # with neither (the in-memory single convolution).
    from helpers import sim_trials, uniform_protocol

    import dicert.stages.scan as certify_mod
    import dicert.extract as ex
    from dicert.certify import BITS_NAME, RECORD_NAME, certify
    from dicert.logs import write_log

    log = tmp_path / "log.btl"
    write_log(log, sim_trials(20_000, seed=11))
    seed = np.random.default_rng(5).bytes(20_000 * 4 // 8 + 64)
    plain = certify(log, uniform_protocol(), seed, tmp_path / "plain")
    assert plain.status == "certified" and plain.record["extractor"]["method"] == "fft-cyclic"
    monkeypatch.setattr(certify_mod, "_SPILL_BYTES", 100)
    monkeypatch.setattr(ex, "SINGLE_LIMIT", 1000)
    monkeypatch.setattr(ex, "MEMORY_BUDGET", 1 << 16)  # work array in files, not in memory
    out = tmp_path / "spill"
    out.mkdir()
    res = certify(log, uniform_protocol(), seed, out)
    assert res.record["extractor"]["method"] == "fft-four-step"
    assert (out / BITS_NAME).read_bytes() == (tmp_path / "plain" / BITS_NAME).read_bytes()
    assert sorted(p.name for p in out.iterdir()) == sorted([BITS_NAME, RECORD_NAME])


def test_twiddles_follow_the_four_step_definition():
    # Bailey, "FFTs in external or hierarchical memory", J. Supercomputing 4, 23-35 (1990),
    # step 2 of the four-step FFT: entry (k2, j1) is multiplied by exp(-2 pi i j1 k2 / L),
    # L = N1 * N2. Reference: the angle from the exactly reduced integer j1 * k2 mod L in
    # 50-digit arithmetic (mpmath), at the largest indices of a long transform (where j1 * k2
    # / L in float64 would lose digits); both signs, a slab not starting at column 0.
    # Regression: the angle used to be formed as (2 pi / L) * r, whose absolute error grows
    # with the angle (up to ~8e-16 here); with the octant reduction every factor is within
    # an ulp or two of 1.
    import mpmath

    N1, N2 = 1 << 17, 3 * 5 * 1024
    L, c0, w = N1 * N2, N1 - 16, 16
    for sign in (-1, +1):
        t = np.ones((N2, w), dtype=np.complex128)
        _fourstep._twiddle(t, c0, L, sign)
        for k2 in (0, 1, 63, 64, 1023, N2 // 2, N2 - 1):
            for j in (0, 7, 15):
                r = ((c0 + j) * k2) % L
                with mpmath.workdps(50):
                    ref = mpmath.expjpi(sign * 2 * mpmath.mpf(r) / L)
                got = t[k2, j]
                assert abs(got.real - float(ref.real)) <= 4e-16
                assert abs(got.imag - float(ref.imag)) <= 4e-16

    r = np.random.default_rng(3).integers(0, L, 500)
    got = _fourstep._roots(r, L, -1)
    for ri, g in zip(r, got, strict=True):
        with mpmath.workdps(50):
            ref = mpmath.expjpi(-2 * mpmath.mpf(int(ri)) / L)
        # one ulp of values in [1/2, 1): glibc's cos and sin on [0, pi/4] are within an ulp
        # (from memory), and the quadrant is applied exactly
        assert abs(g.real - float(ref.real)) <= 1.2e-16
        assert abs(g.imag - float(ref.imag)) <= 1.2e-16


def test_short_reads_and_writes_of_the_work_file(rng, tmp_path, monkeypatch):
    # POSIX allows preadv/pwritev to move fewer bytes than asked (IEEE Std 1003.1, read()
    # and write()); the work file's I/O must finish the rest. Every call is cut to 1000 bytes,
    # or to one 4096-byte block on a direct (O_DIRECT) descriptor, whose transfers move whole
    # blocks (Linux open(2), "O_DIRECT").
    n, m = 12000, 2500
    x, s = random_case(rng, n, m, 1)
    real_r, real_w, real_pw = os.preadv, os.pwritev, os.pwrite

    def limit(fd):
        direct = fcntl.fcntl(fd, fcntl.F_GETFL) & getattr(os, "O_DIRECT", 0)
        return 4096 if direct else 1000

    def cut(fd, views):
        out, left = [], limit(fd)
        for v in views:
            if left <= 0:
                break
            out.append(v[:left])
            left -= len(out[-1])
        return out

    monkeypatch.setattr(os, "preadv", lambda fd, views, off: real_r(fd, cut(fd, views), off))
    monkeypatch.setattr(os, "pwritev", lambda fd, views, off: real_w(fd, cut(fd, views), off))
    monkeypatch.setattr(os, "pwrite",
                        lambda fd, data, off: real_pw(fd, data[:limit(fd)], off))
    res = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", memory_budget=500_000,
                           temp_dir=tmp_path)
    assert res.output == oracle(x, s, n, m)


@pytest.mark.parametrize("direct", [True, False])
def test_direct_and_buffered_work_file_give_the_dense_result(rng, tmp_path, monkeypatch, direct):
    # The work file is moved by direct I/O (O_DIRECT) where the file system allows it and by
    # buffered I/O otherwise; both must give the dense definition's bits.
    n, m = 12000, 2500
    x, s = random_case(rng, n, m, 1)
    monkeypatch.setattr(_workfile, "DIRECT_IO", direct)
    used = []
    real = _workfile.FileStore.put_cols

    def spy(self, c0, v):
        used.append(self.direct)
        return real(self, c0, v)

    monkeypatch.setattr(_workfile.FileStore, "put_cols", spy)
    res = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", memory_budget=500_000,
                           temp_dir=tmp_path)
    assert res.output == oracle(x, s, n, m)
    assert used, "the work file was not used"
    if not direct:
        assert not any(used)
    elif not any(used):
        pytest.skip("this file system refuses direct I/O")
    else:
        assert all(used)


def test_pipeline_failure_ends_every_piece_and_raises(tmp_path):
    # A failing piece (in its read, its computation or its write) must make the pass raise
    # once every piece in flight has ended, and must not hang the submitting thread.
    from concurrent.futures import ThreadPoolExecutor

    for stage in ("read", "compute", "write"):
        started, ended = [], []

        def read(job, stage=stage):
            if stage == "read" and job == 3:
                raise OSError("read failed")
            return job

        def compute(job, data, stage=stage):
            started.append(job)
            if stage == "compute" and job == 3:
                raise ValueError("compute failed")
            ended.append(job)
            return data

        def write(job, res, stage=stage):
            if stage == "write" and job == 3:
                raise OSError("write failed")

        cpu, io = ThreadPoolExecutor(2), ThreadPoolExecutor(1)
        try:
            with pytest.raises((OSError, ValueError), match="failed"):
                _fourstep._pipeline(cpu, (io, io), list(range(40)), compute, read, write,
                                    ahead=3, tick=lambda: None)
        finally:
            cpu.shutdown(wait=True)
            io.shutdown(wait=True)
        assert len(started) < 40  # it stopped admitting pieces
        assert set(ended) <= set(started)


def test_twiddles_for_an_odd_column_length():
    import mpmath

    # N2 = 3645 = 5 * 3**6 (no factor 2): the two tables split k2 by a divisor near sqrt(N2)
    # and each factor must still be exp(sign 2 pi i (j1 k2 mod L) / L) to a few ulp
    # (checked against mpmath at 50 digits).
    N1, N2 = 1 << 15, 3645
    L, c0, w = N1 * N2, N1 - 16, 16
    assert _fourstep._near_root_divisor(N2) == 45
    t = np.ones((N2, w), dtype=np.complex128)
    _fourstep._twiddle(t, c0, L, -1)
    for k2 in (0, 1, 44, 45, 46, 1822, N2 - 1):
        for j in (0, 9, 15):
            r = ((c0 + j) * k2) % L
            with mpmath.workdps(50):
                ref = mpmath.expjpi(-2 * mpmath.mpf(r) / L)
            assert abs(t[k2, j] - complex(ref)) <= 4e-16


def test_direct_transfers_refused_fall_back_to_buffered(rng, tmp_path, monkeypatch):
    # Some file systems accept an O_DIRECT open but refuse its transfers with EINVAL (Linux
    # open(2), "O_DIRECT": alignment rules vary by file system). The work file must then move
    # buffered, with the same result.
    n, m = 12000, 2500
    x, s = random_case(rng, n, m, 1)
    real_r, real_w, real_pw = os.preadv, os.pwritev, os.pwrite

    def refuse(real):
        def call(fd, data, off):
            if fcntl.fcntl(fd, fcntl.F_GETFL) & getattr(os, "O_DIRECT", 0):
                raise OSError(errno.EINVAL, "Invalid argument")
            return real(fd, data, off)
        return call

    monkeypatch.setattr(os, "preadv", refuse(real_r))
    monkeypatch.setattr(os, "pwritev", refuse(real_w))
    monkeypatch.setattr(os, "pwrite", refuse(real_pw))
    stores = []
    real_close = _workfile.FileStore.close

    def spy(self):
        stores.append((self._dfd, self.direct))
        real_close(self)

    monkeypatch.setattr(_workfile.FileStore, "close", spy)
    res = extract_toeplitz(x, s, m, n_bits=n, strategy="four-step", memory_budget=500_000,
                           temp_dir=tmp_path)
    assert res.output == oracle(x, s, n, m)
    assert stores and all(not direct for _, direct in stores)
    if not any(d not in (None, False) for d, _ in stores):
        pytest.skip("this file system refuses direct I/O at open: nothing to fall back from")
