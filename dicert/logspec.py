"""Log specs: how to read a laboratory run that is not a clean ``x,y,a,b[,t]`` table.

A log spec is a small TOML file (format ``"dicert-logspec/1"``) that says where the trials of
a run are and how to read them: one combined table, or one file (or file set) per station
joined by a trial key; which column holds each setting, outcome and the optional test-round
flag; how the lab's values map to bits (``{"+1" = 0, "-1" = 1}``, ``{"1" = 0, "2" = 1}``,
``{"click" = 1, "none" = 0}``); the delimiter of text files; the file format (csv, parquet,
hdf5); and how many trials missing at one station are tolerated (default none).

:func:`open_spec_log` turns a spec into a :class:`SpecLog`, which offers the streaming
interface of :class:`dicert.logs.TrialLog` (``files``, ``formats``, ``has_test_flag``,
``iter_chunks``, ``file_infos``), so counting, hashing, the design checks, certify and verify
work unchanged. :func:`dicert.logs.open_log` recognises a spec given in place of a log by
its ``format`` key. The spec's content, its SHA-256 and the join report travel into the
record's ``log.spec`` section (:attr:`SpecLog.audit`).

Station join
------------
Each station's rows must be sorted by strictly increasing key (across its files, in the
order given). The join is a streaming merge over the two sorted streams, one chunk at a time:
memory stays at about two chunks whatever the length of the run. Unsorted input is refused at
the first key that is not larger than its predecessor (a duplicate or an out-of-order key),
naming the file and the key; sort the station files first (for CSV, for example,
``sort -t, -k1,1n``), which the record then covers as the bytes certified. A trial whose key
is present at only one station is *missing* at the other; by default that is an error
naming the file and the key, because silently dropping trials can bias the test (dropping
the losing trials certifies local devices). ``[join] max_missing = N`` tolerates up to N
such trials in all (dropped, and counted in the join report that the record carries).
"""

from __future__ import annotations

import dataclasses
import hashlib
import io
import os
import re
import tomllib
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert.errors import LogFormatError, ParameterError

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
            if k != "max_missing":
                raise _err(path, f"join.{k}", "unknown key (known: max_missing)")
        mm = join.get("max_missing", 0)
        if isinstance(mm, bool) or not isinstance(mm, int) or mm < 0:
            raise _err(path, "join.max_missing", f"expected a non-negative integer, got {mm!r}")
        max_missing = mm
        layout = "stations"
    return LogSpec(path=path, text=text, sha256=hashlib.sha256(raw).hexdigest(), layout=layout,
                   sources=sources, max_missing=max_missing)


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
    for r in columns:
        if r != "key" and r not in values:
            values[r] = dict(_DEFAULT_MAP)
    return SourceSpec(label=label, key_prefix=prefix, files=paths, format=fmt, delimiter=delim,
                      group=group, columns=columns, values=values)


def _format_from_ext(p: Path) -> str | None:
    n = str(p).lower()
    if n.endswith((".csv", ".csv.gz", ".tsv", ".tsv.gz", ".txt", ".txt.gz", ".dat")):
        return "csv"
    if n.endswith((".parquet", ".pq")):
        return "parquet"
    if n.endswith((".h5", ".hdf5", ".hdf")):
        return "hdf5"
    return None


def implicit_spec(path: str | os.PathLike[str], fmt: str | None = None) -> LogSpec:
    """The spec of a plain Parquet or HDF5 log holding columns ``x, y, a, b[, t]`` (0/1)."""
    path = Path(path)
    fmt = fmt or _format_from_ext(path)
    names = _column_names(path, fmt, "/")
    columns = {r: r for r in ("x", "y", "a", "b")}
    if "t" in names:
        columns["t"] = "t"
    src = SourceSpec(label="table", key_prefix="table", files=(path,), format=fmt,
                     delimiter=",", group="/", columns=columns,
                     values={r: dict(_DEFAULT_MAP) for r in columns})
    return LogSpec(path=path, text="", sha256="", layout="plain", sources=(src,))


# --------------------------------------------------------------------------------------------
# Readers of one file: chunks of {role: array}
# --------------------------------------------------------------------------------------------


def _need_extra(what: str, module: str):
    import importlib

    try:
        return importlib.import_module(module)
    except ImportError:
        raise ParameterError(f"reading {what} needs the optional extra: pip install "
                             f"'dicert[{_FORMATS_EXTRA}]'") from None


