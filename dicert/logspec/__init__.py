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
such trials in all (dropped, and counted in the join report that the record carries), and
every analysis charges them (:mod:`dicert.logspec._charge`): each dropped trial counts as a
lost test round, and its raw bits and the drop pattern are subtracted from the certified
min-entropy; method ``pef`` refuses a join that dropped trials. A trial missing at *both*
stations leaves no row; ``[join] keys = "consecutive"`` (with optional ``first_key`` and
``last_key``) declares the keys consecutive integers, and then each key missing inside the
range is a gap (``missing_at_both``), refused or tolerated and charged like a one-sided drop
(the streaming join remembers only the previous key).
"""

from __future__ import annotations

# re-exported: every name that lived here keeps its import path
from dicert.logspec._spec import (  # noqa: F401
    DATA_FORMATS,
    LogSpec,
    SPEC_FORMAT,
    SPEC_MAX_BYTES,
    STATION_CHUNK_ROWS,
    SourceSpec,
    _DEFAULT_MAP,
    _DELIMITERS,
    _DELIM_NAMES,
    _FORMATS_EXTRA,
    _ROLES_STATION,
    _ROLES_TABLE,
    _SPEC_RE,
    _err,
    _format_from_ext,
    _source,
    is_spec_file,
    load_spec,
)
from dicert.logspec._readers import (  # noqa: F401
    _CsvFile,
    _Hdf5File,
    _NoHash,
    _ParquetFile,
    _READERS,
    _ValueMap,
    _check_local,
    _column_names,
    _concat,
    _convert,
    _find_column,
    _hash_file,
    _ints,
    _match_name,
    _need_extra,
    _pack,
    _parse_block,
    _parse_fast,
    _parse_slow,
    _short,
    _unquote,
    delimiter_in,
    implicit_spec,
)
from dicert.logspec._charge import (  # noqa: F401
    JoinCharge,
    charge_for_log,
    charged_counts,
    join_charge,
    join_of,
    pattern_bits,
    pattern_count,
)
from dicert.logspec._join import (  # noqa: F401
    JoinReport,
    SpecLog,
    _EMPTY,
    _JoinState,
    _Source,
    _check_keys,
    _codes_table,
    _match_sorted,
    _merge_join,
    _prefetched,
    choose_source,
    open_spec_log,
    spec_entry_problem,
)


__all__ = ["JoinCharge", "JoinReport", "charge_for_log", "charged_counts", "join_charge", "pattern_bits",
           "pattern_count", "LogSpec", "SPEC_FORMAT", "SpecLog", "SourceSpec", "is_spec_file",
           "load_spec", "open_spec_log"]
