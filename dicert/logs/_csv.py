"""The CSV trial-log format (plain or gzip): header, block parser.

Part of :mod:`dicert.logs` (import the names from there).
"""

from __future__ import annotations

import gzip
import io
import zlib
from collections.abc import Iterator
from pathlib import Path

import numpy as np

from dicert.errors import LogFormatError

# _open_checked is looked up on the package at call time, as it was when this was one module
# (tests patch dicert.logs._open_checked to inject I/O faults into every reader)
from dicert import logs as _logs
from dicert.logs._model import (
    LIMITS_ENV,
    ReadLimits,
    _HashingReader,
    current_read_limits,
)


# --------------------------------------------------------------------------------------------
# CSV format
# --------------------------------------------------------------------------------------------

_CSV_BLOCK_BYTES = 1 << 24


def _maybe_gunzip(raw, path):
    head = raw.peek(2)[:2] if hasattr(raw, "peek") else b""
    if head == b"\x1f\x8b":
        return io.BufferedReader(gzip.GzipFile(fileobj=raw, mode="rb"), buffer_size=1 << 20)
    return raw


def _line_too_long(path, lineno: int, limits: ReadLimits) -> LogFormatError:
    return LogFormatError(
        path, f"line {lineno}",
        f"line longer than {limits.max_line_bytes} bytes (limit max_line_bytes; raise it with "
        f"{LIMITS_ENV}=max_line_bytes=N if the log really has such lines)",
    )


def _read_csv_header(fh, path, limits: ReadLimits | None = None) -> tuple[list[str], int]:
    """Return (column names, line number of the header) and leave fh after the header line.

    Every line is read with a bounded ``readline`` (at most ``limits.max_line_bytes``), the
    column count is checked before the header is split, and duplicates are found with a set.
    """
    limits = limits if limits is not None else current_read_limits()
    lineno = 0
    while True:
        try:
            line = fh.readline(limits.max_line_bytes + 1)
        except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
            raise LogFormatError(path, f"line {lineno + 1}", f"cannot decompress: {exc}") from None
        lineno += 1
        if not line:
            raise LogFormatError(path, "", "empty file: no header row")
        if len(line) > limits.max_line_bytes:
            raise _line_too_long(path, lineno, limits)
        text = line.strip()
        if not text or text.startswith(b"#"):
            continue
        ncol = text.count(b",") + 1
        if ncol > limits.max_columns:
            raise LogFormatError(path, f"line {lineno}", f"header has {ncol} columns, more than "
                                 f"the limit max_columns = {limits.max_columns}")
        try:
            names = [c.strip().lower() for c in text.decode("utf-8-sig").split(",")]
        except UnicodeDecodeError:
            raise LogFormatError(path, f"line {lineno}", "header row is not UTF-8 text") from None
        present = set(names)
        for req in ("x", "y", "a", "b"):
            if req not in present:
                raise LogFormatError(
                    path, f"line {lineno}", f"header has no column {req!r} (required: x,y,a,b; "
                    f"optional t){_header_hint(names)}"
                )
        seen: set[str] = set()
        for c in names:  # linear: a set, not names.count per column
            if c in seen and c in ("x", "y", "a", "b", "t"):
                raise LogFormatError(path, f"line {lineno}", f"column {c!r} appears twice")
            seen.add(c)
        return names, lineno


def _header_hint(names: list[str]) -> str:
    """Why a header lacks the required columns, when the reason is guessable."""
    if len(names) == 1:
        for d, word in (("\t", "tab"), (";", "semicolon"), ("|", "pipe")):
            if d in names[0]:
                return (f"; the header looks {word}-separated, but a plain log is comma-"
                        f"separated: describe the file in a log spec with delimiter = "
                        f"\"{word}\" (README, section Log specs)")
    return ("; a log with other column names can be read through a log spec naming its "
            "columns (README, section Log specs)")


