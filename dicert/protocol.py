"""Protocol files: everything a certification fixes BEFORE any data is seen.

A protocol is a TOML file (see ``protocols/README.md`` for the full reference). It names the
Bell test, the settings distribution, which outcomes are harvested as raw randomness, the
finite-size analysis method with its pre-declared acceptance threshold and error parameters,
and the extractor with its output-length rule. The SHA-256 of the file's bytes goes into every
audit record, so a certificate can be tied to the exact rules it was computed under.

Layout (all tables required unless marked optional)::

    format = "dicert-protocol/1"      # optional; the only version so far
    name = "chsh-uniform"
    description = "..."               # optional, free text

    [bell]
    kind = "chsh"                     # or "coefficients" (+ coefficients = [16 numbers])

    [settings]
    gamma = 1.0                       # test-round probability; 1 = every round a test round
    generation = [0, 0]               # settings (x, y) of generation rounds

    [harvest]
    parties = "AB"                    # "A" or "AB"
    select = "all"                    # "all" or "generation" (the harvest selection)

    [analysis]
    method = "martingale"             # "martingale" | "eat" | "pef"
    ...                               # method keys, validated by dicert.finite

    [extractor]
    kind = "toeplitz"
    eps_ext = 1e-8
    output_rule = "lhl-conservative"

    [design]                          # optional: design-conformance checks (dicert.design)
    significance = 1e-9               # of every check
    trials = 1000000                  # optional pre-declared number of trials n
    block_trials = 1048576            # block size of the per-block checks

Errors are :class:`~dicert.errors.ProtocolError` with one line naming the file and the key.
Keys of earlier versions (:data:`RENAMED_KEYS`: ``[harvest] rounds``, ``[analysis] rounds``) are
refused with one line naming the file, the old key and the new one.
"""

from __future__ import annotations

import dataclasses
import hashlib
import math
import os
from collections.abc import Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

from dicert._display import displayed
from dicert.errors import ProtocolError

if TYPE_CHECKING:
    from dicert.design import DesignSpec
    from dicert.estimate import SettingsDesign
    from dicert.finite.params import EatParams, MartingaleParams
    from dicert.finite.pef import PefParams

PROTOCOL_FORMAT = "dicert-protocol/1"

BELL_KINDS = ("chsh", "coefficients")
PARTIES = ("A", "AB")
SELECTIONS = ("all", "generation")
#: Protocol keys of earlier versions -> (their new key, how to move). A protocol holding one
#: is refused with one line naming the file, the old key and the new key (never silently read:
#: the two old ``rounds`` keys meant different things).
RENAMED_KEYS = {
    "harvest.rounds": ("harvest.select",
                       "rename it: [harvest] select = \"all\" or \"generation\""),
    "analysis.rounds": ("design.trials",
                        "declare the number of trials as [design] trials = N"),
}
METHODS = ("martingale", "eat", "pef")
EXTRACTOR_KINDS = ("toeplitz",)
OUTPUT_RULES = ("lhl-conservative",)

_TOP_KEYS = ("format", "name", "description", "bell", "settings", "harvest", "analysis", "extractor",
             "design")