class _ValueMap:
    """A token -> bit map applied to text tokens (vectorised on packed bytes) or numbers."""

    def __init__(self, role: str, column: str, mapping: Mapping[str, int]) -> None:
        self.role, self.column, self.mapping = role, column, dict(mapping)
        packed = {}
        for tok, bit in mapping.items():
            b = tok.encode("utf-8")
            if len(b) <= 8:
                packed[int.from_bytes(b, "little")] = bit
        ks = np.array(sorted(packed), dtype=np.uint64)
        self.pkeys = ks
        self.pvals = np.array([packed[int(k)] for k in ks], dtype=np.uint8)
        self.numeric: dict[float, int] = {}
        for tok, bit in mapping.items():
            try:
                self.numeric[float(int(tok))] = bit
            except (ValueError, OverflowError):
                if tok.lower() in ("true", "false"):
                    self.numeric[1.0 if tok.lower() == "true" else 0.0] = bit
        nk = np.array(sorted(self.numeric), dtype=np.float64)
        self.nkeys, self.nvals = nk, np.array([self.numeric[k] for k in nk], dtype=np.uint8)

    def accepted(self) -> str:
        return ", ".join(repr(k) for k in self.mapping)

    def map_packed(self, packed: np.ndarray) -> np.ndarray | None:
        """Bits of packed tokens, or None if any token is not in the map."""
        if self.pkeys.size == 0:
            return None
        pos = np.searchsorted(self.pkeys, packed)
        pos = np.minimum(pos, self.pkeys.size - 1)
        if not np.array_equal(self.pkeys[pos], packed):
            return None
        return self.pvals[pos]

    def map_numbers(self, arr: np.ndarray, path: Path, row0: int) -> np.ndarray:
        arr = np.asarray(arr)
        if arr.dtype.kind in "biu" and arr.size:
            out = self._map_ints(arr)
            if out is not None:
                bad = out == 255
                if not bad.any():
                    return out
                i = int(np.argmax(bad))
                raise LogFormatError(path, f"row {row0 + i}", self.bad_value(arr[i].item()))
        vals = np.asarray(arr, dtype=np.float64)
        if self.nkeys.size:
            pos = np.minimum(np.searchsorted(self.nkeys, vals), self.nkeys.size - 1)
            ok = self.nkeys[pos] == vals
        else:
            pos = np.zeros(vals.size, np.int64)
            ok = np.zeros(vals.size, bool)
        if not ok.all():
            i = int(np.flatnonzero(~ok)[0])
            v = arr[i].item() if hasattr(arr[i], "item") else arr[i]
            raise LogFormatError(path, f"row {row0 + i}", self.bad_value(v))
        return self.nvals[pos]

    def _map_ints(self, arr: np.ndarray) -> np.ndarray | None:
        """Bits of integer values through a lookup table (255 = not in the map), or None when
        the values span too wide a range for a table."""
        ints = {int(k): b for k, b in self.numeric.items() if float(k).is_integer()}
        if arr.dtype.itemsize == 1:  # int8, uint8, bool: a 256-entry table on the raw byte
            lut = np.full(256, 255, np.uint8)
            signed = arr.dtype.kind == "i"
            for k, b in ints.items():
                if (-128 <= k <= 127) if signed else (0 <= k <= 255):
                    lut[k & 0xFF] = b
            return lut[arr.view(np.uint8)]
        lo, hi = int(arr.min()), int(arr.max())
        if hi - lo > 1 << 16:
            return None
        lut = np.full(hi - lo + 1, 255, np.uint8)
        for k, b in ints.items():
            if lo <= k <= hi:
                lut[k - lo] = b
        return lut[np.subtract(arr, lo, dtype=np.int64)]

    def map_strings(self, arr, path: Path, row0: int) -> np.ndarray:
        arr = np.asarray(arr)
        try:  # few distinct values: map each once, then index
            uniq, inv = np.unique(arr, return_inverse=True)
        except TypeError:  # mixed objects (e.g. None): the per-value path reports them
            uniq = None
        if uniq is not None and uniq.size <= 64:
            lut = np.empty(uniq.size, np.uint8)
            for j, v in enumerate(uniq):
                s = v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)
                bit = self.mapping.get(s.strip())
                if bit is None:
                    i = int(np.argmax(inv.ravel() == j))
                    raise LogFormatError(path, f"row {row0 + i}", self.bad_value(s))
                lut[j] = bit
            return lut[inv.ravel()]
        out = np.empty(len(arr), np.uint8)
        for i, v in enumerate(arr):
            s = v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)
            bit = self.mapping.get(s.strip())
            if bit is None:
                raise LogFormatError(path, f"row {row0 + i}", self.bad_value(s))
            out[i] = bit
        return out

    def bad_value(self, v: Any) -> str:
        return (f"column {self.column!r} ({self.role}) has value {str(v)[:20]!r}, which the "
                f"value map does not list (it accepts {self.accepted()})")


class _NoHash:
    def update(self, data) -> None:
        pass


class _CsvFile:
    """Streaming reader of one delimited text file, hashed as it is read."""

    def __init__(self, src: SourceSpec, path: Path, limits) -> None:
        self.src, self.path, self.limits = src, path, limits

    def chunks(self, chunk_trials: int, hasher) -> Iterator[dict[str, np.ndarray]]:
        from dicert import logs as L

        limits, path, src = self.limits, self.path, self.src
        max_line = limits.max_line_bytes
        delim = src.delimiter.encode()
        with L._open_checked(path) as raw0:
            counted = L._HashingReader(raw0, hasher if hasher is not None else _NoHash())
            raw = io.BufferedReader(counted, buffer_size=1 << 20)
            fh = L._maybe_gunzip(raw, path)
            gz = fh is not raw
            names, lineno = self._header(fh)
            idx = {}
            for role, col in src.columns.items():
                idx[role] = _find_column(names, col, role, src, path, lineno)
            maps = {r: _ValueMap(r, src.columns[r], m) for r, m in src.values.items()}
            ncol = len(names)
            carry = b""
            pend: list[dict[str, np.ndarray]] = []
            pend_n = 0
            inflated = 0
            block_bytes = max(1 << 22, min(max_line, 1 << 26))
            while True:
                try:
                    block = fh.read(block_bytes)
                except (OSError, EOFError, L.gzip.BadGzipFile, L.zlib.error) as exc:
                    raise LogFormatError(path, f"after line {lineno}",
                                         f"cannot decompress: {exc}") from None
                if gz and block:
                    inflated += len(block)
                    if (inflated > limits.ratio_grace_bytes and inflated
                            > limits.max_compression_ratio * max(counted.bytes_read, 1)):
                        raise LogFormatError(path, f"after line {lineno}", "decompresses to more "
                                             f"than {limits.max_compression_ratio:g} times its "
                                             "compressed size (limit max_compression_ratio)")
                if not block:
                    if carry.strip():
                        block = b"\n"
                    else:
                        break
                data = carry + block if carry else block
                cut = data.rfind(b"\n")
                if cut < 0:
                    if len(data) > max_line:
                        raise L._line_too_long(path, lineno + 1, limits)
                    carry = data
                    continue
                carry = data[cut + 1:]
                cols, nlines = _parse_block(data[:cut + 1], ncol, delim, idx, maps, path,
                                            lineno + 1, max_line, src.columns.get("key", "key"))
                lineno += nlines
                if len(carry) > max_line:
                    raise L._line_too_long(path, lineno + 1, limits)
                n = len(next(iter(cols.values())))
                if n:
                    pend.append(cols)
                    pend_n += n
                while pend_n >= chunk_trials:
                    allc = _concat(pend)
                    yield {k: v[:chunk_trials] for k, v in allc.items()}
                    rest = {k: v[chunk_trials:] for k, v in allc.items()}
                    pend_n -= chunk_trials
                    pend = [rest] if pend_n else []
            if pend_n:
                yield _concat(pend)
            while raw.read(1 << 20):
                pass

    def _header(self, fh) -> tuple[list[str], int]:
        limits, path = self.limits, self.path
        from dicert import logs as L

        delim = self.src.delimiter
        lineno = 0
        while True:
            line = fh.readline(limits.max_line_bytes + 1)
            lineno += 1
            if not line:
                raise LogFormatError(path, "", "empty file: no header row")
            if len(line) > limits.max_line_bytes:
                raise L._line_too_long(path, lineno, limits)
            try:
                text = line.decode("utf-8-sig").strip()
            except UnicodeDecodeError:
                raise LogFormatError(path, f"line {lineno}", "header row is not UTF-8 "
                                     "text") from None
            if not text or text.startswith("#"):
                continue
            if text.count(delim) + 1 > limits.max_columns:
                raise LogFormatError(path, f"line {lineno}", "header has more columns than "
                                     f"the limit max_columns = {limits.max_columns}")
            names = [_unquote(c) for c in text.split(delim)]
            return names, lineno


