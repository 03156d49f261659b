"""What a PEF analysis fixes before the analysis trials (:class:`PefParams`, the protocol's
[analysis] table).

Part of :mod:`dicert.finite.pef` (see its docstring for the method and references).
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping
from typing import Any

import numpy as np

from dicert.errors import ProtocolError
from dicert.finite.pef.models import (
    CALIBRATIONS,
    DEFAULT_BLOCK_TRIALS,
    INITIAL_RULES,
    MODELS,
    SQRT2,
    SettingsModel,
    _as_box,
    box_from_chsh,
    settings_from_design,
)


# =========================================================================== certification


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class PefParams:
    """Everything a PEF analysis fixes before the analysis trials (the protocol's [analysis]).

    Attributes
    ----------
    beta : float
        PEF power.
    eps_pe : float
        Error of the probability estimate.
    sigma_target_bits : float
        Min-entropy wanted; success when log2 T >= beta sigma_target + log2(1/eps_pe).
    n_max : int
        Most analysis trials before the run aborts.
    model : str
        "ns" or "tsirelson".
    lam : float
        Weight of the trivial PEF mixed in.
    calibration : str
        "prefix" (the first ``calibration_trials`` trials of the log fix the PEF and are not
        analysed), "isotropic" (an anticipated isotropic box with CHSH ``calibration_chsh``),
        "table" (an anticipated box ``calibration_table``, 16 numbers p(ab|xy) in code order),
        or "adaptive" (every trial is analysed; the trials are split into blocks of
        ``block_trials`` and the PEF of block k is built from the maximum-likelihood box of
        the trials before block k, never from block k itself; the first block uses the rule
        ``initial``).
    calibration_trials : int
        For "prefix".
    calibration_chsh : float | None
        For "isotropic", and for "adaptive" with initial = "isotropic".
    calibration_table : tuple | None
        For "table", and for "adaptive" with initial = "table".
    block_trials : int
        For "adaptive": trials per block (default :data:`DEFAULT_BLOCK_TRIALS`); 0 otherwise.
    initial : str | None
        For "adaptive": the PEF of the first block, "trivial" (F = 1: the block scores
        nothing and only trains the next one; default), "isotropic" or "table".
    fit_window_blocks : int
        For "adaptive": fit block k's box to the trials of the last ``fit_window_blocks``
        blocks before it (0, the default: all trials before block k).
    p_x0, p_y0, bias_x, bias_y : float
        Test-round settings probabilities P(x=0), P(y=0) and the bounds on their deviation
        (partly known settings); the test-round probability and generation settings come from
        the protocol's [settings].
    """

    beta: float
    eps_pe: float
    sigma_target_bits: float
    n_max: int
    model: str = "ns"
    lam: float = 1e-3
    calibration: str = "prefix"
    calibration_trials: int = 0
    calibration_chsh: float | None = None
    calibration_table: tuple[float, ...] | None = None
    p_x0: float = 0.5
    p_y0: float = 0.5
    bias_x: float = 0.0
    bias_y: float = 0.0
    block_trials: int = 0
    initial: str | None = None
    fit_window_blocks: int = 0

    def __post_init__(self) -> None:
        d = dataclasses.asdict(self)
        for key in ADAPTIVE_KEYS:  # left at the dataclass default: use the rule's default
            if d[key] in (None, 0):
                del d[key]
        checked = PefParams.from_mapping(d, "PefParams")
        for key in ADAPTIVE_KEYS:
            object.__setattr__(self, key, getattr(checked, key))

    @property
    def threshold_log2(self) -> float:
        """beta * sigma_target + log2(1/eps_pe), the success threshold on log2 T."""
        return self.beta * self.sigma_target_bits + math.log2(1.0 / self.eps_pe)

    @classmethod
    def from_mapping(cls, d: Mapping[str, Any], where: str = "") -> PefParams:
        """Validate a mapping (the parsed [analysis] table minus ``method``)."""
        k = _Keys(d, where)
        fail, num, integer, choice = k.fail, k.num, k.integer, k.choice

        allowed = tuple(f.name for f in dataclasses.fields(cls))
        for key in d:
            if key not in allowed:
                raise fail(str(key), f"unknown key (allowed: {', '.join(allowed)})")

        vals: dict[str, Any] = {
            "beta": num("beta", 0.0, 16.0, hi_open=False),
            "eps_pe": num("eps_pe", 0.0, 1.0),
            "sigma_target_bits": num("sigma_target_bits", 0.0, 1e15),
            "n_max": integer("n_max", 1),
            "model": choice("model", MODELS, "ns"),
            "lam": num("lam", 0.0, 1.0, lo_open=False, default=1e-3),
            "calibration": choice("calibration", CALIBRATIONS, "prefix"),
            "calibration_trials": integer("calibration_trials", 0, 0),
            "p_x0": num("p_x0", 0.0, 1.0, default=0.5),
            "p_y0": num("p_y0", 0.0, 1.0, default=0.5),
            "bias_x": num("bias_x", 0.0, 0.5, lo_open=False, default=0.0),
            "bias_y": num("bias_y", 0.0, 0.5, lo_open=False, default=0.0),
            "calibration_chsh": None,
            "calibration_table": None,
            "block_trials": 0,
            "initial": None,
            "fit_window_blocks": 0,
        }
        for key, p in (("bias_x", "p_x0"), ("bias_y", "p_y0")):
            if vals[key] >= min(vals[p], 1.0 - vals[p]):
                raise fail(key, f"must be below min({p}, 1 - {p}) = "
                                f"{min(vals[p], 1 - vals[p]):g}")
        anticipated = _calibration_keys(k, vals)
        _anticipated_box_keys(k, vals, anticipated)
        obj = object.__new__(cls)
        for key, v in vals.items():
            object.__setattr__(obj, key, v)
        return obj

    def settings_model(self, design: Any = None) -> SettingsModel:
        return settings_from_design(design, p_x0=self.p_x0, p_y0=self.p_y0, bias_x=self.bias_x,
                                    bias_y=self.bias_y)

    def anticipated_box(self) -> np.ndarray | None:
        """The anticipated box fixed in advance: for "isotropic" and "table", and for
        "adaptive" that of its first block (None for "prefix" and initial = "trivial")."""
        rule = self.initial if self.calibration == "adaptive" else self.calibration
        if rule == "isotropic":
            return box_from_chsh(self.calibration_chsh)
        if rule == "table":
            return _as_box(np.array(self.calibration_table), "calibration_table")
        return None

    def to_dict(self) -> dict:
        """The parameters as plain values; the adaptive keys only under "adaptive" (so the
        records of the fixed calibrations keep their form)."""
        skip = () if self.calibration == "adaptive" else ADAPTIVE_KEYS
        return {f.name: (list(v) if isinstance(v := getattr(self, f.name), tuple) else v)
                for f in dataclasses.fields(self) if f.name not in skip}


#: Keys of :class:`PefParams` used only by calibration = "adaptive".

class _Keys:
    """Readers of the keys of one [analysis] mapping; every problem names the key."""

    def __init__(self, d: Mapping[str, Any], where: str) -> None:
        self.d = d
        self.loc = f"{where}: " if where else ""

    def fail(self, key: str, problem: str) -> ProtocolError:
        return ProtocolError(f"{self.loc}key '{key}': {problem}")

    def num(self, key: str, lo: float, hi: float, *, lo_open=True, hi_open=True, default=None):
        d, fail = self.d, self.fail
        if key not in d or d[key] is None:
            if default is None:
                raise fail(key, "is required")
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v):
            raise fail(key, f"expected a finite number, got {v!r}")
        v = float(v)
        if (v <= lo if lo_open else v < lo) or (v >= hi if hi_open else v > hi):
            raise fail(key, f"must lie in {'(' if lo_open else '['}{lo:g}, {hi:g}"
                            f"{')' if hi_open else ']'}, got {v!r}")
        return v

    def integer(self, key: str, lo: int, default=None) -> int:
        d, fail = self.d, self.fail
        if key not in d or d[key] is None:
            if default is None:
                raise fail(key, "is required")
            return default
        v = d[key]
        if isinstance(v, bool) or not isinstance(v, int) or v < lo:
            raise fail(key, f"expected an integer >= {lo}, got {v!r}")
        return int(v)

    def choice(self, key: str, options: tuple[str, ...], default: str) -> str:
        v = self.d.get(key, default)
        if not isinstance(v, str) or v not in options:
            raise self.fail(key, f"expected one of {', '.join(map(repr, options))}, got {v!r}")
        return v


def _calibration_keys(k: _Keys, vals: dict[str, Any]) -> str:
    """The keys of the calibration rule (into ``vals``); returns the rule that fixes the
    anticipated box of the (first) PEF."""
    d, fail, integer, choice = k.d, k.fail, k.integer, k.choice
    cal = vals["calibration"]
    # The rule that fixes the anticipated box of the (first) PEF.
    anticipated = cal
    if cal == "adaptive":
        vals["initial"] = choice("initial", INITIAL_RULES, "trivial")
        vals["block_trials"] = integer("block_trials", 1, DEFAULT_BLOCK_TRIALS)
        vals["fit_window_blocks"] = integer("fit_window_blocks", 0, 0)
        if vals["lam"] <= 0.0:
            # lam > 0 keeps every factor of a producible trial positive in every block, so
            # the trials with factor 0 are the same (those outside the settings model) for
            # all blocks.
            raise fail("lam", "calibration = \"adaptive\" needs lam > 0 (no zero factors "
                              "in any block's PEF)")
        anticipated = vals["initial"]
    else:
        for key in ("initial", "block_trials", "fit_window_blocks"):
            if d.get(key) not in (None, 0):
                raise fail(key, "only used with calibration = \"adaptive\"")
    if cal == "prefix":
        if vals["calibration_trials"] < 1:
            raise fail("calibration_trials", "calibration = \"prefix\" needs a positive "
                                             "number of calibration trials")
    else:
        if d.get("calibration_trials"):
            raise fail("calibration_trials", "only used with calibration = \"prefix\"")
    return anticipated


def _anticipated_box_keys(k: _Keys, vals: dict[str, Any], anticipated: str) -> None:
    """The keys that fix the anticipated box (``calibration_chsh``, ``calibration_table``)."""
    d, fail, num = k.d, k.fail, k.num
    if anticipated == "isotropic":
        vals["calibration_chsh"] = num("calibration_chsh", 2.0, 2.0 * SQRT2, hi_open=False)
    elif "calibration_chsh" in d and d["calibration_chsh"] is not None:
        raise fail("calibration_chsh", "only used with calibration = \"isotropic\" (or "
                                       "\"adaptive\" with initial = \"isotropic\")")
    if anticipated == "table":
        tab = d.get("calibration_table")
        if not isinstance(tab, (list, tuple)) or len(tab) != 16:
            raise fail("calibration_table", "expected 16 numbers p(ab|xy), index 8x+4y+2a+b")
        for i, v in enumerate(tab):
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not (v >= 0):
                raise fail(f"calibration_table[{i}]", f"expected a number >= 0, got {v!r}")
        arr = np.array(tab, dtype=float).reshape(4, 4)
        if np.any(np.abs(arr.sum(axis=1) - 1.0) > 1e-6):
            raise fail("calibration_table", "each group of 4 (one setting pair) must sum to 1")
        vals["calibration_table"] = tuple(float(v) for v in tab)
    elif "calibration_table" in d and d["calibration_table"] is not None:
        raise fail("calibration_table", "only used with calibration = \"table\" (or "
                                        "\"adaptive\" with initial = \"table\")")

ADAPTIVE_KEYS = ("block_trials", "initial", "fit_window_blocks")

#: Sub-block length of the scoring pass: counts per sub-block locate the threshold crossing;
#: only sub-blocks that could contain it are scanned trial by trial.
SUB_BLOCK = 4096