#: Largest integer a protocol may hold: records are I-JSON (RFC 7493 section 2.2), whose safe
#: integers are those within +-(2**53 - 1); a larger count would fail only when the record is
#: written, after the whole certification.
MAX_INTEGER = 2**53 - 1
#: Smallest error parameter (every key named eps_*, and extractor.eps_ext) and smallest
#: settings.gamma accepted. Below about 1e-154 a squared epsilon (g(eps_s) of entropy
#: accumulation) or 8/gamma-type terms leave double precision and the formulas divide by zero;
#: 1e-100 (about 2**-332) keeps a wide margin and is far below any useful security parameter.
MIN_EPSILON = 1e-100
MIN_GAMMA = 1e-100


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class BellTest:
    """The Bell functional tested.

    ``coefficients`` (only for kind "coefficients") are 16 numbers c[x][y][a][b] over
    p(ab|xy), flattened in the order x, y, a, b (index 8x + 4y + 2a + b).
    """

    kind: str
    coefficients: tuple[float, ...] | None = None


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Harvest:
    """Which outcomes become raw randomness: parties "A" or "AB"; the harvest selection
    ``select`` "all" (every trial) or "generation" (trials with t = 0)."""

    parties: str
    select: str

    @property
    def bits_per_trial(self) -> int:
        return len(self.parties)

    @property
    def rounds(self) -> str:
        """Deprecated name of :attr:`select` (the harvest selection)."""
        return self.select


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class ExtractorSpec:
    """Extractor family, its error ``eps_ext`` and the output-length rule."""

    kind: str
    eps_ext: float
    output_rule: str


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class Protocol:
    """A validated protocol file. ``sha256`` is over the file's bytes; ``text`` is its content."""

    name: str
    path: str
    sha256: str
    text: str
    bell: BellTest
    design: SettingsDesign
    harvest: Harvest
    method: str
    analysis: MartingaleParams | EatParams | PefParams  # the method's parameters
    extractor: ExtractorSpec
    description: str = ""
    conformance: DesignSpec | None = None  # the optional [design] table

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("name", self.name), ("method", self.method), ("gamma", self.gamma),
                ("harvest", f"{self.harvest.parties}/{self.harvest.select}"),
                ("eps_ext", self.extractor.eps_ext)]
        if full:
            rows += [("bell", self.bell.kind), ("extractor", self.extractor.kind),
                     ("path", self.path), ("sha256", self.sha256),
                     ("description", self.description)]
        return rows

    @property
    def gamma(self) -> float:
        return float(self.design.gamma)


# --------------------------------------------------------------------------- helpers


class _Ctx:
    """Builds error messages naming the source and the key."""

    def __init__(self, source: str) -> None:
        self.source = source

    def fail(self, key: str, problem: str) -> ProtocolError:
        return ProtocolError(f"{self.source}: key '{key}': {problem}")

    def table(self, d: Mapping[str, Any], key: str) -> Mapping[str, Any]:
        if key not in d:
            raise self.fail(key, f"missing table [{key}]")
        val = d[key]
        if not isinstance(val, Mapping):
            raise self.fail(key, f"expected a table [{key}], got {_kind(val)}")
        return val

    def choice(self, d: Mapping[str, Any], table: str, key: str, options: tuple[str, ...],
               default: str | None = None) -> str:
        full = f"{table}.{key}"
        if key not in d:
            if default is not None:
                return default
            raise self.fail(full, f"missing; expected one of {', '.join(repr(o) for o in options)}")
        val = d[key]
        if not isinstance(val, str) or val not in options:
            raise self.fail(full, f"got {val!r}; expected one of {', '.join(repr(o) for o in options)}")
        return val

    def number(self, d: Mapping[str, Any], table: str, key: str, *, lo: float, hi: float,
               lo_open: bool = False, hi_open: bool = False, default: float | None = None) -> float:
        full = f"{table}.{key}"
        if key not in d:
            if default is not None:
                return default
            raise self.fail(full, "missing; expected a number")
        val = d[key]
        if isinstance(val, bool) or not isinstance(val, (int, float)) or not math.isfinite(val):
            raise self.fail(full, f"expected a finite number, got {val!r}")
        val = float(val)
        ok_lo = val > lo if lo_open else val >= lo
        ok_hi = val < hi if hi_open else val <= hi
        if not (ok_lo and ok_hi):
            lb = "(" if lo_open else "["
            rb = ")" if hi_open else "]"
            raise self.fail(full, f"{val!r} is outside {lb}{lo:g}, {hi:g}{rb}")
        return val

    def no_extra(self, d: Mapping[str, Any], table: str | None, allowed: tuple[str, ...]) -> None:
        for k in d:
            if k not in allowed:
                full = k if table is None else f"{table}.{k}"
                raise self.fail(full, f"unknown key; allowed here: {', '.join(allowed)}")


def _kind(val: Any) -> str:
    return type(val).__name__


# --------------------------------------------------------------------------- parsing