def _unquote(s: str) -> str:
    s = s.strip()
    if len(s) >= 2 and s[0] == s[-1] and s[0] in "\"'":
        s = s[1:-1].strip()
    return s


def _find_column(names: list[str], col: str, role: str, src: SourceSpec, path: Path,
                 lineno: int) -> int:
    if col in names:
        if names.count(col) > 1:
            raise LogFormatError(path, f"line {lineno}", f"column {col!r} appears twice")
        return names.index(col)
    low = [n.lower() for n in names]
    if low.count(col.lower()) == 1:
        return low.index(col.lower())
    hint = ""
    if len(names) == 1:
        seen = delimiter_in(names[0])
        if seen is not None and seen != src.delimiter:
            hint = (f"; the header looks {_DELIM_NAMES[seen]}-separated: set delimiter = "
                    f"\"{_DELIM_NAMES[seen]}\" in [{src.key_prefix}]")
    key = f"{src.key_prefix}.columns.{role}" if src.label == "table" else \
        f"{src.key_prefix}.{role}"
    shown = ", ".join(repr(n) for n in names[:12]) + (" ..." if len(names) > 12 else "")
    raise LogFormatError(path, f"line {lineno}", f"header has no column {col!r} (named by spec "
                         f"key {key!r}); its columns: {shown}{hint}")


def delimiter_in(header: str) -> str | None:
    """The delimiter a single-column header line most likely uses (tab, semicolon, pipe)."""
    for d in ("\t", ";", "|"):
        if header.count(d) >= 1:
            return d
    return None


def _concat(parts: list[dict[str, np.ndarray]]) -> dict[str, np.ndarray]:
    if len(parts) == 1:
        return parts[0]
    return {k: np.concatenate([p[k] for p in parts]) for k in parts[0]}


def _parse_block(data: bytes, ncol: int, delim: bytes, idx: Mapping[str, int],
                 maps: Mapping[str, _ValueMap], path: Path, first_line: int,
                 max_line: int, key_col: str = "key") -> tuple[dict[str, np.ndarray], int]:
    """Parse complete lines: a vectorised path, and an exact per-line path on any irregularity
    (which also finds the first error and names its line)."""
    buf = np.frombuffer(data, dtype=np.uint8)
    nl = np.flatnonzero(buf == 10)
    if nl.size and max_line < len(data):
        lengths = np.diff(nl, prepend=-1)
        if int(lengths.max()) > max_line:
            from dicert.logs import LIMITS_ENV

            k = int(np.argmax(lengths > max_line))
            raise LogFormatError(path, f"line {first_line + k}", f"line longer than {max_line} "
                                 f"bytes (limit max_line_bytes; raise it with {LIMITS_ENV}="
                                 "max_line_bytes=N)")
    out = _parse_fast(buf, nl, ncol, delim[0], idx, maps)
    if out is None:
        out = _parse_slow(data, ncol, delim.decode(), idx, maps, path, first_line, key_col)
    return out, int(nl.size)


def _parse_fast(buf, nl, ncol, d, idx, maps) -> dict[str, np.ndarray] | None:
    n = nl.size
    if n == 0:
        return {r: np.zeros(0, np.int64 if r == "key" else np.uint8) for r in idx}
    if (buf == 13).any() or (buf == 34).any():
        return None
    starts = np.empty(n, dtype=np.int64)
    starts[0] = 0
    starts[1:] = nl[:-1] + 1
    first = buf[starts]
    if ((first == 35) | (first == 10)).any():
        return None
    seps = np.flatnonzero((buf == d) | (buf == 10))
    if seps.size != n * ncol:
        return None
    seps = seps.reshape(n, ncol)
    if not np.array_equal(seps[:, -1], nl):
        return None
    out: dict[str, np.ndarray] = {}
    for role, col in idx.items():
        beg = starts if col == 0 else seps[:, col - 1] + 1
        width = seps[:, col] - beg
        if role == "key":
            v = _ints(buf, beg, width)
            if v is None:
                return None
            out[role] = v
        else:
            if width.size and (int(width.min()) < 1 or int(width.max()) > 8):
                return None
            packed = _pack(buf, beg, width)
            bits = maps[role].map_packed(packed)
            if bits is None:
                return None
            out[role] = bits
    return out


