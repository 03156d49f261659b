"""Atomic output writing: nothing half-written, permissions follow the umask (common practice)."""

import os

import pytest

from dicert._io import atomic_write_bytes, atomic_writer, sha256_file


def test_atomic_writer_replaces_only_on_success(tmp_path):
    p = tmp_path / "out.bin"
    atomic_write_bytes(p, b"old")
    with pytest.raises(RuntimeError):
        with atomic_writer(p) as fh:
            fh.write(b"new but incomplete")
            raise RuntimeError("stage failed")
    assert p.read_bytes() == b"old"
    assert sorted(q.name for q in tmp_path.iterdir()) == ["out.bin"]


def test_atomic_writer_follows_umask(tmp_path):
    old = os.umask(0o022)
    try:
        atomic_write_bytes(tmp_path / "f", b"x")
    finally:
        os.umask(old)
    assert (tmp_path / "f").stat().st_mode & 0o777 == 0o644


def test_sha256_file_known_answer(tmp_path):
    # FIPS 180-4 / common test vector: SHA-256("abc").
    p = tmp_path / "abc"
    p.write_bytes(b"abc")
    assert sha256_file(p) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