def _parse_bell(ctx: _Ctx, d: Mapping[str, Any]) -> BellTest:
    t = ctx.table(d, "bell")
    ctx.no_extra(t, "bell", ("kind", "coefficients"))
    kind = ctx.choice(t, "bell", "kind", BELL_KINDS)
    if kind == "chsh":
        if "coefficients" in t:
            raise ctx.fail("bell.coefficients", "only allowed with kind = \"coefficients\"")
        return BellTest(kind="chsh", coefficients=None)
    coeffs = t.get("coefficients")
    if not isinstance(coeffs, list) or len(coeffs) != 16:
        raise ctx.fail("bell.coefficients", "expected a list of 16 numbers c[x][y][a][b] "
                       "(index 8x + 4y + 2a + b)")
    out = []
    for i, c in enumerate(coeffs):
        if isinstance(c, bool) or not isinstance(c, (int, float)) or not math.isfinite(c):
            raise ctx.fail(f"bell.coefficients[{i}]", f"expected a finite number, got {c!r}")
        out.append(float(c))
    return BellTest(kind="coefficients", coefficients=tuple(out))


def _parse_settings(ctx: _Ctx, d: Mapping[str, Any]):
    t = ctx.table(d, "settings")
    ctx.no_extra(t, "settings", ("gamma", "generation"))
    gamma = ctx.number(t, "settings", "gamma", lo=0.0, hi=1.0, lo_open=True)
    gen = t.get("generation", [0, 0])
    if (not isinstance(gen, list) or len(gen) != 2
            or any(isinstance(g, bool) or g not in (0, 1) for g in gen)):
        raise ctx.fail("settings.generation", f"expected [x, y] with x, y in {{0, 1}}, got {gen!r}")
    from dicert.estimate import SettingsDesign

    try:
        return SettingsDesign(gamma=gamma, generation=(int(gen[0]), int(gen[1])))
    except (ValueError, TypeError) as exc:  # their own validation, reported at our key
        raise ctx.fail("settings", " ".join(str(exc).split())) from None


def _parse_harvest(ctx: _Ctx, d: Mapping[str, Any]) -> Harvest:
    t = ctx.table(d, "harvest")
    ctx.no_extra(t, "harvest", ("parties", "select"))
    return Harvest(parties=ctx.choice(t, "harvest", "parties", PARTIES),
                   select=ctx.choice(t, "harvest", "select", SELECTIONS))


def _check_renamed(ctx: _Ctx, d: Mapping[str, Any]) -> None:
    """Refuse keys of earlier versions with one line naming the old and the new key."""
    for old, (new, how) in RENAMED_KEYS.items():
        table, key = old.split(".")
        t = d.get(table)
        if isinstance(t, Mapping) and key in t:
            raise ctx.fail(old, f"renamed to '{new}' (the two old 'rounds' keys meant different "
                           f"things); {how}")


def _parse_extractor(ctx: _Ctx, d: Mapping[str, Any]) -> ExtractorSpec:
    t = ctx.table(d, "extractor")
    ctx.no_extra(t, "extractor", ("kind", "eps_ext", "output_rule"))
    return ExtractorSpec(
        kind=ctx.choice(t, "extractor", "kind", EXTRACTOR_KINDS),
        eps_ext=ctx.number(t, "extractor", "eps_ext", lo=0.0, hi=1.0, lo_open=True, hi_open=True),
        output_rule=ctx.choice(t, "extractor", "output_rule", OUTPUT_RULES,
                               default="lhl-conservative"),
    )


def _params_class(method: str):
    if method == "martingale":
        from dicert.finite.params import MartingaleParams

        return MartingaleParams
    if method == "eat":
        from dicert.finite.params import EatParams

        return EatParams
    from dicert.finite.pef import PefParams

    return PefParams


def _parse_analysis(ctx: _Ctx, d: Mapping[str, Any]) -> tuple[str, Any]:
    t = ctx.table(d, "analysis")
    method = ctx.choice(t, "analysis", "method", METHODS)
    rest = {k: v for k, v in t.items() if k != "method"}
    try:
        cls = _params_class(method)
    except ImportError:
        raise ctx.fail("analysis.method",
                       f"method {method!r} is not available in this installation") from None
    # The finite-size engineers' parsers name the key; we prefix the file and table.
    try:
        params = cls.from_mapping(rest, f"{ctx.source}: [analysis]")
    except ProtocolError:
        raise
    except (ValueError, TypeError, KeyError) as exc:
        raise ctx.fail("analysis", " ".join(str(exc).split())) from None
    return method, params


