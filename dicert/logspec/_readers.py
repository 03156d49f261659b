"""Readers of one data file (CSV, Parquet, HDF5): chunks of ``{role: array}`` with value maps applied; the implicit spec of a bare data file.

Part of :mod:`dicert.logspec` (import the names from there).
"""

from __future__ import annotations

import io
import os
from collections.abc import Iterator, Mapping
from pathlib import Path
from typing import Any

import numpy as np

from dicert.errors import LogFormatError, ParameterError

from dicert.logspec._spec import (
    LogSpec,
    SourceSpec,
    _DEFAULT_MAP,
    _DELIM_NAMES,
    _FORMATS_EXTRA,
    _format_from_ext,
)


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
        two = self._two_values(arr, ints)
        if two is not None:
            return two
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

    @staticmethod
    def _two_values(arr: np.ndarray, ints: Mapping[int, int]) -> np.ndarray | None:
        """Bits by two comparisons when the map is {k0: 0, k1: 1} and every value is k0 or
        k1 (the common 1/2 and +1/-1 codes; no table look-up), else None."""
        if len(ints) != 2 or sorted(ints.values()) != [0, 1]:
            return None
        k1 = next(k for k, b in ints.items() if b == 1)
        k0 = next(k for k, b in ints.items() if b == 0)
        try:
            hit1 = arr == k1
            if not (hit1 | (arr == k0)).all():
                return None  # the table path marks the values outside the map
        except (OverflowError, TypeError):  # a key outside the column's integer type
            return None
        return hit1.view(np.uint8)

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


class _ColumnFile:
    """A columnar file (Parquet, HDF5) read chunk by chunk by ``_chunks(chunk_trials, module)``
    while a worker thread hashes its bytes (the optional extra's module is imported first)."""

    what = ""
    module = ""

    def __init__(self, src: SourceSpec, path: Path, limits) -> None:
        self.src, self.path = src, path

    def chunks(self, chunk_trials: int, hasher) -> Iterator[dict[str, np.ndarray]]:
        mod = _need_extra(self.what, self.module)
        bg = _BackgroundHash(self.path, hasher)
        try:
            yield from self._chunks(chunk_trials, mod)
            bg.wait()
        finally:
            bg.cancel()

    def _chunks(self, chunk_trials: int, mod) -> Iterator[dict[str, np.ndarray]]:
        raise NotImplementedError


class _ParquetFile(_ColumnFile):
    """Streaming reader of one Parquet file, batch by batch (memory: about one row group)."""

    what, module = "Parquet files", "pyarrow.parquet"

    def _chunks(self, chunk_trials: int, pq) -> Iterator[dict[str, np.ndarray]]:
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
            # A station's file: the two stations are already decoded in parallel threads
            # (dicert.logspec._join._prefetched), and pyarrow's own pool on top oversubscribes
            # the cores; a table's file uses pyarrow's pool.
            threads = src.label == "table"
            for batch in f.iter_batches(batch_size=chunk_trials, use_threads=threads,
                                        columns=sorted(set(cols.values()))):
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


class _Hdf5File(_ColumnFile):
    """Streaming reader of one HDF5 file: one 1-D dataset per column, read slice by slice."""

    what, module = "HDF5 files", "h5py"

    def _chunks(self, chunk_trials: int, h5py) -> Iterator[dict[str, np.ndarray]]:
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


class _BackgroundHash:
    """Feed every byte of a file to ``hasher`` in a worker thread, so that hashing overlaps
    decoding (hashlib releases the GIL on large blocks, and so does the decoder). Formats
    whose readers seek (Parquet, HDF5) are digested this way; :meth:`wait` re-raises a read
    error in the caller, :meth:`cancel` stops the worker early. Memory: one 4 MiB block."""

    def __init__(self, path: Path, hasher) -> None:
        import threading

        self.exc: BaseException | None = None
        self.stop = threading.Event()
        self.th = None
        if hasher is not None:
            self.th = threading.Thread(target=self._run, args=(path, hasher), daemon=True,
                                       name="dicert-file-hash")
            self.th.start()

    def _run(self, path: Path, hasher) -> None:
        from dicert.logs import _open_checked

        try:
            with _open_checked(path) as fh:
                while not self.stop.is_set() and (block := fh.read(1 << 22)):
                    hasher.update(block)
        except BaseException as exc:  # re-raised by wait()
            self.exc = exc

    def wait(self) -> None:
        if self.th is not None:
            self.th.join()
            self.th = None
            if self.exc is not None:
                raise self.exc

    def cancel(self) -> None:
        if self.th is not None:
            self.stop.set()
            self.th.join()
            self.th = None


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
