"""Build and re-check a beacon site (the file work; rendering is in :mod:`dicert.beacon.pages`).

Building
--------
:func:`build_site` inspects the chain first (:func:`dicert.audit.chain.inspect_chain`, against
the operator's key when given) and refuses to publish a chain with errors. It then writes the
whole site into a new temporary folder next to ``out_dir`` and renames it into place, so a
reader never sees a half-built site. An existing ``out_dir`` is replaced only if it is empty or
holds a site built by this command (recognised by its ``manifest.json``); the old folder is
moved aside, the new one renamed in, and the old one removed. Files get mode 0644 and folders
0755 whatever the umask, so any web server user can read them. Every byte is a function of the
chain, the key and the title, except the ``volatile`` member of ``manifest.json`` (the time of
the build).

Manifest (``manifest.json``, RFC 8785 canonical bytes + LF)
-----------------------------------------------------------
``format`` ``"dicert-site/2"``; ``title``; ``tool``; ``chain``: ``pulses``, ``head_index``,
``head_sha256``; ``pulses``: per pulse ``index``, ``record_file``, ``page_file``,
``record_sha256`` (the chain digest: SHA-256 of the record's canonical body),
``previous_record_sha256``, ``file_sha256`` and ``file_bytes`` (of the published file's exact
bytes), ``status``, ``output_bits``; ``public_key``: null or ``algorithm``, ``file``,
``raw_hex``, ``key_fingerprint`` (``fingerprint`` in ``dicert-site/1``); ``build_check``:
what the build checked; ``volatile``: ``generated_at``.
"""

from __future__ import annotations

import contextlib
import dataclasses
import datetime as _dt
import hashlib
import os
import shutil
import tempfile
from collections.abc import Callable, Mapping
from importlib import resources
from pathlib import Path
from typing import Any

from dicert import __version__
from dicert.errors import ParameterError, VerificationError
from dicert.stages.record import _now  # the one UTC timestamp format of records

__all__ = ["SITE_FORMAT", "SiteBuild", "SiteCheck", "build_site", "check_site"]

#: Format of ``manifest.json`` written today; /2 renamed ``public_key.fingerprint`` to
#: ``key_fingerprint`` (the README glossary's name).
SITE_FORMAT = "dicert-site/2"
#: Formats :func:`check_site` reads (it does not use the renamed member).
SITE_FORMATS = ("dicert-site/1", SITE_FORMAT)
MANIFEST_NAME = "manifest.json"
KEY_NAME = "operator-key.pub"
CHAIN_SUBDIR = "chain"
PAGES_SUBDIR = "pulses"
ASSETS = ("check.js", "icon.svg", "style.css")
FILE_MODE = 0o644
DIR_MODE = 0o755
DEFAULT_TITLE = "Randomness beacon"

Clock = Callable[[], "_dt.datetime | str"]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SiteBuild:
    """What :func:`build_site` wrote."""

    site_dir: str
    index_file: str
    pulses: int
    head_index: int
    head_sha256: str
    key_fingerprint: str | None
    files: int
    replaced: bool
    warnings: tuple[str, ...]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SiteCheck:
    """What :func:`check_site` established about a published site."""

    site_dir: str
    pulses: int
    head_sha256: str
    signatures_checked: bool
    key_fingerprint: str | None
    notes: tuple[str, ...]


def _asset_bytes(name: str) -> bytes:
    return resources.files("dicert.beacon").joinpath("assets", name).read_bytes()


def _is_previous_site(path: Path) -> bool:
    manifest = path / MANIFEST_NAME
    if not manifest.is_file():
        return False
    try:
        from dicert.audit.canonical import parse_json

        data = parse_json(manifest.read_bytes(), source=str(manifest))
    except Exception:  # noqa: BLE001 -- anything unreadable is not one of our sites
        return False
    return isinstance(data, dict) and data.get("format") == SITE_FORMAT