def _value_hint(name: str, val: bytes) -> str:
    if val in (b"-1", b"+1") or (name in ("x", "y") and val == b"2"):
        what = "+1/-1 outcomes" if val in (b"-1", b"+1") else "1/2 settings"
        return (f"; for {what} describe the log in a log spec with a value map, e.g. "
                + ('{"+1" = 0, "-1" = 1}' if what.startswith("+") else '{"1" = 0, "2" = 1}')
                + " (README, section Log specs)")
    return "; other codings can be mapped to 0/1 by a log spec (README, section Log specs)"


def _iter_csv(path: Path, chunk_trials: int, hasher,
              limits: ReadLimits | None = None) -> Iterator[np.ndarray]:
    limits = limits if limits is not None else current_read_limits()
    max_line = limits.max_line_bytes
    with _logs._open_checked(path) as raw0:
        counted = _HashingReader(raw0, hasher)
        raw = io.BufferedReader(counted, buffer_size=1 << 20)
        fh = _maybe_gunzip(raw, path)
        gz = fh is not raw
        names, lineno = _read_csv_header(fh, path, limits)
        ncol = len(names)
        want = [names.index(c) for c in ("x", "y", "a", "b")]
        tcol = names.index("t") if "t" in names else None
        carry = b""
        pending: list[np.ndarray] = []
        pending_n = 0
        inflated = 0
        # Blocks no larger than needed for long lines; carry never exceeds max_line bytes, so
        # each block costs O(block + max_line) whatever the input (no quadratic re-copying).
        block_bytes = max(_CSV_BLOCK_BYTES, min(max_line, 1 << 26))
        while True:
            try:
                block = fh.read(block_bytes)
            except (OSError, EOFError, gzip.BadGzipFile, zlib.error) as exc:
                raise LogFormatError(path, f"after line {lineno}", f"cannot decompress: {exc}") from None
            if gz and block:
                inflated += len(block)
                if (inflated > limits.ratio_grace_bytes
                        and inflated > limits.max_compression_ratio * max(counted.bytes_read, 1)):
                    raise LogFormatError(
                        path, f"after line {lineno}",
                        f"decompresses to more than {limits.max_compression_ratio:g} times its "
                        f"compressed size (limit max_compression_ratio; a decompression bomb?)")
            if not block:
                if carry.strip():
                    block = b"\n"  # a last line without newline
                else:
                    break
            data = carry + block if carry else block
            cut = data.rfind(b"\n")
            if cut < 0:
                if len(data) > max_line:
                    raise _line_too_long(path, lineno + 1, limits)
                carry = data
                continue
            carry = data[cut + 1 :]
            codes, nlines = _parse_csv_block(data[: cut + 1], ncol, want, tcol, path, lineno + 1,
                                             max_line)
            lineno += nlines
            if len(carry) > max_line:
                raise _line_too_long(path, lineno + 1, limits)
            if codes.size:
                pending.append(codes)
                pending_n += codes.size
            while pending_n >= chunk_trials:
                allc = np.concatenate(pending) if len(pending) > 1 else pending[0]
                yield allc[:chunk_trials]
                rest = allc[chunk_trials:]
                pending = [rest] if rest.size else []
                pending_n = rest.size
        if pending_n:
            yield np.concatenate(pending) if len(pending) > 1 else pending[0]
        # drain so the hash covers every byte of the file
        while raw.read(1 << 20):
            pass