def _pack(buf, beg, width) -> np.ndarray:
    """Each field's bytes (at most 8) packed little-endian into one uint64."""
    out = np.zeros(beg.size, np.uint64)
    wmax = int(width.max()) if width.size else 0
    top = buf.size - 1
    for k in range(wmax):
        byte = buf[np.minimum(beg + k, top)].astype(np.uint64)
        byte[width <= k] = 0
        out |= byte << np.uint64(8 * k)
    return out


def _ints(buf, beg, width) -> np.ndarray | None:
    """Non-negative decimal integers (1 to 18 digits), or None if any field is not one."""
    if width.size and (int(width.min()) < 1 or int(width.max()) > 18):
        return None
    val = np.zeros(beg.size, np.int64)
    wmax = int(width.max()) if width.size else 0
    top = buf.size - 1
    for k in range(wmax):
        live = width > k
        dig = buf[np.minimum(beg + k, top)].astype(np.int64) - 48
        if ((dig < 0) | (dig > 9))[live].any():
            return None
        val = np.where(live, val * 10 + dig, val)
    return val


def _parse_slow(data: bytes, ncol, delim: str, idx, maps, path, first_line, key_col="key"):
    cols: dict[str, list[int]] = {r: [] for r in idx}
    for k, raw_line in enumerate(data.split(b"\n")[:-1]):
        lineno = first_line + k
        try:
            line = raw_line.decode("utf-8").strip()
        except UnicodeDecodeError:
            raise LogFormatError(path, f"line {lineno}", "not UTF-8 text") from None
        if not line or line.startswith("#"):
            continue
        fields = line.split(delim)
        if len(fields) != ncol:
            raise LogFormatError(path, f"line {lineno}", f"expected {ncol} fields as in the "
                                 f"header, found {len(fields)}")
        for role, col in idx.items():
            tok = _unquote(fields[col])
            if role == "key":
                if not (tok.isascii() and tok.isdigit()) or len(tok) > 18:
                    raise LogFormatError(path, f"line {lineno}", f"key column "
                                         f"{key_col!r} has value "
                                         f"{tok[:20]!r}; expected a non-negative integer "
                                         "(trial index) below 10^18")
                cols[role].append(int(tok))
            else:
                bit = maps[role].mapping.get(tok)
                if bit is None:
                    raise LogFormatError(path, f"line {lineno}", maps[role].bad_value(tok))
                cols[role].append(bit)
    return {r: np.array(v, dtype=np.int64 if r == "key" else np.uint8) for r, v in cols.items()}


class _ParquetFile:
    """Streaming reader of one Parquet file, batch by batch (memory: about one row group)."""

    def __init__(self, src: SourceSpec, path: Path, limits) -> None:
        self.src, self.path = src, path

    def chunks(self, chunk_trials: int, hasher) -> Iterator[dict[str, np.ndarray]]:
        pq = _need_extra("Parquet files", "pyarrow.parquet")
        _hash_file(self.path, hasher)
        src, path = self.src, self.path
        try:
            # Buffered, not pre-buffered: column chunks are streamed, so memory stays near one
            # batch even for files written as one huge row group.
            f = pq.ParquetFile(str(path), buffer_size=1 << 20, pre_buffer=False)
            names = list(f.schema_arrow.names)
        except Exception as exc:  # pyarrow raises ArrowInvalid, OSError...
            raise LogFormatError(path, "", f"not a valid Parquet file ({_short(exc)})") from None
        cols = {r: _match_name(names, c, r, src, path) for r, c in src.columns.items()}
        maps = {r: _ValueMap(r, src.columns[r], m) for r, m in src.values.items()}
        row = 0
        try:
            for batch in f.iter_batches(batch_size=chunk_trials, columns=sorted(set(cols.values()))):
                out = {}
                for role, c in cols.items():
                    arr = batch.column(c)
                    if arr.null_count:
                        i = next(i for i, v in enumerate(arr.is_null().to_pylist()) if v)
                        raise LogFormatError(path, f"row {row + i}", f"column {c!r} is empty "
                                             "(null)")
                    out[role] = _convert(arr.to_numpy(zero_copy_only=False), role, c,
                                         maps.get(role), path, row)
                yield out
                row += batch.num_rows
        except LogFormatError:
            raise
        except Exception as exc:
            raise LogFormatError(path, f"row {row}", f"cannot read ({_short(exc)})") from None