def _check_out_dir(out: Path, chain_dir: Path) -> tuple[bool, bool]:
    """(``out`` exists, it holds an earlier site); raise if it must not be touched."""
    exists = replaced = False
    if out.exists() or out.is_symlink():
        if out.is_symlink() or not out.is_dir():
            raise ParameterError(f"{out}: exists and is not a folder; give a new folder for the site")
        exists = True
        if any(out.iterdir()):
            if not _is_previous_site(out):
                raise ParameterError(f"{out}: folder is not empty and holds no site built by "
                                     f"dicert publish ({MANIFEST_NAME}); give a new or empty folder")
            replaced = True
    c, o = chain_dir.resolve(), out.resolve()
    if c == o or o in c.parents or c in o.parents:
        raise ParameterError(f"{out}: the site folder and the chain folder {chain_dir} must not "
                             "contain one another")
    return exists, replaced


def _write(root: Path, rel: str, data: bytes) -> None:
    target = root / rel
    target.parent.mkdir(parents=True, exist_ok=True)
    with open(target, "xb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.chmod(target, FILE_MODE)


def _load_key(public_key: Any) -> tuple[bytes, bytes] | None:
    """(raw 32 bytes, PEM) of the operator key, or None."""
    if public_key is None:
        return None
    from cryptography.hazmat.primitives import serialization

    from dicert.audit import signing

    is_hex = isinstance(public_key, str) and len(public_key) == 64 and all(
        c in "0123456789abcdefABCDEF" for c in public_key)
    if isinstance(public_key, os.PathLike) or (isinstance(public_key, str) and not is_hex):
        key = signing.load_public_key(public_key)
    else:
        key = signing.public_key_from_bytes(signing.public_key_bytes(public_key))
    raw = signing.public_key_bytes(key)
    pem = key.public_bytes(serialization.Encoding.PEM,
                           serialization.PublicFormat.SubjectPublicKeyInfo)
    return raw, pem


def _finding_text(f: Any) -> str:
    where = ":".join(x for x in (getattr(f, "file", None), getattr(f, "field", None)) if x)
    return f"{f.kind}: {f.message}" + (f" ({where})" if where else "")


# long: 30 lines of docstring; the rest reads the chain once and writes every page into one
# staging folder under a single try/finally, renamed into place at the end.
def build_site(chain_dir: str | os.PathLike[str], out_dir: str | os.PathLike[str], *,
               public_key: Any = None, title: str | None = None,
               clock: Clock | None = None) -> SiteBuild:
    """Turn a beacon chain folder into a static site (see the module docstring for the layout).

    Parameters
    ----------
    chain_dir : path-like
        The chain folder (``pulse-NNNNNN.json`` files).
    out_dir : path-like
        The site folder: new, empty, or an earlier site built by this function (replaced).
    public_key : path, Ed25519 public key or raw bytes, optional
        The operator's key. Every pulse must verify under it; it is published as
        ``operator-key.pub`` and the pages check the signatures against it. Without it the
        pages can check the hash chain only.
    title : str, optional
        Heading of the pages.
    clock : callable, optional
        Returns the build time (only ``manifest.json``'s ``volatile`` member depends on it).

    Returns
    -------
    SiteBuild

    Raises
    ------
    VerificationError
        If the chain does not verify (nothing is written).
    ParameterError
        Bad input: no chain folder, an empty chain, an unusable ``out_dir`` or key.
    """
    from dicert.audit.canonical import canonicalize, parse_json
    from dicert.audit.chain import inspect_chain, pulse_file_name
    from dicert.audit.record import record_digest
    from dicert.beacon import pages
    from dicert.cli._common import CAUTION

    chain = Path(chain_dir)
    out = Path(out_dir)
    if not chain.is_dir():
        raise ParameterError(f"{chain}: chain folder does not exist or is not a folder")
    exists, replaced = _check_out_dir(out, chain)
    key = _load_key(public_key)
    report = inspect_chain(chain, key[0] if key else None)
    if report.errors:
        first = report.errors[0]
        more = f" (and {len(report.errors) - 1} more)" if len(report.errors) > 1 else ""
        raise VerificationError(f"the chain does not verify, refusing to publish it: "
                                f"{_finding_text(first)}{more}", "chain")
    if report.pulses == 0:
        raise ParameterError(f"{chain}: the chain holds no pulses; nothing to publish")

    # Read every pulse once: the bytes published are exactly the bytes parsed here.
    entries = []
    for index in range(report.first_index, report.last_index + 1):
        src = chain / pulse_file_name(index)
        data = src.read_bytes()
        record = parse_json(data, source=str(src))
        if data not in (canonicalize(record), canonicalize(record) + b"\n"):
            raise VerificationError(f"{src}: changed while the site was being built", "chain")
        entries.append((index, data, record, record_digest(record)))
    if entries[-1][3] != report.head_sha256:
        raise VerificationError("the chain changed while the site was being built", "chain")

    fingerprint = hashlib.sha256(key[0]).hexdigest() if key else None
    warnings = tuple(_finding_text(f) for f in report.warnings)
    notes = [f"{report.pulses} pulse(s), indices {report.first_index} to {report.last_index}, "
             "hash chain intact (each previous_record_sha256 matches the digest before it)"]
    if key:
        notes.append(f"every pulse is signed by the published operator key {fingerprint}")
    else:
        notes.append(f"{report.signed_pulses} of {report.pulses} pulse(s) signed; no operator "
                     "key given, so signatures were checked only against the keys the records "
                     "carry (integrity, not authorship)")
    notes.extend(f"warning: {w}" for w in warnings)
    views = []
    for index, data, record, digest in entries:
        views.append(pages.pulse_view(
            record, index=index, record_file=f"{CHAIN_SUBDIR}/{pulse_file_name(index)}",
            page_file=f"{PAGES_SUBDIR}/{pages.pulse_page_name(index)}", record_sha256=digest,
            file_sha256=hashlib.sha256(data).hexdigest(), file_bytes=len(data)))
    info = pages.SiteInfo(
        title=title or DEFAULT_TITLE, pulses=len(views), head_index=views[-1].index,
        head_sha256=views[-1].record_sha256, key_fingerprint=fingerprint,
        key_file=KEY_NAME if key else None, build_notes=tuple(notes), caution=CAUTION)
    manifest = {
        "format": SITE_FORMAT,
        "title": info.title,
        "tool": {"name": "dicert", "version": __version__},
        "chain": {"pulses": info.pulses, "head_index": info.head_index,
                  "head_sha256": info.head_sha256},
        "pulses": [
            {"index": v.index, "record_file": v.record_file, "page_file": v.page_file,
             "record_sha256": v.record_sha256, "previous_record_sha256": v.previous_record_sha256,
             "file_sha256": v.file_sha256, "file_bytes": v.file_bytes, "status": v.status,
             "output_bits": v.output_bits}
            for v in views
        ],
        "public_key": None if key is None else {
            "algorithm": "Ed25519", "file": KEY_NAME, "raw_hex": key[0].hex(),
            "key_fingerprint": fingerprint},
        "build_check": {"notes": notes, "warnings": list(warnings),
                        "signer_trusted": key is not None},
        "volatile": {"generated_at": _now(clock)},
    }

    out.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".building", dir=out.parent))
    try:
        os.chmod(tmp, DIR_MODE)
        for index, data, _, _ in entries:
            _write(tmp, f"{CHAIN_SUBDIR}/{pulse_file_name(index)}", data)
        for i, (v, (_, _, record, _)) in enumerate(zip(views, entries, strict=True)):
            page = pages.render_pulse_page(
                info, v, record, previous=views[i - 1] if i else None,
                following=views[i + 1] if i + 1 < len(views) else None)
            _write(tmp, v.page_file, page.encode("utf-8"))
        _write(tmp, "index.html", pages.render_index(info, views).encode("utf-8"))
        for name in ASSETS:
            _write(tmp, f"assets/{name}", _asset_bytes(name))
        if key:
            _write(tmp, KEY_NAME, key[1])
        _write(tmp, MANIFEST_NAME, canonicalize(manifest) + b"\n")
        for sub in (CHAIN_SUBDIR, PAGES_SUBDIR, "assets"):
            os.chmod(tmp / sub, DIR_MODE)
        files = sum(1 for p in tmp.rglob("*") if p.is_file())
        _swap_in(tmp, out, exists)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return SiteBuild(site_dir=str(out), index_file=str(out / "index.html"), pulses=info.pulses,
                     head_index=info.head_index, head_sha256=info.head_sha256,
                     key_fingerprint=fingerprint, files=files, replaced=replaced,
                     warnings=warnings)


