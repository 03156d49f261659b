"""The protocols shipped inside the package: list them, copy one out for editing.

The package carries a copy of every file of the top-level ``protocols/`` folder under
``dicert/data/protocols`` (a test keeps the two identical), so ``--protocol chsh-spotcheck``
and ``dicert protocols copy chsh-spotcheck`` work from a plain ``pip install``.
"""

from __future__ import annotations

import dataclasses
import os
from pathlib import Path

from dicert.errors import ParameterError

#: Side information each method certifies against (see the methods' modules in dicert.finite).
SIDE_INFORMATION = {"martingale": "classical", "eat": "quantum", "pef": "classical"}


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ShippedProtocol:
    """One shipped protocol: its name, method, side information and a one-line summary."""

    name: str
    method: str
    side_information: str
    description: str
    file: str


def _one_line(text: str, limit: int = 100) -> str:
    flat = " ".join(text.split())
    first = flat.split(". ")[0].rstrip(".")
    if len(first) > limit:
        first = first[: limit - 3].rstrip() + "..."
    return first


def _summary(text: str, description: str) -> str:
    """The file's header sentence (``# dicert protocol: ...``), else the description's first."""
    lines = text.splitlines()
    head: list[str] = []
    for line in lines:
        body = line.lstrip("#").strip()
        if not head:
            if line.startswith("#") and body.lower().startswith("dicert protocol:"):
                head.append(body.split(":", 1)[1].strip())
            continue
        if not line.startswith("#") or not body:
            break
        head.append(body)
    if head:
        flat = " ".join(" ".join(head).split())
        end = flat.find(". ")
        return flat[: end + 1] if end >= 0 else flat
    return _one_line(description)


def list_shipped() -> tuple[ShippedProtocol, ...]:
    """Every shipped protocol, sorted by name (each file is loaded and validated)."""
    from dicert.protocol import load_protocol, shipped_protocol_names, shipped_protocol_path

    out = []
    for name in shipped_protocol_names():
        path = shipped_protocol_path(name)
        proto = load_protocol(path)
        out.append(ShippedProtocol(name=proto.name, method=proto.method,
                                   side_information=SIDE_INFORMATION.get(proto.method, "?"),
                                   description=_summary(proto.text, proto.description),
                                   file=path.name))
    return tuple(out)


def copy_shipped(name: str, to: str | os.PathLike[str] = ".", *, force: bool = False) -> Path:
    """Copy the shipped protocol ``name`` into the directory ``to``; return the new path.

    Refuses (ParameterError) to overwrite an existing file unless ``force``; the copy is
    written to a temporary sibling and then linked (no overwrite) or renamed (``force``)
    into place, so the target is never half-written.
    """
    from dicert._io import write_temp_sibling
    from dicert.protocol import shipped_protocol_names, shipped_protocol_path

    src = shipped_protocol_path(name)
    if not src.is_file():
        raise ParameterError(f"no shipped protocol named {name!r}; shipped: "
                             + ", ".join(shipped_protocol_names()))
    dest_dir = Path(to)
    if not dest_dir.is_dir():
        raise ParameterError(f"--to {dest_dir}: not a directory")
    dest = dest_dir / src.name
    if dest.exists() and not force:
        raise ParameterError(f"{dest}: already exists (use --force to overwrite it)")
    tmp = write_temp_sibling(dest, src.read_bytes())
    try:
        if force:
            os.replace(tmp, dest)
        else:
            try:
                os.link(tmp, dest)  # fails if dest appeared meanwhile: never overwrites
            except FileExistsError:
                raise ParameterError(f"{dest}: already exists (use --force to overwrite it)") from None
            except OSError:
                # File systems without hard links: a last check, then rename.
                if dest.exists():
                    raise ParameterError(f"{dest}: already exists (use --force to overwrite it)") from None
                os.replace(tmp, dest)
    finally:
        if tmp.exists():
            tmp.unlink()
    return dest


__all__ = ["ShippedProtocol", "copy_shipped", "list_shipped"]