class _Hdf5File:
    """Streaming reader of one HDF5 file: one 1-D dataset per column, read slice by slice."""

    def __init__(self, src: SourceSpec, path: Path, limits) -> None:
        self.src, self.path = src, path

    def chunks(self, chunk_trials: int, hasher) -> Iterator[dict[str, np.ndarray]]:
        h5py = _need_extra("HDF5 files", "h5py")
        _hash_file(self.path, hasher)
        src, path = self.src, self.path
        try:
            f = h5py.File(str(path), "r")
        except Exception as exc:
            raise LogFormatError(path, "", f"not a valid HDF5 file ({_short(exc)})") from None
        with f:
            try:
                grp = f[src.group] if src.group not in ("", "/") else f
            except Exception:
                raise LogFormatError(path, f"group {src.group!r}", "no such group") from None
            maps = {r: _ValueMap(r, src.columns[r], m) for r, m in src.values.items()}
            if isinstance(grp, h5py.Dataset):  # one table: a 1-D compound dataset
                _check_local(f, src.group, path, h5py)
                yield from self._compound(grp, chunk_trials, maps)
                return
            names = [k for k in grp.keys()]
            dsets = {}
            n = None
            for role, c in src.columns.items():
                name = _match_name(names, c, role, src, path)
                _check_local(grp, name, path, h5py)
                ds = grp[name]
                if not hasattr(ds, "shape") or len(ds.shape) != 1:
                    raise LogFormatError(path, f"dataset {name!r}", "must be a one-dimensional "
                                         "dataset")
                if n is None:
                    n = int(ds.shape[0])
                elif int(ds.shape[0]) != n:
                    first = next(iter(dsets))
                    raise LogFormatError(path, f"dataset {name!r}", f"has {ds.shape[0]} "
                                         f"entries, dataset {src.columns[first]!r} has {n}")
                dsets[role] = ds
            row = 0
            try:
                while row < (n or 0):
                    m = min(chunk_trials, n - row)
                    yield {role: _convert(ds[row:row + m], role, src.columns[role],
                                          maps.get(role), path, row)
                           for role, ds in dsets.items()}
                    row += m
            except LogFormatError:
                raise
            except Exception as exc:
                raise LogFormatError(path, f"row {row}", f"cannot read ({_short(exc)})") from None


    def _compound(self, ds, chunk_trials: int, maps) -> Iterator[dict[str, np.ndarray]]:
        src, path = self.src, self.path
        fields = list(ds.dtype.names or ())
        if not fields or len(ds.shape) != 1:
            raise LogFormatError(path, f"dataset {src.group!r}", "expected a group of column "
                                 "datasets or a one-dimensional compound (table) dataset")
        cols = {r: _match_name(fields, c, r, src, path) for r, c in src.columns.items()}
        n, row = int(ds.shape[0]), 0
        try:
            while row < n:
                m = min(chunk_trials, n - row)
                block = ds[row:row + m]
                yield {r: _convert(block[c], r, src.columns[r], maps.get(r), path, row)
                       for r, c in cols.items()}
                row += m
        except LogFormatError:
            raise
        except Exception as exc:
            raise LogFormatError(path, f"row {row}", f"cannot read ({_short(exc)})") from None


def _check_local(grp, name: str, path: Path, h5py) -> None:
    """Refuse HDF5 data stored outside the file (external links, external raw storage,
    virtual datasets): the record's digest covers this file's bytes only."""
    try:
        link = grp.get(name, getlink=True)
        if isinstance(link, h5py.ExternalLink):
            raise LogFormatError(path, f"dataset {name!r}", "is an external link to "
                                 f"{link.filename!r}; data outside this file are not covered "
                                 "by its digest (copy them into the file)")
        ds = grp[name]
    except LogFormatError:
        raise
    except Exception as exc:
        raise LogFormatError(path, f"dataset {name!r}", f"cannot open ({_short(exc)})") from None
    if isinstance(ds, h5py.Dataset) and (ds.external or ds.is_virtual):
        raise LogFormatError(path, f"dataset {name!r}", "stores its data outside this file "
                             "(external or virtual dataset); data outside the file are not "
                             "covered by its digest (copy them into the file)")


def _short(exc: BaseException) -> str:
    return " ".join(str(exc).split())[:160] or type(exc).__name__


def _match_name(names: list[str], col: str, role: str, src: SourceSpec, path: Path) -> str:
    if col in names:
        return col
    low = {n.lower(): n for n in names}
    if col.lower() in low:
        return low[col.lower()]
    key = f"{src.key_prefix}.columns.{role}" if src.label == "table" else \
        f"{src.key_prefix}.{role}"
    shown = ", ".join(repr(n) for n in names[:12])
    raise LogFormatError(path, "", f"has no column {col!r} (named by spec key {key!r}); its "
                         f"columns: {shown}")


def _convert(arr: np.ndarray, role: str, col: str, vmap: _ValueMap | None, path: Path,
             row0: int) -> np.ndarray:
    arr = np.asarray(arr)
    if role == "key":
        if arr.dtype.kind not in "iu":
            raise LogFormatError(path, f"row {row0}", f"key column {col!r} has type "
                                 f"{arr.dtype}; expected integers (trial index)")
        if arr.dtype.kind == "i" and arr.size and int(arr.min()) < 0:
            i = int(np.argmax(arr < 0))
            raise LogFormatError(path, f"row {row0 + i}", f"key column {col!r} has value "
                                 f"{int(arr[i])}; expected a non-negative trial index")
        if arr.dtype.kind == "u" and arr.dtype.itemsize == 8 and arr.size \
                and int(arr.max()) >= 2**63:
            raise LogFormatError(path, f"row {row0}", f"key column {col!r} exceeds 2^63")
        return arr.astype(np.int64, copy=False)
    assert vmap is not None
    if arr.dtype.kind in "biuf":
        return vmap.map_numbers(arr, path, row0)
    return vmap.map_strings(arr, path, row0)


def _hash_file(path: Path, hasher) -> None:
    """Feed every byte of ``path`` to ``hasher`` (formats whose readers seek)."""
    from dicert.logs import _open_checked

    if hasher is None:
        return
    with _open_checked(path) as fh:
        while block := fh.read(1 << 22):
            hasher.update(block)


