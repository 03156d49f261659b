"""The log spec itself: its dataclasses, loading and validating the TOML, implicit specs.

Part of :mod:`dicert.logspec` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import hashlib
import os
import re
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from dicert.errors import LogFormatError


SPEC_FORMAT = "dicert-logspec/1"
SPEC_MAX_BYTES = 1 << 20
DATA_FORMATS = ("csv", "parquet", "hdf5")
_DELIMITERS = {",": ",", "comma": ",", "\t": "\t", "tab": "\t", ";": ";", "semicolon": ";",
               "|": "|", "pipe": "|", " ": " ", "space": " "}
_DELIM_NAMES = {",": "comma", "\t": "tab", ";": "semicolon", "|": "pipe", " ": "space"}
_SPEC_RE = re.compile(rb"""^\s*format\s*=\s*["']dicert-logspec/""", re.MULTILINE)
_ROLES_TABLE = ("x", "y", "a", "b", "t")
_ROLES_STATION = ("setting", "outcome", "test")
_FORMATS_EXTRA = "formats"
_DEFAULT_MAP = {"0": 0, "1": 1}
#: Most rows of one station held at once by the join (memory: about 2 x 10 bytes per row).
STATION_CHUNK_ROWS = 1 << 19


# --------------------------------------------------------------------------------------------
# The spec
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class SourceSpec:
    """One table source: a combined table, or one station's files.

    ``columns`` maps a role (``x, y, a, b, t`` for a table; ``key, setting, outcome, test``
    for a station) to a column (CSV header name, Parquet column, HDF5 dataset); ``values``
    maps a role to its value map (token -> 0/1).
    """

    label: str  # "table", "station A", "station B"
    key_prefix: str  # "table", "stations.A", ...: spec keys in error messages
    files: tuple[Path, ...]
    format: str
    delimiter: str
    group: str
    columns: Mapping[str, str]
    values: Mapping[str, Mapping[str, int]]


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LogSpec:
    """A validated log spec (see the module docstring)."""

    path: Path
    text: str
    sha256: str
    layout: str  # "table" | "stations"
    sources: tuple[SourceSpec, ...]
    max_missing: int = 0
    #: ``[join] keys``: "consecutive" (the keys are consecutive integers, so a trial missing at
    #: both stations is a visible gap) or None (undeclared: such a trial stays invisible).
    keys: str | None = None
    #: ``[join] first_key`` / ``last_key`` (with keys = "consecutive"): the declared range of
    #: the run's keys, so gaps before the first / after the last key seen are visible too.
    first_key: int | None = None
    last_key: int | None = None

    @property
    def has_test_flag(self) -> bool:
        return any("t" in s.columns or "test" in s.columns for s in self.sources)


def is_spec_file(source: Any) -> bool:
    """Whether ``source`` names a log spec (a small file whose ``format`` key says so)."""
    if not isinstance(source, (str, os.PathLike)):
        return False
    p = Path(source)
    try:
        if not p.is_file():
            return False
        with open(p, "rb") as fh:
            head = fh.read(4096)
    except OSError:
        return False
    return bool(_SPEC_RE.search(head))


def _err(path: Path, key: str, problem: str) -> LogFormatError:
    return LogFormatError(path, f"key {key!r}", problem)


