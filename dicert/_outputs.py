"""Committing a certification's outputs as one unit, locks, cleanup, and the fault hook.

Design (see DEVELOPERS.md, *Outputs as one unit*):

* ``--out DIR`` is built complete in a hidden staging folder next to it
  (``PARENT/.DIR.new-XXXX``), then renamed into place in one ``rename(2)``; with ``--force``
  over an earlier run's folder the two folders are exchanged atomically (``renameat2`` with
  ``RENAME_EXCHANGE``; where that is missing, the earlier folder is first moved to
  ``PARENT/.DIR.old-XXXX`` and restored by the next run if a crash came in between) and the
  earlier set is deleted only after the new one is in place.
* A run holds an exclusive ``fcntl.flock`` on ``PARENT/.DIR.lock`` for its whole duration
  (and on ``CHAIN/.lock`` with ``--chain``, taken first), so a run holding the lock knows no
  other run is active and removes stale staging folders, raw-bit spill folders and chain
  temporary files at start. A crashed run's lock is released by the kernel.
* With ``--chain`` the commit point is the no-clobber link of the new pulse into the chain; a
  small journal (``CHAIN/.commit.json``) names the staging folder in between, and the next
  run on that chain rolls a crashed commit forward (pulse present: the folder is renamed into
  place) or back (pulse absent: the staging folder is deleted).
* Published files (bits, records, chain pulses, public keys) get mode 0644 and published
  folders 0755, whatever the umask; private keys and raw-bit spill files 0600 (spill folders
  0700).
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import fcntl
import json
import os
import re
import secrets
import shutil
from collections.abc import Iterator
from pathlib import Path

from dicert.errors import DicertError

#: Mode of every published file (bits, records, chain pulses, public keys).
PUBLIC_FILE_MODE = 0o644
#: Mode of published folders (--out, chain).
PUBLIC_DIR_MODE = 0o755
#: Mode of private files (private keys, raw-bit spill files).
PRIVATE_FILE_MODE = 0o600

#: Environment variable read by :func:`fault_point` (tests only).
FAULT_ENV = "DICERT_TEST_FAULT"
CHAIN_LOCK_NAME = ".lock"
#: What follows ``.DIR.`` in the names of a run's leftovers (the token is secrets.token_hex(6)).
_LEFTOVER = re.compile(r"(new|raw|old)-[0-9a-f]{12}")
CHAIN_JOURNAL_NAME = ".commit.json"


def fault_point(stage: str) -> None:
    """Test hook: ``DICERT_TEST_FAULT=<stage>`` raises here, ``<stage>:kill`` kills the process.

    The one place the variable is read. Stages of ``certify``: ``after-scan``,
    ``after-extract``, ``after-stage-write``, ``during-chain-append``, ``after-chain-append``
    (between the chain link and the rename of the output folder), ``after-exchange``.
    """
    want = os.environ.get(FAULT_ENV)
    if not want:
        return
    name, _, how = want.partition(":")
    if name != stage:
        return
    if how == "kill":
        import signal

        os.kill(os.getpid(), signal.SIGKILL)
    raise DicertError(f"injected fault at stage {stage} ({FAULT_ENV})")


def output_error(path: os.PathLike[str] | str, exc: OSError) -> DicertError:
    """A one-line error naming the path and the cause of an OS error on output."""
    cause = exc.strerror or str(exc)
    code = errno.errorcode.get(exc.errno or 0)
    return DicertError(f"{path}: cannot write output ({cause}{', ' + code if code else ''})")


@contextlib.contextmanager
def held_lock(path: Path) -> Iterator[None]:
    """Hold an exclusive flock on ``path`` (created 0644 if missing); waits for other holders."""
    try:
        fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, PUBLIC_FILE_MODE)
    except OSError as exc:
        raise output_error(path, exc) from None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)  # releases the lock


def out_lock_path(out: Path) -> Path:
    return out.parent / f".{out.name}.lock"


def make_public_dir(path: Path) -> None:
    """Create ``path`` (and parents) if missing; a folder created here gets mode 0755."""
    if path.is_dir():
        return
    try:
        path.mkdir(parents=True, exist_ok=True)
        os.chmod(path, PUBLIC_DIR_MODE)
    except OSError as exc:
        raise output_error(path, exc) from None


def write_public_file(path: Path, data: bytes, mode: int = PUBLIC_FILE_MODE) -> None:
    """Write a new file (it must not exist), fsynced, with exactly ``mode``."""
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_CLOEXEC, mode)
    try:
        os.fchmod(fd, mode)
        with os.fdopen(fd, "wb") as fh:
            fd = -1
            fh.write(data)
            fh.flush()
            os.fsync(fh.fileno())
    finally:
        if fd >= 0:
            os.close(fd)


def fsync_dir(path: Path) -> None:
    with contextlib.suppress(OSError):
        fd = os.open(path, os.O_RDONLY | os.O_DIRECTORY)
        try:
            os.fsync(fd)
        finally:
            os.close(fd)


# --------------------------------------------------------------------------- staging


def new_stage(out: Path) -> Path:
    """A fresh, empty staging folder next to ``out`` (mode 0755)."""
    stage = out.parent / f".{out.name}.new-{secrets.token_hex(6)}"
    try:
        os.mkdir(stage, PUBLIC_DIR_MODE)
        os.chmod(stage, PUBLIC_DIR_MODE)
    except OSError as exc:
        raise output_error(stage, exc) from None
    return stage


def new_spill_dir(out: Path) -> Path:
    """A private folder (0700) for raw-bit spill files, next to ``out``."""
    spill = out.parent / f".{out.name}.raw-{secrets.token_hex(6)}"
    try:
        os.mkdir(spill, 0o700)
    except OSError as exc:
        raise output_error(spill, exc) from None
    return spill


def remove_tree(path: Path) -> None:
    with contextlib.suppress(FileNotFoundError):
        if path.is_dir() and not path.is_symlink():
            shutil.rmtree(path)
        else:
            path.unlink()


def _exchange(a: Path, b: Path) -> bool:
    """Atomically swap two paths (Linux renameat2 RENAME_EXCHANGE); False if unsupported."""
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        fn = libc.renameat2
    except (OSError, AttributeError):
        return False
    at_fdcwd, rename_exchange = -100, 2
    rc = fn(at_fdcwd, os.fsencode(a), at_fdcwd, os.fsencode(b), rename_exchange)
    if rc == 0:
        return True
    err = ctypes.get_errno()
    if err in (errno.ENOSYS, errno.EINVAL, errno.ENOTSUP):
        return False
    raise OSError(err, os.strerror(err), str(b))


def publish_stage(stage: Path, out: Path, *, replace: bool) -> None:
    """Make the complete folder ``stage`` visible as ``out`` in one step.

    ``out`` must be missing or empty, or (``replace``) an earlier run's folder, which is
    deleted only after the new one is in place.
    """
    try:
        if out.is_dir() and any(out.iterdir()):
            if not replace:
                raise DicertError(f"{out}: not empty; refusing to replace it (use --force)")
            if _exchange(stage, out):
                fsync_dir(out.parent)
                fault_point("after-exchange")
                remove_tree(stage)  # now holds the earlier run's files
                return
            old = out.parent / f".{out.name}.old-{secrets.token_hex(6)}"
            os.rename(out, old)
            try:
                fault_point("after-exchange")
                os.rename(stage, out)
            except BaseException:
                with contextlib.suppress(OSError):
                    os.rename(old, out)  # (a crash here is undone by clean_stale)
                raise
            fsync_dir(out.parent)
            remove_tree(old)
            return
        os.rename(stage, out)  # replaces a missing or empty folder atomically
        fsync_dir(out.parent)
    except OSError as exc:
        raise output_error(out, exc) from None


def clean_stale(out: Path) -> list[str]:
    """Remove what a crashed run left next to ``out`` (call with the out lock held).

    Staging and spill folders are deleted; an earlier run's folder moved aside by an
    interrupted ``--force`` is restored if ``out`` is missing, deleted otherwise. A folder
    handed to a chain's commit journal (``.DIR.pending-*``) is left to that chain's next run.
    """
    done: list[str] = []
    parent = out.parent
    if not parent.is_dir():
        return done
    prefix = f".{out.name}."
    for entry in sorted(os.scandir(parent), key=lambda e: e.name):
        name = entry.name
        if not name.startswith(prefix):
            continue
        rest = name[len(prefix):]
        path = Path(entry.path)
        if not _LEFTOVER.fullmatch(rest):
            continue
        if rest.startswith("old-"):
            if not out.exists():
                os.rename(path, out)
                done.append(f"restored {out} from {name}")
                continue
            remove_tree(path)
            done.append(f"removed {name}")
        elif rest.startswith(("new-", "raw-")):
            remove_tree(path)
            done.append(f"removed {name}")
    return done


def sweep_siblings(out: Path) -> list[str]:
    """Clean up after crashed runs on other folders next to ``out``.

    For every ``PARENT/.NAME.lock`` whose lock is free (no run on NAME is active), the
    leftovers of NAME are removed as by :func:`clean_stale`. Never waits.
    """
    done: list[str] = []
    parent = out.parent
    for entry in sorted(os.scandir(parent), key=lambda e: e.name):
        name = entry.name
        if not (name.startswith(".") and name.endswith(".lock")) or name == f".{out.name}.lock":
            continue
        other = parent / name[1:-len(".lock")]
        prefix = f".{other.name}."
        if not any(e.name.startswith(prefix) and _LEFTOVER.fullmatch(e.name[len(prefix):])
                   for e in os.scandir(parent)):
            continue
        try:
            fd = os.open(entry.path, os.O_RDWR | os.O_CLOEXEC)
        except OSError:
            continue
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError:
            os.close(fd)
            continue  # a run on that folder is active
        try:
            done.extend(clean_stale(other))
        finally:
            os.close(fd)
    return done


def hand_to_journal(stage: Path, out: Path) -> Path:
    """Rename a complete staging folder to ``.DIR.pending-*`` (owned by a chain journal)."""
    pending = out.parent / f".{out.name}.pending-{secrets.token_hex(6)}"
    try:
        os.rename(stage, pending)
    except OSError as exc:
        raise output_error(pending, exc) from None
    return pending


# --------------------------------------------------------------------------- chain journal


def write_journal(chain_dir: Path, *, stage: Path, out: Path, pulse: str, record_sha256: str,
                  replace: bool) -> Path:
    path = chain_dir / CHAIN_JOURNAL_NAME
    data = json.dumps({"stage": str(stage.resolve()), "out": str(out.resolve()),
                       "pulse": pulse, "record_sha256": record_sha256,
                       "replace": bool(replace)}, sort_keys=True).encode()
    tmp = chain_dir / f".commit.json.{secrets.token_hex(6)}.part"
    try:
        write_public_file(tmp, data)
        os.replace(tmp, path)
    except OSError as exc:
        with contextlib.suppress(OSError):
            os.unlink(tmp)
        raise output_error(path, exc) from None
    fsync_dir(chain_dir)
    return path


def recover_chain(chain_dir: Path) -> list[str]:
    """Finish or undo a commit interrupted by a crash (call with the chain lock held).

    Also removes temporary ``.*.part`` files of interrupted appends.
    """
    done: list[str] = []
    if not chain_dir.is_dir():
        return done
    for entry in os.scandir(chain_dir):
        if entry.name.startswith(".") and entry.name.endswith(".part"):
            with contextlib.suppress(FileNotFoundError):
                os.unlink(entry.path)
            done.append(f"removed {entry.name}")
    journal = chain_dir / CHAIN_JOURNAL_NAME
    if not journal.exists():
        return done
    try:
        info = json.loads(journal.read_bytes())
        stage, out = Path(info["stage"]), Path(info["out"])
        pulse, digest, replace = str(info["pulse"]), str(info["record_sha256"]), bool(
            info["replace"])
    except (OSError, ValueError, KeyError, TypeError):
        os.unlink(journal)
        return done + ["removed an unreadable commit journal"]
    from dicert.audit.record import read_record, record_digest

    committed = False
    pulse_path = chain_dir / pulse
    if pulse_path.is_file() and "/" not in pulse:
        with contextlib.suppress(DicertError, OSError):
            committed = record_digest(read_record(pulse_path)) == digest
    if stage.is_dir() and stage.name.startswith(f".{out.name}.pending-"):
        with held_lock(out_lock_path(out)):
            if committed:
                publish_stage(stage, out, replace=replace)
                done.append(f"completed the interrupted commit of {out}")
            else:
                remove_tree(stage)
                done.append(f"removed the uncommitted staging folder {stage.name}")
    os.unlink(journal)
    fsync_dir(chain_dir)
    return done