def _column_names(path: Path, fmt: str | None, group: str) -> list[str]:
    from dicert.logs import _open_checked

    _open_checked(path).close()
    if fmt == "parquet":
        pq = _need_extra("Parquet files", "pyarrow.parquet")
        try:
            return list(pq.ParquetFile(str(path)).schema_arrow.names)
        except Exception as exc:
            raise LogFormatError(path, "", f"not a valid Parquet file ({_short(exc)})") from None
    if fmt == "hdf5":
        h5py = _need_extra("HDF5 files", "h5py")
        try:
            with h5py.File(str(path), "r") as f:
                return list((f[group] if group not in ("", "/") else f).keys())
        except Exception as exc:
            raise LogFormatError(path, "", f"not a valid HDF5 file ({_short(exc)})") from None
    raise LogFormatError(path, "", "unknown format")


_READERS = {"csv": _CsvFile, "parquet": _ParquetFile, "hdf5": _Hdf5File}


# --------------------------------------------------------------------------------------------
# One source (files in order) and the join
# --------------------------------------------------------------------------------------------


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class JoinReport:
    """What the station join found: trials matched, missing at A or at B (dropped, within the
    spec's ``join.max_missing``), and keys refused (always zero in a completed join: a
    duplicated or out-of-order key stops the join with an error)."""

    matched: int
    missing_at_a: int
    missing_at_b: int
    duplicated_keys: int
    out_of_order_keys: int
    max_missing: int
    first_key: int | None
    last_key: int | None

    def to_dict(self) -> dict:
        return dataclasses.asdict(self)


class _Source:
    """The rows of one source (its files in order), with per-file digests and key checks."""

    def __init__(self, src: SourceSpec, limits, hash_files: bool) -> None:
        self.src, self.limits, self.hash_files = src, limits, hash_files
        self.infos: list[Any] = []
        self.rows = 0

    def chunks(self, chunk_trials: int) -> Iterator[tuple[Path, dict[str, np.ndarray]]]:
        from dicert.logs import FileInfo

        prev = -1
        keyed = "key" in self.src.columns
        for path in self.src.files:
            h = hashlib.sha256() if self.hash_files else None
            reader = _READERS[self.src.format](self.src, path, self.limits)
            here = 0
            try:
                for cols in reader.chunks(chunk_trials, h):
                    n = len(next(iter(cols.values())))
                    if n == 0:
                        continue
                    if keyed:
                        prev = _check_keys(cols["key"], prev, path, self.src)
                    here += n
                    yield path, cols
                size = path.stat().st_size
            except LogFormatError:
                raise
            except OSError as exc:
                from dicert.logs import _read_error

                raise _read_error(path, exc) from None
            if here == 0:
                raise LogFormatError(path, "", "contains no trials")
            self.rows += here
            self.infos.append(FileInfo(path=str(path), format=self.src.format, size_bytes=size,
                                       sha256=h.hexdigest() if h is not None else None,
                                       trials=here))


def _check_keys(keys: np.ndarray, prev: int, path: Path, src: SourceSpec) -> int:
    """Keys must increase strictly (across chunks and files); return the last key."""
    if int(keys[0]) > prev and bool((keys[1:] > keys[:-1]).all()):
        return int(keys[-1])
    d = np.diff(keys, prepend=prev)
    i = int(np.argmax(d <= 0))
    k = int(keys[i])
    before = int(keys[i - 1]) if i else prev
    if d[i] == 0:
        raise LogFormatError(path, f"key {k}", f"duplicated trial key at {src.label} "
                             f"(column {src.columns['key']!r}); a trial recorded twice "
                             "cannot be joined (remove the duplicate, or find why it was "
                             "written twice)")
    raise LogFormatError(path, f"key {k}", f"out-of-order trial key at {src.label}: {k} "
                         f"follows {before}; the streaming join needs each station's rows "
                         "sorted by increasing key (sort the file, e.g. sort -t, -k1,1n)")


def _prefetched(it: Iterator[Any], depth: int = 1) -> Iterator[Any]:
    """Run ``it`` in a worker thread, at most ``depth`` items ahead (the readers and numpy
    release the GIL, so the two stations are read in parallel with the merge). Exceptions are
    re-raised in the consumer; closing the consumer stops the worker."""
    import queue
    import threading

    q: queue.Queue = queue.Queue(maxsize=depth)
    stop = threading.Event()
    end = object()

    def put(item) -> bool:
        while not stop.is_set():
            try:
                q.put(item, timeout=0.1)
                return True
            except queue.Full:
                continue
        return False

    def work() -> None:
        try:
            for item in it:
                if not put((None, item)):
                    return
            put((None, end))
        except BaseException as exc:  # re-raised in the consumer
            put((exc, None))
        finally:
            close = getattr(it, "close", None)
            if close is not None and stop.is_set():
                try:
                    close()
                except Exception:  # pragma: no cover - best effort on abandon
                    pass

    th = threading.Thread(target=work, name="dicert-station-reader", daemon=True)
    th.start()
    try:
        while True:
            exc, item = q.get()
            if exc is not None:
                raise exc
            if item is end:
                return
            yield item
    finally:
        stop.set()
        th.join()


def _codes_table(cols: Mapping[str, np.ndarray]) -> np.ndarray:
    c = (cols["x"] << 3) | (cols["y"] << 2) | (cols["a"] << 1) | cols["b"]
    if "t" in cols:
        c |= cols["t"] << 4
    return c.astype(np.uint8, copy=False)


