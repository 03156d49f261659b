"""File-system helpers shared by every stage that writes output.

Outputs are written to a temporary file in the destination directory and renamed into
place only when complete, so a failure never leaves a half-written file behind.
"""

from __future__ import annotations

import contextlib
import hashlib
import os
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO


@contextlib.contextmanager
def atomic_writer(path: str | os.PathLike[str], mode: str = "wb") -> Iterator[IO]:
    """Open a temporary sibling of ``path`` for writing; rename it over ``path`` on success.

    On any exception the temporary file is removed and ``path`` is left untouched.
    """
    target = Path(path)
    target.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    try:
        os.fchmod(fd, 0o666 & ~_umask())  # mkstemp creates 0600; outputs follow the umask
        with os.fdopen(fd, mode) as fh:
            yield fh
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_writer(path, "wb") as fh:
        fh.write(data)


def sha256_file(path: str | os.PathLike[str], chunk: int = 1 << 22) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()
