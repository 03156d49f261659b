"""Trial logs: reading, validating, streaming, counting, writing and converting.

This module and :mod:`dicert.audit` are the only places that touch files; every later stage
takes arrays or counts.

Supported formats (see the README, section "Trial-log formats", for the contract):

``csv``
    Text with a header row naming the columns. Required ``x,y,a,b`` (settings and outcomes,
    each 0 or 1); optional ``t`` (1 = test round, 0 = generation round); other columns (for
    example timestamps) are allowed and ignored. Lines starting with ``#`` are comments; blank
    lines are skipped. ``.gz`` files are decompressed transparently.
``binary`` (extension ``.btl``, "binary trial log")
    Our compact format, one byte per trial, specified byte by byte in
    ``protocols/binary-trial-log.md`` and in :class:`BinaryLogWriter`.
``npz``
    NumPy archive with integer or boolean arrays ``x, y, a, b`` and optionally ``t``.

A log may be one file, a directory (its log files in sorted name order) or a glob pattern
(sorted); such a multi-file log is one run.

Every reader treats its file as hostile: :class:`ReadLimits` (line length, columns,
compression ratio, npz size) are checked before memory is spent, and every failure, including
I/O errors and a part of a directory log that cannot be read, is one
:class:`~dicert.errors.LogFormatError` naming the file.

Every trial is coded in one byte, ``code = (t<<4) | (x<<3) | (y<<2) | (a<<1) | b``. Logs without
a ``t`` column carry t = 0 in the code but *every* trial is a test round; :func:`summarize_log`
therefore files their counts under t = 1.
"""

from __future__ import annotations

# re-exported: every name that lived here keeps its import path
from dicert.logs._model import (  # noqa: F401
    BINARY_HEADER,
    BINARY_HEADER_SIZE,
    BINARY_MAGIC,
    BINARY_VERSION,
    BIT_A,
    BIT_B,
    BIT_T,
    BIT_X,
    BIT_Y,
    COUNT_STREAMED,
    DEFAULT_BLOCK_TRIALS,
    DEFAULT_CHUNK_TRIALS,
    FLAG_HAS_T,
    FORMATS,
    FileInfo,
    LIMITS_ENV,
    LogChunk,
    LogSummary,
    ReadLimits,
    TRAILER,
    TRAILER_MARK,
    TrialArrays,
    _COLUMNS,
    _Codes,
    _HashingReader,
    _LOG_SUFFIXES,
    _READ_FAILURES,
    _READ_LIMITS,
    _check_bits,
    _limits_from_env,
    _open_checked,
    _os_cause,
    _read_error,
    current_read_limits,
    read_limits,
)
from dicert.logs._files import (  # noqa: F401
    _check_glob_base,
    _is_member,
    detect_format,
    files_digest,
    format_from_name,
    input_identity_problems,
    resolve_sources,
)
from dicert.logs._open import TrialLog, _MultiHash, _spec_like, open_log, read_trials  # noqa: F401
from dicert.logs._binary import (  # noqa: F401
    BinaryLogWriter,
    _check_reserved,
    _iter_binary,
    _read_at,
    read_binary_header,
)
from dicert.logs._csv import (  # noqa: F401
    _CSV_BLOCK_BYTES,
    _header_hint,
    _iter_csv,
    _line_too_long,
    _maybe_gunzip,
    _parse_csv_block,
    _parse_csv_fast,
    _parse_csv_fixed,
    _parse_csv_slow,
    _read_csv_header,
    _value_hint,
)
from dicert.logs._npz import _iter_npz, _read_npy_chunk, _read_npy_header  # noqa: F401
from dicert.logs._summary import (  # noqa: F401
    BlockTally,
    _PAIR_THREAD_MIN,
    _bytes_done,
    _pair_pool,
    summarize_log,
)
from dicert.logs._write import (  # noqa: F401
    _DIGITS,
    _as_code_chunks,
    _csv_bytes,
    convert_log,
    write_log,
)


__all__ = [
    "BINARY_MAGIC",
    "BinaryLogWriter",
    "BlockTally",
    "FileInfo",
    "LogChunk",
    "LogSummary",
    "TrialArrays",
    "TrialLog",
    "ReadLimits",
    "convert_log",
    "current_read_limits",
    "detect_format",
    "files_digest",
    "input_identity_problems",
    "open_log",
    "read_binary_header",
    "read_limits",
    "read_trials",
    "resolve_sources",
    "summarize_log",
    "write_log",
]
