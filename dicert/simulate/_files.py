"""Simulating to a file, and the small parsers and tables the CLI uses.

Part of :mod:`dicert.simulate` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import math
import os
from collections.abc import Callable, Iterator, Mapping
from typing import Any

import numpy as np

from dicert.errors import ParameterError

from dicert.simulate._boxes import (
    DEFAULT_CHUNK_TRIALS,
    _check_design,
)
from dicert.simulate._devices import DeviceModel
from dicert.simulate._sampling import _check_n, iter_trial_chunks, make_rng, sampler_name


# ============================================================================================
# Recipe: simulate to a file
# ============================================================================================


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class SimulationSummary:
    """What :func:`simulate_to_file` wrote and the theory of the simulated devices.

    ``counts`` is indexed [t, x, y, a, b] with the convention of :func:`dicert.logs.summarize_log`
    (logs without a t column file every trial under t = 1).
    """

    path: str
    format: str
    trials: int
    has_test_flag: bool
    test_rounds: int
    gamma: float
    generation: tuple[int, int]
    settings_bias: tuple[float, float] | None
    rng_stream: int
    sampler: str
    model: str
    parameters: dict
    box: np.ndarray
    chsh: float
    win_probability: float
    ch_eberhard_j: float
    local: bool
    counts: np.ndarray
    sha256: str
    size_bytes: int

    #: Name of earlier versions (read-only): the simulator's stream number.
    rng_seed = property(lambda self: self.rng_stream)


def _stream(rng_stream: int | None, rng_seed: int | None) -> int | None:
    """The stream number, also when given under its former name ``rng_seed``."""
    if rng_seed is None:
        return rng_stream
    if rng_stream is not None and rng_stream != rng_seed:
        raise ParameterError("give rng_stream only (rng_seed is its former name)")
    return rng_seed


def simulate_to_file(
    path: str | os.PathLike[str],
    n: int,
    model: DeviceModel,
    *,
    format: str | None = None,
    gamma: float = 1.0,
    generation: tuple[int, int] = (0, 0),
    settings_bias: tuple[float, float] | None = None,
    include_t: bool | None = None,
    rng_stream: int | None = None,
    rng_seed: int | None = None,
    chunk: int = DEFAULT_CHUNK_TRIALS,
    progress: Callable[[int, int], object] | None = None,
) -> SimulationSummary:
    """Simulate ``n`` trials of ``model`` and write them to ``path`` (atomically, streaming).

    The format comes from ``format`` or the extension (see :func:`dicert.logs.write_log`).
    ``rng_stream`` numbers the simulator's pseudo-random stream (``SeedSequence(rng_stream)``;
    fresh entropy, reported, if omitted; ``rng_seed`` is its former name): the same stream and
    parameters give a byte-identical file.
    """
    from dicert._io import sha256_file
    from dicert._kernels import count_blocks
    from dicert.logs import format_from_name, write_log

    fmt = format_from_name(path, format)
    if format is not None and format.lower() == "csv.gz":
        fmt_label = "csv.gz"
    elif fmt == "csv" and str(path).lower().endswith(".gz"):
        fmt_label = "csv.gz"
    else:
        fmt_label = fmt
    rng, seed = make_rng(_stream(rng_stream, rng_seed))
    n = _check_n(n)
    chunks = iter_trial_chunks(n, model, gamma=gamma, generation=generation, settings_bias=settings_bias,
                               include_t=include_t, rng=rng, chunk=chunk)
    counts = np.zeros(32, dtype=np.int64)
    state = {"done": 0, "has_t": False}

    def counted() -> Iterator[Any]:
        for ch in chunks:
            c, _ = count_blocks(ch.codes, max(ch.codes.size, 1))
            counts[:] += c.sum(axis=0)
            state["done"] += ch.codes.size
            state["has_t"] = ch.has_test_flag
            if progress is not None:
                progress(state["done"], n)
            yield ch

    written = write_log(path, counted(), format=format)
    if written != n:  # pragma: no cover - defensive
        raise RuntimeError(f"wrote {written} trials instead of {n}")
    has_t = state["has_t"]
    c5 = counts.reshape(2, 2, 2, 2, 2)
    if not has_t:
        c5 = np.stack([np.zeros_like(c5[0]), c5.sum(axis=0)])
    g, gen, bias = _check_design(gamma, generation, settings_bias)
    return SimulationSummary(
        path=str(path),
        format=fmt_label,
        trials=n,
        has_test_flag=has_t,
        test_rounds=int(c5[1].sum()),
        gamma=g,
        generation=gen,
        settings_bias=bias,
        rng_stream=seed,
        sampler=sampler_name(),
        model=model.name,
        parameters=dict(model.parameters),
        box=model.box,
        chsh=model.chsh,
        win_probability=model.win_probability,
        ch_eberhard_j=model.ch_eberhard_j,
        local=model.local,
        counts=c5,
        sha256=sha256_file(path),
        size_bytes=os.path.getsize(path),
    )


def parse_trial_count(text: str) -> int:
    """Parse a trial count such as ``1000000``, ``1_000_000`` or ``1e6`` (must be a whole number >= 1)."""
    s = str(text).strip().replace("_", "")
    try:
        value = int(s)
    except ValueError:
        try:
            f = float(s)
        except ValueError:
            raise ParameterError(f"--trials: not a number: {text!r}") from None
        if not math.isfinite(f) or not f.is_integer():
            raise ParameterError(f"--trials must be a whole number, got {text!r}")
        value = int(f)
    if value < 1:
        raise ParameterError(f"--trials must be at least 1, got {text!r}")
    return value


def parse_setting_pair(text: str, name: str = "settings") -> tuple[int, int]:
    """Parse a settings pair such as ``0,1`` (or ``01``) into (x, y)."""
    s = str(text).strip().replace(" ", "")
    parts = s.split(",") if "," in s else list(s)
    if len(parts) != 2 or any(p not in ("0", "1") for p in parts):
        raise ParameterError(f"{name} must be two bits x,y such as 0,0 or 1,0; got {text!r}")
    return int(parts[0]), int(parts[1])


def box_table(box: Any) -> Mapping[str, list[float]]:
    """rho(c|z) as a dict column z='xy' -> [p(c=00), p(01), p(10), p(11)] (for reports)."""
    p = np.asarray(box, dtype=np.float64)
    return {f"{x}{y}": [float(p[x, y, c >> 1, c & 1]) for c in range(4)] for x in range(2) for y in range(2)}