class SpecLog:
    """A log described by a :class:`LogSpec`, opened for streaming (see the module docstring).

    Offers the interface of :class:`dicert.logs.TrialLog`; after a complete
    :meth:`iter_chunks` pass, :attr:`join_report` and :attr:`audit` describe the join.
    """

    def __init__(self, spec: LogSpec, *, limits=None) -> None:
        from dicert.logs import current_read_limits

        self.spec = spec
        self.limits = limits if limits is not None else current_read_limits()
        self.files = [p for s in spec.sources for p in s.files]
        self.formats = [s.format for s in spec.sources for _ in s.files]
        for p in self.files:
            if not p.is_file():
                raise LogFormatError(p, "", "no such file" if not p.exists() else
                                     "is not a regular file")
        self.has_test_flag = spec.has_test_flag
        self.file_infos: list[Any] = []
        self.join_report: JoinReport | None = None

    @property
    def audit(self) -> dict | None:
        """The record's ``log.spec`` section: the spec's name, content, SHA-256 and the join
        report (None for a plain Parquet/HDF5 log read without a spec)."""
        if self.spec.layout == "plain":
            return None
        return {"format": SPEC_FORMAT, "name": self.spec.path.name, "sha256": self.spec.sha256,
                "content": self.spec.text, "layout": self.spec.layout,
                "join": self.join_report.to_dict() if self.join_report is not None else None}

    def iter_chunks(self, chunk_trials: int = 1 << 24, *, hasher=None, hash_files: bool = True,
                    reuse_buffers: bool = False) -> Iterator[Any]:
        from dicert.logs import LogChunk

        if chunk_trials <= 0:
            raise ParameterError("chunk_trials must be positive")
        if hasher is not None:
            raise ParameterError("a log read through a log spec is digested per file "
                                 "(hash_files), not through one hasher")
        self.file_infos = []
        self.join_report = None
        start = 0
        # Station rows are read in chunks of at most STATION_CHUNK_ROWS (each row costs about
        # 10 bytes per station in the merge buffers); the joined chunks are no larger.
        chunk_trials = min(chunk_trials, STATION_CHUNK_ROWS)
        if self.spec.layout in ("table", "plain"):
            s = _Source(self.spec.sources[0], self.limits, hash_files)
            for _path, cols in s.chunks(chunk_trials):
                codes = _codes_table(cols)
                yield LogChunk(codes=codes, start=start, has_test_flag=self.has_test_flag)
                start += codes.size
            self.file_infos = list(s.infos)
            return
        sa = _Source(self.spec.sources[0], self.limits, hash_files)
        sb = _Source(self.spec.sources[1], self.limits, hash_files)
        state = _JoinState(self.spec)
        for codes in _merge_join(_prefetched(sa.chunks(chunk_trials)),
                                 _prefetched(sb.chunks(chunk_trials)), state, self.spec):
            if codes.size:
                yield LogChunk(codes=codes, start=start, has_test_flag=self.has_test_flag)
                start += codes.size
        self.file_infos = list(sa.infos) + list(sb.infos)
        self.join_report = JoinReport(matched=state.matched, missing_at_a=state.missing_a,
                                      missing_at_b=state.missing_b, duplicated_keys=0,
                                      out_of_order_keys=0, max_missing=self.spec.max_missing,
                                      first_key=state.first_key, last_key=state.last_key)
        if state.matched == 0:
            raise LogFormatError(self.spec.path, "", "the stations share no trial key: the "
                                 "join is empty")


class _JoinState:
    def __init__(self, spec: LogSpec) -> None:
        self.spec = spec
        self.matched = self.missing_a = self.missing_b = 0
        self.first_key: int | None = None
        self.last_key: int | None = None

    def missing(self, miss_a: np.ndarray, miss_b: np.ndarray, pa: Path, pb: Path) -> None:
        """Count trials missing at A (``miss_a``: keys seen only at B) and at B; refuse, naming
        the first key in key order beyond the spec's tolerance."""
        n = miss_a.size + miss_b.size
        if n == 0:
            return
        allowed = self.spec.max_missing - (self.missing_a + self.missing_b)
        if n > allowed:
            keys = np.concatenate([miss_a, miss_b])
            at_a = np.concatenate([np.ones(miss_a.size, bool), np.zeros(miss_b.size, bool)])
            order = np.argsort(keys, kind="stable")
            j = int(order[max(allowed, 0)])
            k, at = int(keys[j]), ("A" if at_a[j] else "B")
            here, other = (pa, pb) if at == "A" else (pb, pa)
            raise LogFormatError(here, f"key {k}", f"trial missing at station {at} (present "
                                 f"at station {'B' if at == 'A' else 'A'}, {other.name}); the "
                                 f"spec tolerates {self.spec.max_missing} missing trials "
                                 "(join.max_missing); silently dropping trials can bias the "
                                 "test")
        self.missing_a += miss_a.size
        self.missing_b += miss_b.size


_EMPTY = np.zeros(0, np.int64)


def _match_sorted(ka: np.ndarray, kb: np.ndarray, max_steps: int = 16) -> tuple[np.ndarray,
                                                                              np.ndarray]:
    """Positions of the keys common to two strictly increasing arrays (``ka[ixa] ==
    kb[ixb]``). A few missing keys are stepped over with vectorised comparisons of the
    aligned remainders; beyond ``max_steps`` the rest is matched by binary search."""
    pa: list[np.ndarray] = []
    pb: list[np.ndarray] = []
    i = j = 0
    for _ in range(max_steps):
        m = min(ka.size - i, kb.size - j)
        if m == 0:
            break
        diff = ka[i:i + m] != kb[j:j + m]
        d = int(np.argmax(diff)) if diff.any() else m
        pa.append(np.arange(i, i + d))
        pb.append(np.arange(j, j + d))
        i, j = i + d, j + d
        if d == m:
            break  # what is left of the longer array lies beyond the other's last key
        if ka[i] < kb[j]:
            i += 1  # ka[i] is in no later position of kb (all larger): missing at B
        else:
            j += 1
    else:
        ra, rb = ka[i:], kb[j:]
        pos = np.searchsorted(rb, ra)
        posc = np.minimum(pos, max(rb.size - 1, 0))
        hit = (pos < rb.size) & (rb[posc] == ra) if rb.size else np.zeros(ra.size, bool)
        h = np.flatnonzero(hit)
        pa.append(h + i)
        pb.append(pos[h] + j)
    if not pa:
        return _EMPTY, _EMPTY
    return np.concatenate(pa), np.concatenate(pb)


