"""File-system helpers shared by every stage that writes output.

Outputs are written to a temporary file in the destination directory and renamed into
place only when complete, so a failure never leaves a half-written file behind.
"""

from __future__ import annotations

import contextlib
import errno
import hashlib
import os
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path
from typing import IO


@contextlib.contextmanager
def atomic_writer(path: str | os.PathLike[str], mode: str = "wb") -> Iterator[IO]:
    """Open a temporary sibling of ``path`` for writing; rename it over ``path`` on success.

    On any exception the temporary file is removed and ``path`` is left untouched. An
    ``OSError`` that names no file, or only the temporary file (disk full while writing,
    a failed rename), is re-raised naming ``path``, so the user is told which output failed.
    """
    target = Path(path)
    make_parent(target)
    fd, tmp = _mkstemp_for(target)
    try:
        with output_errors(target, tmp):
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


def _mkstemp_for(target: Path) -> tuple[int, str]:
    """A temporary sibling of ``target``; failures (read-only folder, ...) name ``target``."""
    try:
        return tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=target.parent)
    except OSError as exc:
        raise OSError(exc.errno, exc.strerror or str(exc), str(target)) from None


def make_parent(target: str | os.PathLike[str]) -> None:
    """Create the folder of an output; failures name the output and the folder."""
    target = Path(target)
    try:
        target.parent.mkdir(parents=True, exist_ok=True)
    except FileExistsError as exc:  # a regular file where a folder should be
        raise OSError(errno.ENOTDIR, f"cannot create the folder {exc.filename}: a file of that "
                      "name exists", str(target)) from None
    except OSError as exc:
        raise OSError(exc.errno, f"cannot create the folder {exc.filename}: {exc.strerror}",
                      str(target)) from None


@contextlib.contextmanager
def output_errors(target: str | os.PathLike[str], *temps: str | os.PathLike[str]) -> Iterator[None]:
    """Re-raise an ``OSError`` that names no file (or one of ``temps``) as the same error
    naming ``target``: "out/random.bits: No space left on device" instead of a bare errno."""
    try:
        yield
    except OSError as exc:
        names = {None, *(str(t) for t in temps)}
        if exc.filename is None or str(exc.filename) in names:
            if exc.errno is not None:
                raise OSError(exc.errno, exc.strerror or str(exc), str(target)) from None
        raise


def write_temp_sibling(target: str | os.PathLike[str], data: bytes, mode: int | None = None) -> Path:
    """Write ``data`` to a new temporary file next to ``target`` (fsynced) and return its path.

    For outputs that must appear together: write every temporary file first, then
    ``os.replace`` each into place (and unlink them all if anything fails). ``mode`` defaults
    to the umask's default for new files.
    """
    target = Path(target)
    fd, tmp = _mkstemp_for(target)
    try:
        with output_errors(target, tmp), os.fdopen(fd, "wb") as fh:
            os.fchmod(fh.fileno(), 0o666 & ~_umask() if mode is None else mode)
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise
    return Path(tmp)


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def atomic_write_bytes(path: str | os.PathLike[str], data: bytes) -> None:
    """Write ``data`` to ``path`` atomically."""
    with atomic_writer(path, "wb") as fh:
        fh.write(data)


#: Most bytes read from a user input that is not a regular file (a pipe or a device).
MAX_STREAM_BYTES = 256 << 20


@contextlib.contextmanager
def reading_errors(path: str | os.PathLike[str], what: str,
                   error: type[Exception]) -> Iterator[None]:
    """Turn the OS errors of reading a user's input file into ``error`` with one line naming
    the file and what it should be (not found, a directory, permission, any other OS error)."""
    try:
        yield
    except FileNotFoundError:
        raise error(f"{path}: {what} not found") from None
    except IsADirectoryError:
        raise error(f"{path}: is a directory, expected a {what}") from None
    except OSError as exc:
        raise error(f"{path}: cannot read {what} ({exc.strerror})") from None


def read_user_file(path: str | os.PathLike[str], what: str, error: type[Exception],
                   max_bytes: int | None = None) -> bytes:
    """Bytes of an input file named by the user; problems become ``error`` with one line
    naming the file (e.g. ``read_user_file(p, "seed file", SeedError)``). With ``max_bytes``
    a longer file (or an endless device such as /dev/zero) is refused after that many bytes."""
    p = Path(path)
    with reading_errors(p, what, error):
        with open(p, "rb") as fh:
            cap = max_bytes
            if cap is None and not stat.S_ISREG(os.fstat(fh.fileno()).st_mode):
                cap = MAX_STREAM_BYTES  # a pipe or device may never end (/dev/zero)
            data = fh.read() if cap is None else fh.read(cap + 1)
    if cap is not None and len(data) > cap:
        hint = "" if max_bytes is not None else " (not a regular file; save it to a file)"
        raise error(f"{p}: larger than {cap} bytes; not a {what}{hint}")
    return data


def sha256_file(path: str | os.PathLike[str], chunk: int = 1 << 22) -> str:
    """Hex SHA-256 of a file's bytes, read in chunks."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        while block := fh.read(chunk):
            h.update(block)
    return h.hexdigest()