def _cross_checks(ctx: _Ctx, *, bell: BellTest, design: Any, harvest: Harvest, method: str,
                  params: Any) -> None:
    gamma = float(design.gamma)
    if harvest.select == "generation" and gamma >= 1.0:
        raise ctx.fail("harvest.select", "\"generation\" needs settings.gamma < 1 "
                       "(with gamma = 1 every round is a test round)")
    if method in ("martingale", "eat") and bell.kind != "chsh":
        raise ctx.fail("bell.kind", f"method {method!r} supports only kind = \"chsh\"")
    if method in ("eat", "pef"):
        # Entropy accumulation bounds the register (A_i, B_i) of every round (raw output
        # A^n B^n; Arnon-Friedman, Renner & Vidick, SIAM J. Comput. 48, 181 (2019)); the
        # probability estimate bounds the pair (A_i, B_i) of every analysed trial (Knill,
        # Zhang & Bierhorst, Phys. Rev. Research 2, 033465 (2020)).
        which = "the outcomes of every round" if method == "eat" else "every analysed trial"
        if harvest.parties != "AB":
            raise ctx.fail("harvest.parties", f"method \"{method}\" bounds the pair of "
                           "outcomes; use parties = \"AB\"")
        if harvest.select != "all":
            raise ctx.fail("harvest.select", f"method \"{method}\" harvests {which}; "
                           "use select = \"all\"")
    if method == "martingale":
        single = getattr(params, "single_round", None)
        if single == "npa-AB" and harvest.parties != "AB":
            raise ctx.fail("harvest.parties", "single_round = \"npa-AB\" bounds the pair of "
                           "outcomes; use parties = \"AB\"")
    # Parameters that also carry gamma must agree with [settings].
    p_gamma = getattr(params, "gamma", None)
    if p_gamma is not None and not math.isclose(float(p_gamma), gamma, rel_tol=0, abs_tol=1e-15):
        raise ctx.fail("analysis.gamma", f"{p_gamma!r} disagrees with settings.gamma = {gamma!r}")


def _check_numeric_ranges(ctx: _Ctx, d: Mapping[str, Any]) -> None:
    """Ranges every formula downstream can handle, checked before any method parses its keys:
    integers within +-:data:`MAX_INTEGER`; error parameters and gamma at least
    :data:`MIN_EPSILON` / :data:`MIN_GAMMA` (when they are numbers at all; the type and the
    upper end are checked where each key is parsed)."""

    def walk(val: Any, key: str) -> None:
        if isinstance(val, Mapping):
            for k, v in val.items():
                walk(v, f"{key}.{k}" if key else str(k))
        elif isinstance(val, list):
            for i, v in enumerate(val):
                walk(v, f"{key}[{i}]")
        elif isinstance(val, int) and not isinstance(val, bool) and abs(val) > MAX_INTEGER:
            raise ctx.fail(key, f"{val} is too large; integers must lie within +-(2**53 - 1) "
                           "= +-9007199254740991 (records are I-JSON, RFC 7493 section 2.2)")

    walk(d, "")

    def floor(table: str, key: str, lo: float, what: str) -> None:
        t = d.get(table)
        val = t.get(key) if isinstance(t, Mapping) else None
        if (isinstance(val, (int, float)) and not isinstance(val, bool) and math.isfinite(val)
                and 0.0 < val < lo):
            raise ctx.fail(f"{table}.{key}", f"{val!r} is below {lo:g}, the smallest {what} "
                           "for which every formula stays finite in double precision")

    analysis = d.get("analysis")
    if isinstance(analysis, Mapping):
        for k in analysis:
            if isinstance(k, str) and k.startswith("eps_"):
                floor("analysis", k, MIN_EPSILON, "error parameter")
    floor("extractor", "eps_ext", MIN_EPSILON, "error parameter")
    floor("settings", "gamma", MIN_GAMMA, "test-round probability")