def _parse_csv_block(data: bytes, ncol, want, tcol, path, first_line,
                     max_line: int | None = None) -> tuple[np.ndarray, int]:
    """Parse complete lines; fast vectorised path, exact per-line path on any irregularity.

    Lines longer than ``max_line`` bytes (newline included) are an error; the fixed-width path
    needs no check (its lines are 2 * ncol bytes, and ncol is bounded by max_columns).
    """
    buf = np.frombuffer(data, dtype=np.uint8)
    fixed = _parse_csv_fixed(buf, ncol, want, tcol)
    if fixed is not None:
        return fixed, fixed.size
    nl = np.flatnonzero(buf == 10)
    nlines = nl.size
    if max_line is not None and nlines and max_line < len(data):
        lengths = np.diff(nl, prepend=-1)
        if int(lengths.max()) > max_line:
            k = int(np.argmax(lengths > max_line))
            raise LogFormatError(path, f"line {first_line + k}",
                                 f"line longer than {max_line} bytes (limit max_line_bytes; raise "
                                 f"it with {LIMITS_ENV}=max_line_bytes=N if the log really has "
                                 "such lines)")
    codes = _parse_csv_fast(buf, nl, ncol, want, tcol)
    if codes is None:
        codes = _parse_csv_slow(data, ncol, want, tcol, path, first_line)
    return codes, nlines


def _parse_csv_fixed(buf: np.ndarray, ncol, want, tcol) -> np.ndarray | None:
    """Fastest path: every line is exactly ``d,d,...,d\n`` (one digit per column)."""
    width = 2 * ncol
    if buf.size == 0 or buf.size % width:
        return None
    rows = buf.reshape(buf.size // width, width)
    if not (rows[:, 1:-1:2] == 44).all() or not (rows[:, -1] == 10).all():
        return None
    digits = rows[:, 0::2] - 48
    if (digits > 1).any():
        return None
    code = (digits[:, want[0]] << 3) | (digits[:, want[1]] << 2) | (digits[:, want[2]] << 1) | digits[:, want[3]]
    if tcol is not None:
        code |= digits[:, tcol] << 4
    return code.astype(np.uint8, copy=False)


def _parse_csv_fast(buf: np.ndarray, nl: np.ndarray, ncol, want, tcol) -> np.ndarray | None:
    if nl.size == 0:
        return np.zeros(0, np.uint8)
    if (buf == 13).any():
        return None
    starts = np.empty(nl.size, dtype=np.int64)
    starts[0] = 0
    starts[1:] = nl[:-1] + 1
    first = buf[starts]
    if ((first == 35) | (first == 10)).any():  # comment or blank line
        return None
    seps = np.flatnonzero((buf == 44) | (buf == 10))
    if seps.size != nl.size * ncol:
        return None
    seps = seps.reshape(nl.size, ncol)
    if not np.array_equal(seps[:, -1], nl):
        return None
    code = np.zeros(nl.size, dtype=np.uint8)
    cols = list(zip(want, (3, 2, 1, 0)))
    if tcol is not None:
        cols.append((tcol, 4))
    for col, shift in cols:
        beg = starts if col == 0 else seps[:, col - 1] + 1
        if not np.array_equal(seps[:, col] - beg, np.ones_like(beg)):
            return None
        v = buf[beg] - 48
        if (v > 1).any():
            return None
        code |= v << shift
    return code


def _parse_csv_slow(data: bytes, ncol, want, tcol, path, first_line) -> np.ndarray:
    out = []
    cols = list(zip(("x", "y", "a", "b"), want))
    if tcol is not None:
        cols.append(("t", tcol))
    shifts = {"x": 3, "y": 2, "a": 1, "b": 0, "t": 4}
    for k, raw_line in enumerate(data.split(b"\n")[:-1]):
        lineno = first_line + k
        line = raw_line.rstrip(b"\r")
        stripped = line.strip()
        if not stripped or stripped.startswith(b"#"):
            continue
        fields = line.split(b",")
        if len(fields) != ncol:
            raise LogFormatError(
                path, f"line {lineno}", f"expected {ncol} fields as in the header, found {len(fields)}"
            )
        code = 0
        for name, idx in cols:
            val = fields[idx].strip()
            if val not in (b"0", b"1"):
                shown = val.decode("utf-8", "replace")[:20]
                raise LogFormatError(
                    path, f"line {lineno}", f"column {name!r} has value {shown!r}; expected 0 or "
                    f"1{_value_hint(name, val)}"
                )
            code |= (val[0] - 48) << shifts[name]
        out.append(code)
    return np.array(out, dtype=np.uint8)