def load_spec(path: str | os.PathLike[str]) -> LogSpec:
    """Read and validate a log spec; errors name the file and the key."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            raw = fh.read(SPEC_MAX_BYTES + 1)
    except FileNotFoundError:
        raise LogFormatError(path, "", "no such file") from None
    except OSError as exc:
        raise LogFormatError(path, "", f"cannot read: {exc.strerror or exc}") from None
    if len(raw) > SPEC_MAX_BYTES:
        raise LogFormatError(path, "", f"a log spec is at most {SPEC_MAX_BYTES} bytes")
    try:
        text = raw.decode("utf-8")
        doc = tomllib.loads(text)
    except UnicodeDecodeError:
        raise LogFormatError(path, "", "a log spec must be UTF-8 text") from None
    except tomllib.TOMLDecodeError as exc:
        raise LogFormatError(path, "", f"not valid TOML ({exc})") from None
    fmt = doc.get("format")
    if fmt != SPEC_FORMAT:
        raise _err(path, "format", f"expected {SPEC_FORMAT!r}, got {fmt!r}")
    known = {"format", "description", "table", "stations", "join"}
    for k in doc:
        if k not in known:
            raise _err(path, k, f"unknown key (known: {', '.join(sorted(known))})")
    if not isinstance(doc.get("description", ""), str):
        raise _err(path, "description", "expected a string")
    base = path.parent
    has_table, has_st = "table" in doc, "stations" in doc
    if has_table == has_st:
        raise _err(path, "table" if has_table else "stations",
                   "give exactly one of [table] (one combined table) or [stations.A] and "
                   "[stations.B] (one file set per station, joined by a trial key)")
    max_missing = 0
    keys = first_key = last_key = None
    if has_table:
        if "join" in doc:
            raise _err(path, "join", "only a two-station spec is joined ([stations.A], "
                       "[stations.B])")
        sources = (_source(path, base, doc["table"], "table", "table", _ROLES_TABLE,
                           ("x", "y", "a", "b")),)
        layout = "table"
    else:
        st = doc["stations"]
        if not isinstance(st, dict) or set(st) != {"A", "B"}:
            raise _err(path, "stations", "expected exactly the tables [stations.A] and "
                       "[stations.B]")
        sources = tuple(_source(path, base, st[n], f"station {n}", f"stations.{n}",
                                ("key",) + _ROLES_STATION, ("key", "setting", "outcome"))
                        for n in ("A", "B"))
        join = doc.get("join", {})
        if not isinstance(join, dict):
            raise _err(path, "join", "expected a table")
        for k in join:
            if k not in JOIN_KEYS:
                raise _err(path, f"join.{k}", f"unknown key (known: {', '.join(JOIN_KEYS)})")
        mm = join.get("max_missing", 0)
        if isinstance(mm, bool) or not isinstance(mm, int) or mm < 0:
            raise _err(path, "join.max_missing", f"expected a non-negative integer, got {mm!r}")
        max_missing = mm
        keys, first_key, last_key = join_key_declaration(join, lambda k, m: _err(path, k, m))
        layout = "stations"
    return LogSpec(path=path, text=text, sha256=hashlib.sha256(raw).hexdigest(), layout=layout,
                   sources=sources, max_missing=max_missing, keys=keys, first_key=first_key,
                   last_key=last_key)


#: The keys of a spec's ``[join]`` table.
JOIN_KEYS = ("max_missing", "keys", "first_key", "last_key")
#: The values of ``[join] keys``.
KEY_DECLARATIONS = ("consecutive",)


def join_key_declaration(join: Mapping, err) -> tuple[str | None, int | None, int | None]:
    """``(keys, first_key, last_key)`` of a spec's ``[join]`` table (``err(key, problem)``
    builds the exception for a bad value): keys = "consecutive" declares the join keys to be
    consecutive integers, optionally from ``first_key`` to ``last_key``."""
    keys = join.get("keys")
    if keys is not None and keys not in KEY_DECLARATIONS:
        raise err("join.keys", f"expected \"consecutive\" (the trial keys are consecutive "
                  f"integers), got {keys!r}")
    bounds = []
    for k in ("first_key", "last_key"):
        v = join.get(k)
        if v is not None:
            if keys is None:
                raise err(f"join.{k}", "only with keys = \"consecutive\" (a key range "
                          "declares where gaps are looked for)")
            if isinstance(v, bool) or not isinstance(v, int) or not 0 <= v < 10**18:
                raise err(f"join.{k}", f"expected a non-negative integer below 10^18, got {v!r}")
        bounds.append(v)
    if None not in bounds and bounds[1] < bounds[0]:
        raise err("join.last_key", f"{bounds[1]} is below join.first_key = {bounds[0]}")
    return keys, bounds[0], bounds[1]


def _source(path: Path, base: Path, tab: Any, label: str, prefix: str, roles: tuple,
            required: tuple) -> SourceSpec:
    if not isinstance(tab, dict):
        raise _err(path, prefix, "expected a table")
    known = {"files", "format", "delimiter", "group", "values"} | set(roles)
    if label == "table":
        known.add("columns")
    for k in tab:
        if k not in known:
            raise _err(path, f"{prefix}.{k}", f"unknown key (known: {', '.join(sorted(known))})")
    files = tab.get("files")
    if isinstance(files, str):
        files = [files]
    if not isinstance(files, list) or not files or not all(isinstance(f, str) and f for f in files):
        raise _err(path, f"{prefix}.files", "expected a file name or a non-empty list of file "
                   "names (relative to the spec's directory)")
    paths = tuple((base / f) if not os.path.isabs(f) else Path(f) for f in files)
    fmt = tab.get("format")
    if fmt is None:
        fmts = {_format_from_ext(p) for p in paths}
        if None in fmts or len(fmts) != 1:
            raise _err(path, f"{prefix}.format", "cannot tell the format of every file from "
                       "its extension (.csv, .tsv, .txt, .parquet, .h5, .hdf5); give "
                       "format = \"csv\", \"parquet\" or \"hdf5\"")
        fmt = fmts.pop()
    if fmt not in DATA_FORMATS:
        raise _err(path, f"{prefix}.format", f"expected one of {', '.join(DATA_FORMATS)}, "
                   f"got {fmt!r}")
    delim = tab.get("delimiter", "\t" if all(str(p).lower().endswith((".tsv", ".tsv.gz"))
                                             for p in paths) else ",")
    if not isinstance(delim, str) or delim.lower() not in _DELIMITERS:
        raise _err(path, f"{prefix}.delimiter", "expected \",\", \"\\t\", \";\", \"|\", \" \" "
                   f"(or comma, tab, semicolon, pipe, space), got {delim!r}")
    delim = _DELIMITERS[delim.lower()]
    if "delimiter" in tab and fmt != "csv":
        raise _err(path, f"{prefix}.delimiter", f"only csv files have a delimiter (format is "
                   f"{fmt})")
    group = tab.get("group", "/")
    if not isinstance(group, str):
        raise _err(path, f"{prefix}.group", "expected an HDF5 group path")
    if "group" in tab and fmt != "hdf5":
        raise _err(path, f"{prefix}.group", f"only hdf5 files have groups (format is {fmt})")
    columns = _source_columns(path, tab, label, prefix, roles, required)
    values = _source_values(path, tab, prefix, columns)
    for r in columns:
        if r != "key" and r not in values:
            values[r] = dict(_DEFAULT_MAP)
    return SourceSpec(label=label, key_prefix=prefix, files=paths, format=fmt, delimiter=delim,
                      group=group, columns=columns, values=values)


def _source_columns(path: Path, tab: dict, label: str, prefix: str, roles: tuple,
                    required: tuple) -> dict[str, Any]:
    """The column of each role of one source (``columns`` of a table, keys of a station)."""
    if label == "table":
        cols = tab.get("columns", {})
        cols_key = f"{prefix}.columns"
        if not isinstance(cols, dict):
            raise _err(path, cols_key, "expected a table of role = \"column name\"")
        for k in cols:
            if k not in roles:
                raise _err(path, f"{cols_key}.{k}", f"unknown role (known: {', '.join(roles)})")
        columns = {r: cols.get(r, r) for r in required}
        if "t" in cols:
            columns["t"] = cols["t"]
    else:
        cols_key = prefix
        columns = {}
        for r in roles:
            if r in tab:
                columns[r] = tab[r]
            elif r in required:
                raise _err(path, f"{prefix}.{r}", "missing: name the column that holds the "
                           + {"key": "trial index (sync pulse number)", "setting": "setting",
                              "outcome": "outcome"}[r])
    for r, c in columns.items():
        if not isinstance(c, str) or not c.strip():
            raise _err(path, f"{cols_key}.{r}", f"expected a column name, got {c!r}")
    return columns


def _source_values(path: Path, tab: dict, prefix: str, columns: dict[str, Any]
                   ) -> dict[str, dict[str, int]]:
    """The value maps given for one source's roles (``values``)."""
    vals = tab.get("values", {})
    if not isinstance(vals, dict):
        raise _err(path, f"{prefix}.values", "expected a table of role = {value = bit, ...}")
    values: dict[str, dict[str, int]] = {}
    for r, m in vals.items():
        vkey = f"{prefix}.values.{r}"
        if r not in columns or r == "key":
            raise _err(path, vkey, f"no such value role (this source maps: "
                       f"{', '.join(c for c in columns if c != 'key')})")
        if not isinstance(m, dict) or not m:
            raise _err(path, vkey, "expected a table such as {\"+1\" = 0, \"-1\" = 1}")
        out: dict[str, int] = {}
        for tok, bit in m.items():
            t = tok.strip().strip('"').strip()
            if not t:
                raise _err(path, vkey, "an empty value cannot be mapped")
            if isinstance(bit, bool) or bit not in (0, 1):
                raise _err(path, f"{vkey}.{tok}", f"maps to {bit!r}; every value must map to "
                           "0 or 1")
            if t in out:
                raise _err(path, f"{vkey}.{tok}", "appears twice")
            out[t] = int(bit)
        values[r] = out
    return values


def _format_from_ext(p: Path) -> str | None:
    n = str(p).lower()
    if n.endswith((".csv", ".csv.gz", ".tsv", ".tsv.gz", ".txt", ".txt.gz", ".dat")):
        return "csv"
    if n.endswith((".parquet", ".pq")):
        return "parquet"
    if n.endswith((".h5", ".hdf5", ".hdf")):
        return "hdf5"
    return None