def protocol_from_dict(d: Mapping[str, Any], source: str = "<dict>", *, text: str | None = None,
                       sha256: str | None = None, path: str | None = None,
                       legacy_keys: bool = False) -> Protocol:
    """Validate a protocol given as a mapping (the parsed TOML).

    Parameters
    ----------
    d : mapping
        The protocol tables, as :func:`tomllib.loads` returns them.
    source : str
        Name used in error messages (a file name, or ``"<dict>"``).
    text, sha256, path : optional
        The file content, its digest and path, when loading from a file. For a plain
        mapping, ``text`` defaults to a canonical JSON rendering and ``sha256`` to its digest.
    legacy_keys : bool
        Read the keys of earlier versions (:data:`RENAMED_KEYS`) as they were read then. Only
        for protocols recorded in audit records of earlier formats (verify, report); a
        protocol file given to certify or plan never is.

    Raises
    ------
    ProtocolError
        One line naming ``source`` and the offending key.
    """
    ctx = _Ctx(source)
    if not isinstance(d, Mapping):
        raise ProtocolError(f"{source}: expected a table of protocol keys, got {_kind(d)}")
    ctx.no_extra(d, None, _TOP_KEYS)
    if legacy_keys:
        d = _legacy_tables(ctx, d)
    else:
        _check_renamed(ctx, d)
    _check_numeric_ranges(ctx, d)
    fmt = d.get("format", PROTOCOL_FORMAT)
    if fmt != PROTOCOL_FORMAT:
        raise ctx.fail("format", f"got {fmt!r}; this version reads {PROTOCOL_FORMAT!r}")
    name = d.get("name")
    if not isinstance(name, str) or not name.strip():
        raise ctx.fail("name", "missing or empty; expected a short name string")
    desc = d.get("description", "")
    if not isinstance(desc, str):
        raise ctx.fail("description", "expected a string")
    bell = _parse_bell(ctx, d)
    design = _parse_settings(ctx, d)
    harvest = _parse_harvest(ctx, d)
    method, params = _parse_analysis(ctx, d)
    extractor = _parse_extractor(ctx, d)
    _cross_checks(ctx, bell=bell, design=design, harvest=harvest, method=method, params=params)
    conformance = _parse_design(ctx, d, params)
    if text is None:
        import json

        text = json.dumps(_plain(d), sort_keys=True, separators=(",", ":"))
    if sha256 is None:
        sha256 = hashlib.sha256(text.encode("utf-8")).hexdigest()
    return Protocol(name=name.strip(), path=path or source, sha256=sha256, text=text, bell=bell,
                    design=design, harvest=harvest, method=method, analysis=params,
                    extractor=extractor, description=desc, conformance=conformance)


def _legacy_tables(ctx: _Ctx, d: Mapping[str, Any]) -> dict:
    """The tables of an earlier version's protocol under today's keys: ``[harvest] rounds``
    was the harvest selection; ``[analysis] rounds`` (entropy accumulation) the declared
    trials, which had to agree with ``[design] trials`` when both were given."""
    out = {k: (dict(v) if isinstance(v, Mapping) else v) for k, v in d.items()}
    harvest = out.get("harvest")
    if isinstance(harvest, dict) and "rounds" in harvest and "select" not in harvest:
        harvest["select"] = harvest.pop("rounds")
    analysis, design = out.get("analysis"), out.get("design")
    n_old = analysis.get("rounds") if isinstance(analysis, dict) else None
    n_new = design.get("trials") if isinstance(design, dict) else None
    if isinstance(n_old, int) and isinstance(n_new, int) and n_old != n_new:
        raise ctx.fail("design.trials", f"{n_new} disagrees with analysis.rounds = {n_old}")
    return out


def _parse_design(ctx: _Ctx, d: Mapping[str, Any], params: Any):
    """The optional [design] table (significance of the conformance checks, declared n)."""
    from dicert.design import DesignSpec

    return DesignSpec.from_mapping(d.get("design", {}), ctx.source)