def _swap_in(tmp: Path, out: Path, exists: bool) -> None:
    """Rename the finished site into place (moving an existing folder aside first)."""
    if not exists:
        try:
            os.rename(tmp, out)
        except OSError:
            raise ParameterError(f"{out}: appeared while the site was being built; "
                                 "nothing was replaced") from None
        return
    old = Path(tempfile.mkdtemp(prefix=f".{out.name}.", suffix=".old", dir=out.parent))
    os.rmdir(old)
    os.rename(out, old)
    try:
        os.rename(tmp, out)
    except BaseException:
        with contextlib.suppress(OSError):
            os.rename(old, out)
        raise
    shutil.rmtree(old, ignore_errors=True)


def check_site(site_dir: str | os.PathLike[str], public_key: Any = None) -> SiteCheck:
    """Re-check a published site the way its pages do, in Python.

    Checks: the manifest's format; every listed record file exists and its bytes hash to the
    manifest's ``file_sha256``; the ``chain/`` folder verifies as a chain
    (:func:`dicert.audit.chain.inspect_chain`, against ``public_key`` when given, else against
    the published key, which then proves integrity only); every manifest digest and link
    matches the records; the head digest is the last pulse's. Raises
    :class:`~dicert.errors.VerificationError` naming the first disagreement.
    """
    from dicert.audit.canonical import parse_json
    from dicert.audit.chain import inspect_chain

    site = Path(site_dir)
    mpath = site / MANIFEST_NAME
    if not mpath.is_file():
        raise ParameterError(f"{site}: no {MANIFEST_NAME}; not a site built by dicert publish")
    manifest = parse_json(mpath.read_bytes(), source=str(mpath))
    if not isinstance(manifest, Mapping) or manifest.get("format") not in SITE_FORMATS:
        raise VerificationError(f"{mpath}: not a {SITE_FORMAT} manifest", "format")
    published = manifest.get("public_key")
    notes = []
    key = _load_key(public_key)
    if key is None and isinstance(published, Mapping):
        key = _load_key(site / str(published.get("file")))
        notes.append("signatures checked against the key published with the site (this shows "
                      "integrity only: give a key you trust to establish authorship)")
    if key is not None and isinstance(published, Mapping) and published.get("raw_hex") != key[0].hex():
        raise VerificationError("the published operator key is not the expected key",
                                "public_key.raw_hex")
    report = inspect_chain(site / CHAIN_SUBDIR, key[0] if key else None)
    if report.errors:
        raise VerificationError(_finding_text(report.errors[0]), f"{CHAIN_SUBDIR}")
    listed = manifest.get("pulses")
    if not isinstance(listed, list) or len(listed) != report.pulses or not listed:
        raise VerificationError(f"the manifest lists {len(listed) if isinstance(listed, list) else 0} "
                                f"pulse(s), the chain folder holds {report.pulses}", "pulses")
    from dicert.audit.record import record_digest

    prev = None
    for n, entry in enumerate(listed, start=1):
        path = site / str(entry.get("record_file"))
        where = f"pulse {entry.get('index')}"
        if entry.get("index") != n:
            raise VerificationError(f"{where}: expected pulse {n} at this place", "pulses")
        if not path.is_file():
            raise VerificationError(f"{where}: record file {entry.get('record_file')} missing",
                                    "pulses")
        data = path.read_bytes()
        if hashlib.sha256(data).hexdigest() != entry.get("file_sha256"):
            raise VerificationError(f"{where}: file bytes differ from the manifest", "file_sha256")
        digest = record_digest(parse_json(data, source=str(path)))
        if digest != entry.get("record_sha256"):
            raise VerificationError(f"{where}: digest differs from the manifest", "record_sha256")
        if entry.get("previous_record_sha256") != prev:
            raise VerificationError(f"{where}: link differs from the manifest",
                                    "previous_record_sha256")
        prev = digest
    head = _get_head(manifest)
    if head != prev or head != report.head_sha256:
        raise VerificationError("the manifest's head digest is not the last pulse's digest",
                                "chain.head_sha256")
    notes.insert(0, f"{report.pulses} pulse(s); hash chain and manifest agree; head {head}")
    return SiteCheck(site_dir=str(site), pulses=report.pulses, head_sha256=head,
                     signatures_checked=key is not None,
                     key_fingerprint=hashlib.sha256(key[0]).hexdigest() if key else None,
                     notes=tuple(notes))


def _get_head(manifest: Mapping[str, Any]) -> Any:
    chain = manifest.get("chain")
    return chain.get("head_sha256") if isinstance(chain, Mapping) else None
