"""A cache of plan results, so that ``dicert plan`` answers in well under 2 s when asked again.

A plan costs seconds (PEF solves, the entropy-accumulation optimisation over many n and gamma).
Its result depends only on the protocol text, the options and the code that computes it, so
``dicert plan`` keeps results keyed by the SHA-256 of: the protocol text, the options, the
dicert version and a fingerprint of every module and data table the planner reads (any change
to the numerics gives new keys; stale entries are simply never read).

Where: ``$DICERT_CACHE_DIR``, else ``$XDG_CACHE_HOME/dicert``, else ``~/.cache/dicert``
(``plan/<key>.json``, written atomically; ``DICERT_CACHE_DIR=off`` or ``--no-cache`` turns it
off). The package also ships entries for the shipped protocols at their defaults (and the
README's example), precomputed by ``python -m dicert.plan_cache``, so a first ``dicert plan
--protocol chsh-spotcheck`` is fast too. The library's :func:`dicert.planning.plan` never caches.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import os
from pathlib import Path
from typing import Any

_PKG = Path(__file__).resolve().parent
#: Sources whose change must invalidate every cached plan (relative to the package).
_FINGERPRINT_GLOBS = ("planning.py", "plan_models.py", "protocol.py", "extract.py",
                      "_extract_sizing.py", "estimate.py", "simulate.py", "simulate/**/*.py",
                      "finite/**/*.py", "entropy/**/*.py", "data/*.json")
SHIPPED_CACHE = _PKG / "data" / "plan_cache"
#: (protocol, options) of the shipped entries: each shipped protocol at its defaults, and the
#: README's example.
SHIPPED_CASES: tuple[tuple[str, dict[str, Any]], ...] = (
    ("chsh-uniform", {}),
    ("chsh-spotcheck", {}),
    ("chsh-spotcheck", {"win_probability": 0.84}),
    ("chsh-spotcheck-pair", {}),
    ("ch-photonic", {}),
)
_PLAN_ARGS = ("chsh", "win_probability", "visibility", "trials", "gamma", "eps_comp")


def code_fingerprint() -> str:
    """SHA-256 over the planner's sources and data tables (names and bytes)."""
    from dicert import __version__

    h = hashlib.sha256(f"dicert {__version__}\n".encode())
    files = sorted({p for g in _FINGERPRINT_GLOBS for p in _PKG.glob(g) if p.is_file()})
    for p in files:
        h.update(p.relative_to(_PKG).as_posix().encode() + b"\0")
        h.update(hashlib.sha256(p.read_bytes()).digest())
    return h.hexdigest()


def plan_key(protocol: Any, options: dict[str, Any], fingerprint: str | None = None) -> str:
    """Cache key of a plan: protocol text (and the error overrides), options, code fingerprint."""
    opts = {k: options.get(k) for k in _PLAN_ARGS}
    overrides = {k: v for k, v in sorted((options.get("overrides") or {}).items())
                 if v is not None}
    doc = {"protocol_sha256": hashlib.sha256(protocol.text.encode()).hexdigest(),
           "overrides": overrides, "options": opts,
           "code": fingerprint or code_fingerprint()}
    return hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()


def _user_dir() -> Path | None:
    env = os.environ.get("DICERT_CACHE_DIR")
    if env is not None:
        return None if env.strip().lower() in ("", "off", "0", "none") else Path(env) / "plan"
    base = os.environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return Path(base) / "dicert" / "plan"


# -- (de)serialisation that keeps tuples, ints, inf and nan exactly ---------------------------

def _classes() -> dict[str, type]:
    from dicert.plan_models import PefPlanDetails
    from dicert.planning import PlanMethod, PlanResult

    return {c.__name__: c for c in (PlanResult, PlanMethod, PefPlanDetails)}


def _enc(obj: Any) -> Any:
    import numpy as np

    if dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        return {"__dc__": type(obj).__name__,
                **{f.name: _enc(getattr(obj, f.name)) for f in dataclasses.fields(obj)}}
    if isinstance(obj, tuple):
        return {"__t__": [_enc(v) for v in obj]}
    if isinstance(obj, list):
        return [_enc(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): _enc(v) for k, v in obj.items()}
    if isinstance(obj, np.generic):
        return obj.item()
    if obj is None or isinstance(obj, (bool, int, float, str)):
        return obj
    raise TypeError(f"cannot cache a {type(obj).__name__}")


def _dec(obj: Any, classes: dict[str, type]) -> Any:
    if isinstance(obj, dict):
        if "__t__" in obj:
            return tuple(_dec(v, classes) for v in obj["__t__"])
        if "__dc__" in obj:
            cls = classes[obj["__dc__"]]
            return cls(**{k: _dec(v, classes) for k, v in obj.items() if k != "__dc__"})
        return {k: _dec(v, classes) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_dec(v, classes) for v in obj]
    return obj


def dumps(result: Any) -> str:
    return json.dumps(_enc(result), sort_keys=True, allow_nan=True)


def loads(text: str) -> Any:
    return _dec(json.loads(text), _classes())


def _read(path: Path) -> Any | None:
    try:
        return loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError, TypeError, KeyError):
        return None  # a damaged or foreign entry is ignored and recomputed


def cached_plan(protocol: Any, *, overrides: dict[str, float | None] | None = None,
                use_cache: bool = True, **options: Any) -> Any:
    """:func:`dicert.planning.plan` of ``protocol`` with the error ``overrides`` applied
    (:func:`dicert.planning.with_error_parameters`), read from the cache when present."""
    from dicert.planning import plan, with_error_parameters

    proto = with_error_parameters(protocol, **(overrides or {}))
    if not use_cache or not protocol.text:
        return plan(proto, **options)
    key = plan_key(protocol, {**options, "overrides": overrides or {}})
    user = _user_dir()
    for d in (SHIPPED_CACHE, user):
        if d is not None and (d / f"{key}.json").is_file():
            hit = _read(d / f"{key}.json")
            if hit is not None:
                return hit
    result = plan(proto, **options)
    if user is not None:
        try:
            from dicert._io import atomic_write_bytes

            user.mkdir(parents=True, exist_ok=True)
            atomic_write_bytes(user / f"{key}.json", dumps(result).encode())
        except OSError:
            pass  # a cache that cannot be written only costs time
    return result


def regenerate_shipped() -> list[Path]:
    """Recompute the shipped entries (after a change to the planner's numerics)."""
    from dicert._io import atomic_write_bytes
    from dicert.planning import plan
    from dicert.protocol import load_protocol

    SHIPPED_CACHE.mkdir(parents=True, exist_ok=True)
    for old in SHIPPED_CACHE.glob("*.json"):
        old.unlink()
    fp = code_fingerprint()
    out = []
    for name, opts in SHIPPED_CASES:
        proto = load_protocol(name)
        path = SHIPPED_CACHE / f"{plan_key(proto, opts, fp)}.json"
        atomic_write_bytes(path, dumps(plan(proto, **opts)).encode())
        out.append(path)
    return out


def shipped_keys_current() -> bool:
    """True when every shipped case has an entry for the current code (else only slower)."""
    from dicert.protocol import load_protocol

    fp = code_fingerprint()
    return all((SHIPPED_CACHE / f"{plan_key(load_protocol(n), o, fp)}.json").is_file()
               for n, o in SHIPPED_CASES)


if __name__ == "__main__":  # pragma: no cover - developer tool
    for p in regenerate_shipped():
        print(p)