def _plain(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    if hasattr(obj, "isoformat"):
        return obj.isoformat()
    return obj


def _toml_problem(text: str, exc: Exception) -> str:
    """tomllib's message, with the key named when a key or table is given twice (tomllib
    says only "Cannot overwrite a value (at line L, column C)")."""
    import re

    msg = " ".join(str(exc).split())
    m = re.search(r"at line (\d+)", msg)
    if m is None or not msg.startswith(("Cannot overwrite a value", "Cannot declare")):
        return msg
    lineno = int(m.group(1))
    lines = text.splitlines()
    if not 1 <= lineno <= len(lines):
        return msg
    line = lines[lineno - 1].strip()
    header = re.match(r"^\[\[?\s*([^\]]+?)\s*\]\]?", line)
    if header:
        return f"table [{header.group(1)}] is declared twice (line {lineno})"
    if "=" not in line:
        return msg
    key = line.split("=", 1)[0].strip().replace('"', "").replace("'", "")
    table = ""
    for prev in reversed(lines[: lineno - 1]):
        h = re.match(r"^\s*\[\[?\s*([^\]]+?)\s*\]\]?", prev)
        if h:
            table = h.group(1).replace('"', "").replace("'", "") + "."
            break
    return f"key '{table}{key}' is given twice, or conflicts with an earlier key (line {lineno})"


def protocol_from_bytes(data: bytes, source: str = "<bytes>", *, path: str | None = None,
                        legacy_keys: bool = False) -> Protocol:
    """Parse and validate protocol file bytes; ``sha256`` is over ``data``.

    The bytes are UTF-8 TOML, or (for protocols built in code by :func:`protocol_from_dict`)
    a JSON object of the same tables.
    """
    import tomllib

    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ProtocolError(f"{source}: not UTF-8 text (byte offset {exc.start})") from None
    if text.lstrip().startswith("{"):
        # Protocols built in code (protocol_from_dict) are recorded as canonical JSON of the
        # same tables; read that form back too.
        import json

        try:
            d = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ProtocolError(f"{source}: invalid JSON protocol: {exc}") from None
        return protocol_from_dict(d, source, text=text, sha256=hashlib.sha256(data).hexdigest(),
                                  path=path or source, legacy_keys=legacy_keys)
    try:
        d = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise ProtocolError(f"{source}: invalid TOML: {_toml_problem(text, exc)}") from None
    return protocol_from_dict(d, source, text=text, sha256=hashlib.sha256(data).hexdigest(),
                              path=path or source, legacy_keys=legacy_keys)


def load_protocol(path: str | os.PathLike[str] | Mapping[str, Any] | Protocol) -> Protocol:
    """Read and validate a protocol file.

    ``path`` may also be a mapping of the protocol's tables (validated by
    :func:`protocol_from_dict`, with the same messages as for a file) or a :class:`Protocol`
    (returned as is), so library callers can pass whichever they hold.

    Raises
    ------
    ProtocolError
        If the file is missing, not TOML, or any key is missing or invalid; the message
        names the file and the key.
    """
    from dicert._io import read_user_file

    if isinstance(path, Protocol):
        return path
    if isinstance(path, Mapping):
        return protocol_from_dict(path)
    p = _shipped_fallback(Path(path))
    data = read_user_file(p, "protocol file (.toml)", ProtocolError, max_bytes=1 << 20)
    return protocol_from_bytes(data, str(p), path=str(p))


#: Package copy of the top-level ``protocols/`` folder (every file; a test keeps them identical).
SHIPPED_DIR = Path(__file__).parent / "data" / "protocols"


def shipped_protocol_names() -> tuple[str, ...]:
    """Names of the protocols shipped inside the package, sorted (``dicert protocols``)."""
    return tuple(sorted(p.stem for p in SHIPPED_DIR.glob("*.toml")))


def shipped_protocol_path(name: str) -> Path:
    """Path of a protocol shipped inside the package data (``dicert/data/protocols``).

    ``name`` is the file stem (``"chsh-spotcheck"``) or the file name (``"chsh-spotcheck.toml"``).
    The path need not exist; :func:`shipped_protocol_names` lists the ones that do.
    """
    stem = name[:-5] if name.endswith(".toml") else name
    return SHIPPED_DIR / f"{stem}.toml"


def _shipped_fallback(p: Path) -> Path:
    """``p`` itself if it exists or is not a bare name; else the shipped protocol of that name.

    Lets ``--protocol chsh-spotcheck`` work from a plain install: a path that exists always
    wins, so a user's edited copy in the working directory is never shadowed.
    """
    text = str(p)
    if p.exists() or "/" in text or os.sep in text or (os.altsep and os.altsep in text):
        return p
    cand = shipped_protocol_path(text)
    return cand if cand.is_file() else p


__all__ = [
    "PROTOCOL_FORMAT",
    "BellTest",
    "ExtractorSpec",
    "Harvest",
    "Protocol",
    "load_protocol",
    "protocol_from_bytes",
    "protocol_from_dict",
    "shipped_protocol_names",
    "shipped_protocol_path",
]
