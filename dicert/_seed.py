"""The extractor seed as certify and verify see it: a file read in chunks, never held whole.

A seed file is opened, checked (a regular, non-empty file) and then only streamed: its
SHA-256 and the sanity screens of :func:`dicert.design.seed_problems` read it in chunks of
:data:`CHUNK` bytes, and the extractor reads only the ceil((n + m - 1) / 8) bytes it uses, by
position. Peak memory therefore does not grow with the seed (or with the log it matches).

The record's ``extractor.seed_sha256`` and ``seed_bytes`` stay what they always were: the
digest and size of ALL the bytes given. :meth:`SeedInput.check_unchanged` compares them with
what the extractor read, so a seed file replaced during the run is refused, not recorded.

Bytes given in memory (library calls), and a seed read from a pipe or device (which cannot
be read twice), are held in memory as before.
"""

from __future__ import annotations

import hashlib
import os
import stat
from collections.abc import Iterator
from pathlib import Path
from typing import Any

from dicert.errors import SeedError

#: Bytes read at a time when a seed file is hashed or screened.
CHUNK = 1 << 22


class SeedInput:
    """An extractor seed given as bytes or as a path (see the module docstring)."""

    def __init__(self, seed: Any) -> None:
        self.path: Path | None = None
        self.data: bytes | None = None
        self._sha: str | None = None
        if isinstance(seed, (bytes, bytearray, memoryview)):
            self.data = bytes(seed)
            self.label = "seed"
            self.size = len(self.data)
        else:
            p = Path(seed)
            self.label = str(p)
            try:
                st = os.stat(p)
            except FileNotFoundError:
                raise SeedError(f"{p}: seed file (raw bytes) not found") from None
            except OSError as exc:
                raise SeedError(f"{p}: cannot read seed file (raw bytes) ({exc.strerror})") \
                    from None
            if stat.S_ISDIR(st.st_mode):
                raise SeedError(f"{p}: is a directory, expected a seed file (raw bytes)")
            if not stat.S_ISREG(st.st_mode):
                # A pipe or device cannot be read twice: read it once (bounded) as before.
                from dicert.stages.scan import read_seed

                self.data, _ = read_seed(p)
                self.size = len(self.data)
            else:
                try:
                    with open(p, "rb"):
                        pass
                except OSError as exc:
                    raise SeedError(f"{p}: cannot read seed file (raw bytes) "
                                    f"({exc.strerror})") from None
                self.path = p
                self.size = int(st.st_size)
        if self.size == 0:
            raise SeedError(f"{self.label}: seed file is empty")

    def __len__(self) -> int:
        return self.size

    def chunks(self, stop: int | None = None) -> Iterator[bytes]:
        """The first ``stop`` bytes (all by default) in chunks of :data:`CHUNK` bytes."""
        stop = self.size if stop is None else min(stop, self.size)
        if self.data is not None:
            mv = memoryview(self.data)
            for pos in range(0, stop, CHUNK):
                yield mv[pos: min(pos + CHUNK, stop)]
            return
        try:
            with open(self.path, "rb") as fh:
                pos = 0
                while pos < stop:
                    block = fh.read(min(CHUNK, stop - pos))
                    if not block:
                        raise SeedError(f"{self.label}: seed file shrank while being read")
                    pos += len(block)
                    yield block
        except OSError as exc:
            raise SeedError(f"{self.label}: cannot read seed file (raw bytes) "
                            f"({exc.strerror})") from None

    def head(self, k: int) -> bytes:
        """The first ``k`` bytes (fewer if the seed is shorter)."""
        return b"".join(bytes(c) for c in self.chunks(k))

    @property
    def sha256(self) -> str:
        """Hex SHA-256 of all the seed's bytes (computed once, streaming)."""
        if self._sha is None:
            h = hashlib.sha256()
            n = 0
            for block in self.chunks():
                h.update(block)
                n += len(block)
            if n != self.size:  # pragma: no cover - chunks() raises first
                raise SeedError(f"{self.label}: seed file changed while being read")
            self._sha = h.hexdigest()
        return self._sha

    def for_extractor(self) -> Any:
        """What :func:`dicert.extract.extract_toeplitz` is given: the path (read by position,
        only the bytes it uses) or the bytes in memory."""
        return self.data if self.data is not None else self.path

    def check_unchanged(self, extraction: Any) -> None:
        """Refuse the run if the extractor saw another seed than the one hashed here."""
        if extraction is None:
            return
        if (int(extraction.seed_bytes) != self.size
                or extraction.seed_sha256 != self.sha256):
            raise SeedError(f"{self.label}: seed file changed while being read (its size or "
                            "SHA-256 differs between the checks and the extraction); nothing "
                            "was written")


def open_seed(seed: Any) -> SeedInput:
    """A :class:`SeedInput` for bytes or a path (an existing one is returned as is)."""
    return seed if isinstance(seed, SeedInput) else SeedInput(seed)


__all__ = ["CHUNK", "SeedInput", "open_seed"]
