"""Device models: what the CLI simulates (a box plus its name, parameters and locality).

Part of :mod:`dicert.simulate` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from dicert.errors import ParameterError

from dicert.simulate._boxes import (
    CHSH_OPTIMAL_ANGLES,
    MODELS,
    PHOTONIC_EFFICIENCY,
    PHOTONIC_R,
    _check_unit,
    _local_weights_with_noise,
    _strategy_boxes,
    box_photonic,
    box_quantum,
    ch_eberhard_j,
    chsh_value,
    classical_strategy_weights,
    optimal_photonic_setup,
    validate_box,
    win_probability,
)


# ============================================================================================
# Device models (what the CLI simulates)
# ============================================================================================


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True, eq=False)
class DeviceModel:
    """A simulated pair of devices and its theoretical figures.

    Attributes
    ----------
    name : str
        One of :data:`MODELS`.
    box : ndarray, shape (2, 2, 2, 2)
        p[x, y, a, b].
    parameters : dict
        The model parameters (visibility, efficiency, angles in radians, ...).
    chsh : float
        Theoretical CHSH value S of the box.
    win_probability : float
        Theoretical CHSH-game win probability with uniform settings, 1/2 + S/8.
    ch_eberhard_j : float
        Theoretical CH-Eberhard J (outcome 1 read as a click).
    local : bool
        True when the devices are classical by construction (a local hidden-variable model).
    strategy_weights : ndarray of shape (16,) or None
        For local models: the distribution of the deterministic strategy drawn afresh every
        trial (the sampler draws it explicitly, as classical devices would).
    """

    name: str
    box: np.ndarray
    parameters: dict
    chsh: float
    win_probability: float
    ch_eberhard_j: float
    local: bool
    strategy_weights: np.ndarray | None = None


def _model_from_box(name: str, box: np.ndarray, parameters: dict, *, local: bool,
                    strategy_weights: np.ndarray | None = None) -> DeviceModel:
    s = chsh_value(box)
    return DeviceModel(
        name=name,
        box=box,
        parameters=parameters,
        chsh=s,
        win_probability=win_probability(box),
        ch_eberhard_j=ch_eberhard_j(box),
        local=local,
        strategy_weights=strategy_weights,
    )


def local_model(strategy: Any = "best", *, visibility: float = 1.0, name: str = "classical") -> DeviceModel:
    """Classical devices drawing a deterministic strategy per trial (see :func:`box_classical`)."""
    v = _check_unit(visibility, "visibility")
    w = _local_weights_with_noise(classical_strategy_weights(strategy), v)
    box = validate_box(np.einsum("k,kxyab->xyab", w, _strategy_boxes()), name="classical box")
    label = strategy if isinstance(strategy, str) else "custom"
    return _model_from_box(name, box, {"strategy": label, "visibility": v}, local=True, strategy_weights=w)


def device_model(
    model: str = "quantum",
    *,
    visibility: float = 1.0,
    efficiency: float | None = None,
    r: float | None = PHOTONIC_R,
    pair_probability: float = 1.0,
) -> DeviceModel:
    """Build one of the named device models of :data:`MODELS`.

    ``quantum``: :func:`box_quantum` (efficiency default 1). ``classical``: the best
    deterministic strategy (S = 2, win 3/4), mixed with uniform outputs when visibility < 1.
    ``classical-random``: the uniform mixture of the 8 optimal deterministic strategies, drawn
    afresh every trial. ``photonic``: :func:`box_photonic` (efficiency default 0.76).
    """
    if model == "quantum":
        eta = 1.0 if efficiency is None else efficiency
        box = box_quantum(visibility, eta)
        params = {"visibility": float(visibility), "efficiency": float(eta),
                  "angles_rad": list(CHSH_OPTIMAL_ANGLES), "no_click_outcome": 0,
                  "state": "maximally entangled (|00>+|11>)/sqrt(2) with white noise"}
        return _model_from_box("quantum", box, params, local=False)
    if model in ("classical", "classical-random"):
        if efficiency is not None and efficiency != 1.0:
            raise ParameterError(f"--efficiency does not apply to the {model} model")
        return local_model("best" if model == "classical" else "random", visibility=visibility, name=model)
    if model == "photonic":
        eta = PHOTONIC_EFFICIENCY if efficiency is None else efficiency
        eta = _check_unit(eta, "efficiency", open_low=True)
        v = _check_unit(visibility, "visibility")
        pp = _check_unit(pair_probability, "pair_probability", open_low=True)
        if r is not None and not (isinstance(r, (int, float)) and math.isfinite(r) and r > 0):
            raise ParameterError(f"r must be a positive number, got {r!r}")
        rr, ang, _ = optimal_photonic_setup(None if r is None else float(r), eta, v)
        box = box_photonic(rr, eta, ang, pp, visibility=v)
        params = {"r": rr, "efficiency": eta, "visibility": v, "pair_probability": pp,
                  "angles_rad": list(ang), "outcome_1": "click",
                  "state": "(|HV> + r|VH>)/sqrt(1+r^2)"}
        return _model_from_box("photonic", box, params, local=False)
    raise ParameterError(f"unknown model {model!r}; choose one of {', '.join(MODELS)}")