def _merge_join(ia: Iterator, ib: Iterator, st: _JoinState, spec: LogSpec) -> Iterator[np.ndarray]:
    """Merge join of two key-sorted chunk streams; each round consumes one buffer entirely,
    so each holds at most one chunk (memory is flat)."""
    ta = "test" in spec.sources[0].columns
    tb = "test" in spec.sources[1].columns
    ba = bb = None  # (path, cols) with unconsumed rows
    pa, pb = spec.sources[0].files[0], spec.sources[1].files[0]
    done_a = done_b = False
    while True:
        if ba is None and not done_a:
            nxt = next(ia, None)
            if nxt is None:
                done_a = True
            else:
                pa, ba = nxt
        if bb is None and not done_b:
            nxt = next(ib, None)
            if nxt is None:
                done_b = True
            else:
                pb, bb = nxt
        if ba is None and bb is None:
            return
        if ba is None:
            st.missing(bb["key"], _EMPTY, pa, pb)
            bb = None
            continue
        if bb is None:
            st.missing(_EMPTY, ba["key"], pa, pb)
            ba = None
            continue
        ka, kb = ba["key"], bb["key"]
        cut = min(int(ka[-1]), int(kb[-1]))
        na = int(np.searchsorted(ka, cut, "right"))
        nb = int(np.searchsorted(kb, cut, "right"))
        ka_, kb_ = ka[:na], kb[:nb]
        if na == nb and np.array_equal(ka_, kb_):
            ixa = ixb = slice(0, na)
            nm = na
        else:
            ixa, ixb = _match_sorted(ka_, kb_)
            nm = int(ixa.size)
            miss_b = np.ones(na, bool)
            miss_b[ixa] = False
            miss_a = np.ones(nb, bool)
            miss_a[ixb] = False
            st.missing(kb_[miss_a], ka_[miss_b], pa, pb)
        if nm:
            codes = ((ba["setting"][:na][ixa] << 3) | (bb["setting"][:nb][ixb] << 2)
                     | (ba["outcome"][:na][ixa] << 1) | bb["outcome"][:nb][ixb])
            if ta and tb:
                t1, t2 = ba["test"][:na][ixa], bb["test"][:nb][ixb]
                if not np.array_equal(t1, t2):
                    i = int(np.argmax(t1 != t2))
                    k = int(ka_[ixa][i])
                    raise LogFormatError(pb, f"key {k}", "the stations disagree on whether "
                                         f"this trial is a test round ({pa.name}: {int(t1[i])}, "
                                         f"{pb.name}: {int(t2[i])})")
                codes = codes | (t1 << 4)
            elif ta:
                codes = codes | (ba["test"][:na][ixa] << 4)
            elif tb:
                codes = codes | (bb["test"][:nb][ixb] << 4)
            keys_m = ka_[ixa]
            if st.first_key is None:
                st.first_key = int(keys_m[0])
            st.last_key = int(keys_m[-1])
            st.matched += nm
            yield codes.astype(np.uint8, copy=False)
        ba = {k: v[na:] for k, v in ba.items()} if na < ka.size else None
        bb = {k: v[nb:] for k, v in bb.items()} if nb < kb.size else None


def open_spec_log(source: Any, *, limits=None, format: str | None = None) -> SpecLog:
    """Open the log a spec file describes (or a plain Parquet/HDF5 log, by its extension or
    an explicit ``format``) for streaming."""
    p = Path(source)
    fmt = format.lower() if format is not None else None
    if fmt in ("parquet", "hdf5") or (fmt is None and _format_from_ext(p) in ("parquet", "hdf5")
                                      and not is_spec_file(p)):
        return SpecLog(implicit_spec(p, fmt), limits=limits)
    return SpecLog(load_spec(p), limits=limits)


__all__ = ["JoinReport", "LogSpec", "SPEC_FORMAT", "SpecLog", "SourceSpec", "is_spec_file",
           "load_spec", "open_spec_log"]


def spec_entry_problem(entry: Any) -> str | None:
    """Why a record's ``log.spec`` section is inconsistent (None if it is consistent): the
    recorded SHA-256 must be that of the recorded content."""
    if not isinstance(entry, Mapping):
        return "expected an object"
    content, sha = entry.get("content"), entry.get("sha256")
    if not isinstance(content, str) or not isinstance(sha, str):
        return "expected content and sha256 strings"
    if hashlib.sha256(content.encode("utf-8")).hexdigest() != sha:
        return "the recorded SHA-256 is not that of the recorded spec content"
    if entry.get("format") != SPEC_FORMAT:
        return f"unknown spec format {entry.get('format')!r}"
    return None


def choose_source(log: str | None, log_spec: Any, what: str = "LOG") -> str:
    """The log a command reads: the positional log, or the ``--log-spec`` file (one of them)."""
    if log_spec is None:
        if log is None:
            raise ParameterError(f"give the {what} or --log-spec FILE")
        return log
    if log is not None:
        raise ParameterError(f"give the log either as {what} or with --log-spec, not both")
    if not Path(log_spec).is_file():
        raise LogFormatError(log_spec, "", "no such file")
    if not is_spec_file(log_spec):
        raise LogFormatError(log_spec, "key 'format'", "not a log spec (expected format = "
                             f"\"{SPEC_FORMAT}\" near the top of the file)")
    return str(log_spec)
