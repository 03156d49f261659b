"""Simulated Bell-test devices: box models and fast, reproducible trial sampling.

A *box* is a conditional distribution ``p[x, y, a, b] = p(ab|xy)`` (float64 array of shape
(2, 2, 2, 2)); every row ``p[x, y]`` sums to one. This module builds the boxes of honest quantum
devices (a maximally entangled pair with white noise and detector losses), of classical devices
(deterministic and random local strategies) and of a photonic Eberhard-type experiment
(non-maximally entangled state, one detector per side, outcome 1 = click), and samples trial
logs from them.

Sampling is vectorised and streams in chunks: every trial consumes a fixed number of 64-bit
words from ``rng.bit_generator`` (in trial order), so the same generator state gives the same
trials whatever the chunk size. A compiled (numba) kernel maps words to trial codes; a numpy
implementation of the same map is the reference oracle and the fallback.

Word-to-trial map (``u(w) = (w >> 11) * 2**-53``, a uniform double on [0, 1)):

- word 0: the outcome, by inverse CDF of ``u(w0)`` over the outcome categories of the setting
  pair; with uniform settings, bit 0 of ``w0`` is x and bit 1 is y (disjoint from the 53 bits
  of ``u``);
- word 1 (only when ``gamma < 1``): test round iff ``u(w1) < gamma``;
- words 2 and 3 (only with a settings bias): ``x = [u(w2) < P(x=1)]``, ``y = [u(w3) < P(y=1)]``.

Generation rounds (t = 0) use the fixed settings ``generation``; test rounds use uniform (or
biased) settings. Probabilities are therefore realised to within 2**-53.

The module's top level imports only numpy and the standard library; scipy (used to optimise
the photonic angles) and numba are imported when first needed.

All examples and demo data produced with this simulator are invented.

References
----------
.. [1] J. F. Clauser, M. A. Horne, A. Shimony, R. A. Holt, "Proposed experiment to test local
   hidden-variable theories", PRL 23, 880 (1969).
.. [2] B. S. Cirel'son, "Quantum generalizations of Bell's inequality", Lett. Math. Phys. 4,
   93-100 (1980).
.. [3] J. F. Clauser, M. A. Horne, "Experimental consequences of objective local theories",
   PRD 10, 526 (1974).
.. [4] P. H. Eberhard, "Background level and counter efficiencies required for a loophole-free
   Einstein-Podolsky-Rosen experiment", PRA 47, R747 (1993).
"""

from __future__ import annotations

import dataclasses
import functools
import math
import os
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Any

import numpy as np

from dicert.errors import ParameterError

#: Bloch-sphere angles (Alice x=0, x=1, Bob y=0, y=1) in the X-Z plane giving S = 2*sqrt(2) on
#: the state (|00> + |11>)/sqrt(2), where E(x, y) = cos(theta_x - theta_y) (common practice).
CHSH_OPTIMAL_ANGLES = (0.0, math.pi / 2, math.pi / 4, -math.pi / 4)

#: Default photonic model parameters (state ratio r, detector efficiency).
PHOTONIC_R = 2.918
PHOTONIC_EFFICIENCY = 0.76

MODELS = ("quantum", "classical", "classical-random", "photonic")

DEFAULT_CHUNK_TRIALS = 1 << 21

_U53 = 1.0 / 9007199254740992.0  # 2**-53


# ============================================================================================
# Box utilities
# ============================================================================================


def validate_box(box: Any, *, name: str = "box", atol: float = 1e-9) -> np.ndarray:
    """Check a conditional distribution p[x, y, a, b] and return it as a normalised float64 copy.

    Raises :class:`ParameterError` unless ``box`` has shape (2, 2, 2, 2), finite entries that
    are nonnegative (to within ``atol``) and rows ``p[x, y]`` that sum to one (to within
    ``atol``).
    """
    try:
        p = np.array(box, dtype=np.float64)
    except (TypeError, ValueError):
        raise ParameterError(f"{name}: not a numeric array") from None
    if p.shape != (2, 2, 2, 2):
        raise ParameterError(f"{name}: expected shape (2, 2, 2, 2) indexed [x, y, a, b], got {p.shape}")
    if not np.all(np.isfinite(p)):
        raise ParameterError(f"{name}: contains NaN or infinite probabilities")
    if p.min() < -atol:
        raise ParameterError(f"{name}: negative probability {p.min():.3g}")
    p = np.maximum(p, 0.0)
    sums = p.sum(axis=(2, 3))
    worst = float(np.abs(sums - 1.0).max())
    if worst > atol:
        raise ParameterError(f"{name}: rows p(.|xy) must sum to 1 (off by {worst:.3g})")
    return p / sums[:, :, None, None]


def correlators(box: Any) -> np.ndarray:
    """E[x, y] = P(a = b | xy) - P(a != b | xy), shape (2, 2)."""
    p = np.asarray(box, dtype=np.float64)
    return p[:, :, 0, 0] + p[:, :, 1, 1] - p[:, :, 0, 1] - p[:, :, 1, 0]


def chsh_value(box: Any) -> float:
    """CHSH value S = E00 + E01 + E10 - E11 of a box [1]_."""
    e = correlators(box)
    return float(e[0, 0] + e[0, 1] + e[1, 0] - e[1, 1])


def win_probability(box: Any, settings: Any = None) -> float:
    """Probability of winning the CHSH game (a XOR b = x AND y).

    ``settings`` is the distribution q[x, y] of the settings (uniform by default, in which case
    the value is 1/2 + S/8).
    """
    p = np.asarray(box, dtype=np.float64)
    q = np.full((2, 2), 0.25) if settings is None else np.asarray(settings, dtype=np.float64)
    total = 0.0
    for x in range(2):
        for y in range(2):
            win = sum(p[x, y, a, b] for a in range(2) for b in range(2) if (a ^ b) == (x & y))
            total += q[x, y] * win
    return float(total)


def ch_eberhard_j(box: Any) -> float:
    """Clauser-Horne/Eberhard value J with outcome 1 = click, x = 0 <-> a1, y = 0 <-> b1.

    J = P(11|00) - P(10|01) - P(01|10) - P(11|11) <= 0 for local devices; for no-signalling
    boxes J = (S - 2)/4 ([3]_, [4]_).
    """
    p = np.asarray(box, dtype=np.float64)
    return float(p[0, 0, 1, 1] - p[0, 1, 1, 0] - p[1, 0, 0, 1] - p[1, 1, 1, 1])


def signalling_gap(box: Any) -> float:
    """Largest violation of no-signalling: how much a party's marginal depends on the other's setting."""
    p = np.asarray(box, dtype=np.float64)
    pa = p.sum(axis=3)  # [x, y, a]
    pb = p.sum(axis=2)  # [x, y, b]
    return float(max(np.abs(pa[:, 0] - pa[:, 1]).max(), np.abs(pb[0] - pb[1]).max()))


def settings_distribution(
    gamma: float = 1.0, generation: tuple[int, int] = (0, 0), settings_bias: tuple[float, float] | None = None
) -> np.ndarray:
    """Distribution q[x, y] of the settings over all rounds of the spot-checking design."""
    gamma, generation, bias = _check_design(gamma, generation, settings_bias)
    px, py = (0.5, 0.5) if bias is None else bias
    q = np.outer([1.0 - px, px], [1.0 - py, py]) * gamma
    q[generation] += 1.0 - gamma
    return q


# ============================================================================================
# Box models
# ============================================================================================


def box_from_state(rho: Any, alice_effects: Any, bob_effects: Any) -> np.ndarray:
    """The box p(ab|xy) = tr[rho (A_{a|x} (x) B_{b|y})] of a two-qubit state and local measurements.

    Parameters
    ----------
    rho : array, shape (4, 4)
        Density matrix in the basis |00>, |01>, |10>, |11> (Alice's qubit first).
    alice_effects, bob_effects : array, shape (2, 2, 2, 2)
        POVM effects indexed [setting, outcome, row, column].

    Notes
    -----
    Born's rule (common practice). The result is validated as a box.
    """
    r = np.asarray(rho, dtype=np.complex128).reshape(2, 2, 2, 2)  # [i, j, k, l] of |ij><kl|
    A = np.asarray(alice_effects, dtype=np.complex128)
    B = np.asarray(bob_effects, dtype=np.complex128)
    p = np.einsum("ijkl,xaki,yblj->xyab", r, A, B).real
    return validate_box(p, name="quantum box", atol=1e-9)


def _bloch_effects(angles: Sequence[float], efficiency: float, no_click_outcome: int) -> np.ndarray:
    """Projective +-1 measurements cos(t) Z + sin(t) X with a detector of the given efficiency."""
    Z = np.array([[1.0, 0.0], [0.0, -1.0]])
    X = np.array([[0.0, 1.0], [1.0, 0.0]])
    eye = np.eye(2)
    out = np.empty((2, 2, 2, 2))
    for s, t in enumerate(angles):
        obs = math.cos(t) * Z + math.sin(t) * X
        for o in range(2):
            proj = 0.5 * (eye + (1 - 2 * o) * obs)  # outcome 0 <-> eigenvalue +1
            out[s, o] = efficiency * proj + ((1.0 - efficiency) * eye if o == no_click_outcome else 0.0)
    return out


def _check_unit(value: float, name: str, *, open_low: bool = False) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v) or v < 0.0 or v > 1.0 or (open_low and v == 0.0):
        lo = "(0" if open_low else "[0"
        raise ParameterError(f"{name} must lie in {lo}, 1], got {value!r}")
    return v


def _check_angles(angles: Any, name: str = "angles") -> tuple[float, float, float, float]:
    try:
        ang = tuple(float(t) for t in angles)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be four numbers (radians)") from None
    if len(ang) != 4 or not all(math.isfinite(t) for t in ang):
        raise ParameterError(f"{name} must be four finite numbers (alice x=0, x=1, bob y=0, y=1)")
    return ang  # type: ignore[return-value]


def box_quantum(
    visibility: float = 1.0,
    efficiency: float = 1.0,
    *,
    angles: Sequence[float] | None = None,
    no_click_outcome: int = 0,
) -> np.ndarray:
    """Box of honest quantum devices sharing a maximally entangled pair.

    The state is ``v |Phi+><Phi+| + (1 - v) I/4`` (white noise of visibility ``v``); each party
    measures ``cos(t) Z + sin(t) X`` at Bloch angle ``t`` (default: the CHSH-optimal angles
    :data:`CHSH_OPTIMAL_ANGLES`), so ``E(x, y) = v cos(t_x - t_y)`` at perfect efficiency.
    Each detector fires independently with probability ``efficiency``; a no-click is recorded
    as the fixed outcome ``no_click_outcome``.

    Parameters
    ----------
    visibility : float in [0, 1]
    efficiency : float in [0, 1]
    angles : four floats, optional
        Bloch angles (radians) for Alice x = 0, 1 and Bob y = 0, 1.
    no_click_outcome : {0, 1}

    Returns
    -------
    ndarray, shape (2, 2, 2, 2)
        ``p[x, y, a, b]``. With the default angles S = eta^2 v 2 sqrt(2) + 2 (1 - eta)^2.

    References
    ----------
    .. [1] J. F. Clauser, M. A. Horne, A. Shimony, R. A. Holt, PRL 23, 880 (1969).
    .. [2] B. S. Cirel'son, Lett. Math. Phys. 4, 93-100 (1980).
    """
    v = _check_unit(visibility, "visibility")
    eta = _check_unit(efficiency, "efficiency")
    if no_click_outcome not in (0, 1):
        raise ParameterError(f"no_click_outcome must be 0 or 1, got {no_click_outcome!r}")
    ang = CHSH_OPTIMAL_ANGLES if angles is None else _check_angles(angles)
    phi = np.array([1.0, 0.0, 0.0, 1.0]) / math.sqrt(2.0)
    rho = v * np.outer(phi, phi) + (1.0 - v) * np.eye(4) / 4.0
    A = _bloch_effects(ang[:2], eta, no_click_outcome)
    B = _bloch_effects(ang[2:], eta, no_click_outcome)
    return box_from_state(rho, A, B)


# -- classical ---------------------------------------------------------------------------------


def deterministic_strategy(index: int) -> tuple[int, int, int, int]:
    """The outputs (a0, a1, b0, b1) of local deterministic strategy ``index`` in 0..15.

    Bits of ``index``: 3 = a0 (Alice's output for x = 0), 2 = a1, 1 = b0, 0 = b1.
    """
    if not 0 <= int(index) < 16:
        raise ParameterError(f"deterministic strategy index must be in 0..15, got {index!r}")
    i = int(index)
    return (i >> 3) & 1, (i >> 2) & 1, (i >> 1) & 1, i & 1


def _strategy_boxes() -> np.ndarray:
    boxes = np.zeros((16, 2, 2, 2, 2))
    for k in range(16):
        a0, a1, b0, b1 = deterministic_strategy(k)
        for x in range(2):
            for y in range(2):
                boxes[k, x, y, (a0, a1)[x], (b0, b1)[y]] = 1.0
    return boxes


def optimal_classical_strategies() -> tuple[int, ...]:
    """Indices of the 8 deterministic strategies that win the CHSH game with probability 3/4."""
    boxes = _strategy_boxes()
    return tuple(k for k in range(16) if abs(win_probability(boxes[k]) - 0.75) < 1e-12)


def classical_strategy_weights(strategy: Any = "best") -> np.ndarray:
    """Weights over the 16 deterministic strategies for a classical device.

    ``strategy`` is ``"best"`` (strategy 0: always output 0, which wins the CHSH game with
    probability 3/4), ``"random"`` (the uniform mixture of the 8 optimal deterministic
    strategies: uniform marginals, S = 2), an index 0..15, a tuple (a0, a1, b0, b1), or 16
    nonnegative weights (normalised here).
    """
    w = np.zeros(16)
    if isinstance(strategy, str):
        if strategy == "best":
            w[0] = 1.0
        elif strategy == "random":
            w[list(optimal_classical_strategies())] = 1.0 / 8.0
        else:
            raise ParameterError(f"unknown classical strategy {strategy!r}; use 'best' or 'random'")
        return w
    if isinstance(strategy, (int, np.integer)):
        deterministic_strategy(int(strategy))  # validates the index
        w[int(strategy)] = 1.0
        return w
    arr = np.asarray(strategy, dtype=np.float64)
    if arr.shape == (4,):
        bits = [int(v) for v in arr]
        if any(b not in (0, 1) for b in bits):
            raise ParameterError("a deterministic strategy (a0, a1, b0, b1) has entries 0 or 1")
        w[(bits[0] << 3) | (bits[1] << 2) | (bits[2] << 1) | bits[3]] = 1.0
        return w
    if arr.shape != (16,) or not np.all(np.isfinite(arr)) or arr.min() < 0 or arr.sum() <= 0:
        raise ParameterError("strategy weights must be 16 nonnegative numbers with a positive sum")
    return arr / arr.sum()


def box_classical(strategy: Any = "best", *, visibility: float = 1.0) -> np.ndarray:
    """Box of classical (local) devices: a mixture of deterministic strategies.

    With ``visibility < 1`` each party instead outputs a fresh uniform bit with probability
    ``1 - visibility`` (still local). See :func:`classical_strategy_weights` for ``strategy``.
    Every such box satisfies S <= 2 ([1]_ of the module).
    """
    v = _check_unit(visibility, "visibility")
    w = classical_strategy_weights(strategy)
    box = np.einsum("k,kxyab->xyab", w, _strategy_boxes())
    return validate_box(v * box + (1.0 - v) * 0.25, name="classical box")


def _local_weights_with_noise(weights: np.ndarray, visibility: float) -> np.ndarray:
    # Uniform outputs for both parties = uniform mixture of all 16 deterministic strategies.
    return visibility * weights + (1.0 - visibility) / 16.0


# -- photonic ----------------------------------------------------------------------------------


def _photonic_rho(r: float, visibility: float) -> np.ndarray:
    psi = np.array([0.0, 1.0, r, 0.0]) / math.sqrt(1.0 + r * r)  # (|HV> + r|VH>)/sqrt(1+r^2)
    return visibility * np.outer(psi, psi) + (1.0 - visibility) * np.eye(4) / 4.0


def _polariser_effects(angles: Sequence[float], efficiency: float) -> np.ndarray:
    out = np.empty((2, 2, 2, 2))
    for s, t in enumerate(angles):
        vec = np.array([math.cos(t), math.sin(t)])
        click = efficiency * np.outer(vec, vec)
        out[s, 0] = np.eye(2) - click  # outcome 0: no click
        out[s, 1] = click  # outcome 1: click
    return out


def _photonic_box_raw(r: float, efficiency: float, angles: Sequence[float], visibility: float) -> np.ndarray:
    rho = _photonic_rho(r, visibility).reshape(2, 2, 2, 2)
    A = _polariser_effects(angles[:2], efficiency)
    B = _polariser_effects(angles[2:], efficiency)
    return np.einsum("ijkl,xaki,yblj->xyab", rho, A, B)


def _canonical_angles(ang: Sequence[float]) -> tuple[float, ...]:
    # Polariser angles are defined modulo pi; report them in [-pi/2, pi/2).
    return tuple(float((t + math.pi / 2) % math.pi - math.pi / 2) for t in ang)


@functools.lru_cache(maxsize=64)
def optimal_photonic_setup(
    r: float | None, efficiency: float, visibility: float = 1.0
) -> tuple[float, tuple[float, float, float, float], float]:
    """Polariser angles (and, if ``r`` is None, the state ratio) maximising the CH-Eberhard J.

    Returns ``(r, angles, J)``. Deterministic: a fixed grid of symmetric starting points
    (Bob's angles = Alice's - pi/2, the symmetry of the optimum for this state) followed by a
    BFGS polish over all free parameters.
    """
    from scipy.optimize import minimize

    def j_of(params: np.ndarray) -> float:
        rr = math.exp(params[4]) if r is None else r
        return ch_eberhard_j(_photonic_box_raw(rr, efficiency, params[:4], visibility))

    r0 = 1.0 / max(efficiency, 1e-3) ** 2 if r is None else r
    grid = np.linspace(-math.pi / 2, math.pi / 2, 24, endpoint=False)
    best = None
    for a0 in grid:
        for a1 in grid:
            start = np.array([a0, a1, a0 - math.pi / 2, a1 - math.pi / 2, math.log(max(r0, 1e-6))])
            val = j_of(start)
            if best is None or val > best[0]:
                best = (val, start)
    x0 = best[1] if r is None else best[1][:4]

    def neg(params: np.ndarray) -> float:
        full = params if r is None else np.r_[params, 0.0]
        return -j_of(full)

    res = minimize(neg, x0, method="BFGS", options={"gtol": 1e-12, "maxiter": 2000})
    x = res.x if -res.fun >= -neg(x0) else x0
    rr = math.exp(x[4]) if r is None else float(r)
    ang = _canonical_angles(x[:4])
    return rr, ang, float(-neg(x))  # type: ignore[return-value]


def box_photonic(
    r: float | None = PHOTONIC_R,
    efficiency: float = PHOTONIC_EFFICIENCY,
    angles: Sequence[float] | None = None,
    pair_probability: float = 1.0,
    *,
    visibility: float = 1.0,
) -> np.ndarray:
    """Box of a photonic Eberhard-type experiment; outcome 1 = click, 0 = no click.

    The state is ``(|HV> + r |VH>)/sqrt(1 + r^2)`` (mixed with white noise when
    ``visibility < 1``); each side has one polariser at angle t (transmits
    ``cos(t)|H> + sin(t)|V>``) and one detector of the given efficiency. With probability
    ``1 - pair_probability`` no pair is produced and neither detector clicks.

    Parameters
    ----------
    r : float > 0 or None
        State ratio. ``None`` optimises it jointly with the angles for the largest J.
    efficiency : float in (0, 1]
    angles : four floats, optional
        Polariser angles (radians) for Alice x = 0, 1 and Bob y = 0, 1; default: those that
        maximise the CH-Eberhard value J (:func:`optimal_photonic_setup`).
    pair_probability : float in (0, 1]
    visibility : float in [0, 1]

    Notes
    -----
    The methods note's table of rho(c|z) (r = 2.918, efficiency 0.76, J = 0.0084) is
    reproduced to about 2e-6 with r = 2.918 exactly and to about 1e-7 with the J-optimal
    r = 2.91802 (``r=None``); the note's r is that optimum rounded to three decimals.

    References
    ----------
    .. [1] P. H. Eberhard, PRA 47, R747 (1993).
    .. [2] J. F. Clauser, M. A. Horne, PRD 10, 526 (1974).
    """
    eta = _check_unit(efficiency, "efficiency", open_low=True)
    v = _check_unit(visibility, "visibility")
    pp = _check_unit(pair_probability, "pair_probability", open_low=True)
    if r is not None:
        try:
            r = float(r)
        except (TypeError, ValueError):
            raise ParameterError(f"r must be a positive number, got {r!r}") from None
        if not math.isfinite(r) or r <= 0:
            raise ParameterError(f"r must be a positive number, got {r!r}")
    if angles is None:
        r, ang, _ = optimal_photonic_setup(r, eta, v)
    else:
        ang = _check_angles(angles)
        if r is None:
            raise ParameterError("give r when the angles are given")
    p = _photonic_box_raw(r, eta, ang, v)
    p = pp * p
    p[:, :, 0, 0] += 1.0 - pp
    return validate_box(p, name="photonic box")


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


# ============================================================================================
# Sampling
# ============================================================================================


def _check_design(gamma, generation, settings_bias):
    try:
        g = float(gamma)
    except (TypeError, ValueError):
        raise ParameterError(f"gamma must be a number in (0, 1], got {gamma!r}") from None
    if not math.isfinite(g) or not 0.0 < g <= 1.0:
        raise ParameterError(f"gamma (test-round probability) must lie in (0, 1], got {gamma!r}")
    try:
        gx, gy = (int(v) for v in generation)
    except (TypeError, ValueError):
        raise ParameterError(f"generation settings must be a pair of bits, got {generation!r}") from None
    if gx not in (0, 1) or gy not in (0, 1):
        raise ParameterError(f"generation settings must be a pair of bits, got {generation!r}")
    bias = None
    if settings_bias is not None:
        try:
            px, py = (float(v) for v in settings_bias)
        except (TypeError, ValueError):
            raise ParameterError("settings_bias must be a pair (P(x=1), P(y=1))") from None
        px = _check_unit(px, "settings bias P(x=1)")
        py = _check_unit(py, "settings bias P(y=1)")
        if (px, py) != (0.5, 0.5):
            bias = (px, py)
    return g, (gx, gy), bias


@dataclasses.dataclass(frozen=True, slots=True)
class _Plan:
    cdf: np.ndarray  # (4, K) float64, cdf[z, K-1] = 1
    table: np.ndarray  # (4, K) uint8 outcome code (a<<1)|b of category k at setting z
    gamma: float
    has_t: bool
    gen_z: int
    biased: bool
    px: float
    py: float

    @property
    def words(self) -> int:
        return 1 + (1 if self.gamma < 1.0 else 0) + (2 if self.biased else 0)


def _make_plan(source: Any, gamma, generation, settings_bias, include_t) -> _Plan:
    g, gen, bias = _check_design(gamma, generation, settings_bias)
    weights = None
    if isinstance(source, DeviceModel):
        weights = source.strategy_weights
        box = validate_box(source.box)
    else:
        box = validate_box(source)
    if weights is not None:
        # Local model: category = deterministic strategy, same distribution for every setting.
        w = np.asarray(weights, dtype=np.float64)
        cdf = np.tile(_cdf(w), (4, 1))
        table = np.zeros((4, 16), dtype=np.uint8)
        for k in range(16):
            a0, a1, b0, b1 = deterministic_strategy(k)
            for z in range(4):
                x, y = z >> 1, z & 1
                table[z, k] = ((a0, a1)[x] << 1) | (b0, b1)[y]
    else:
        cdf = np.stack([_cdf(box[z >> 1, z & 1].ravel()) for z in range(4)])
        table = np.tile(np.arange(4, dtype=np.uint8), (4, 1))
    has_t = (g < 1.0) if include_t is None else bool(include_t)
    px, py = (0.5, 0.5) if bias is None else bias
    return _Plan(cdf=cdf, table=table, gamma=g, has_t=has_t, gen_z=2 * gen[0] + gen[1],
                 biased=bias is not None, px=px, py=py)


def _cdf(p: np.ndarray) -> np.ndarray:
    c = np.cumsum(p / p.sum())
    c = np.minimum(c, 1.0)
    c[-1] = 1.0
    return c


def _codes_numpy(words: np.ndarray, plan: _Plan) -> np.ndarray:
    """Reference map from raw 64-bit words (shape (n, words_per_trial)) to trial codes."""
    w = words.reshape(-1, plan.words)
    n = w.shape[0]
    u = (w[:, 0] >> np.uint64(11)).astype(np.float64) * _U53
    j = 1
    if plan.gamma < 1.0:
        t = (w[:, 1] >> np.uint64(11)).astype(np.float64) * _U53 < plan.gamma
        j = 2
    else:
        t = np.ones(n, dtype=bool)
    if plan.biased:
        x = ((w[:, j] >> np.uint64(11)).astype(np.float64) * _U53 < plan.px).astype(np.uint8)
        y = ((w[:, j + 1] >> np.uint64(11)).astype(np.float64) * _U53 < plan.py).astype(np.uint8)
    else:
        x = (w[:, 0] & np.uint64(1)).astype(np.uint8)
        y = ((w[:, 0] >> np.uint64(1)) & np.uint64(1)).astype(np.uint8)
    z = np.where(t, 2 * x + y, plan.gen_z).astype(np.intp)
    k = np.zeros(n, dtype=np.intp)
    for col in range(plan.cdf.shape[1] - 1):
        k += u >= plan.cdf[z, col]
    c = plan.table[z, k]
    codes = (z.astype(np.uint8) << 2) | c
    if plan.has_t:
        codes |= t.astype(np.uint8) << 4
    return codes.astype(np.uint8)


@functools.cache
def _numba_sampler():
    if os.environ.get("DICERT_NO_NUMBA"):
        return None
    try:
        import numba
    except Exception:  # pragma: no cover - numba missing on exotic platforms
        return None

    @numba.njit(cache=True, nogil=True, boundscheck=False)
    def sample(words, nw, thr, K, table, g53, has_t, gen_z, biased, px53, py53, out):  # pragma: no cover
        # thr[z*K + j] = ceil(cdf[z, j] * 2**53), so "u53 >= thr" is exactly "u >= cdf" for
        # u = u53 * 2**-53; likewise g53, px53, py53. The outcome category is the number of
        # thresholds at or below u (branch-free: random data would defeat branch prediction).
        n = out.size
        spot = g53 < np.int64(9007199254740992)
        tbit = np.int64(16) if has_t else np.int64(0)
        sh = np.uint64(11)
        for i in range(n):
            base = i * nw
            w0 = words[base]
            u = np.int64(w0 >> sh)
            j = 1
            t = np.int64(1)
            if spot:
                t = np.int64(np.int64(words[base + 1] >> sh) < g53)
                j = 2
            if biased:
                x = np.int64(np.int64(words[base + j] >> sh) < px53)
                y = np.int64(np.int64(words[base + j + 1] >> sh) < py53)
            else:
                x = np.int64(w0 & np.uint64(1))
                y = np.int64((w0 >> np.uint64(1)) & np.uint64(1))
            z = t * (2 * x + y) + (1 - t) * gen_z
            b = z * K
            if K == 4:
                k = np.int64(u >= thr[b]) + np.int64(u >= thr[b + 1]) + np.int64(u >= thr[b + 2])
            else:
                k = np.int64(0)
                for col in range(K - 1):
                    k += np.int64(u >= thr[b + col])
            out[i] = np.uint8((z << 2) | np.int64(table[b + k]) | (t * tbit))

    return sample


def _codes_from_words(words: np.ndarray, plan: _Plan) -> np.ndarray:
    kernel = _numba_sampler()
    if kernel is None:
        return _codes_numpy(words, plan)
    n = words.size // plan.words
    out = np.empty(n, dtype=np.uint8)
    K = plan.cdf.shape[1]
    kernel(words, np.int64(plan.words), _scaled53(plan.cdf).ravel(), np.int64(K),
           np.ascontiguousarray(plan.table.ravel()), _scaled53(plan.gamma), bool(plan.has_t),
           np.int64(plan.gen_z), bool(plan.biased), _scaled53(plan.px), _scaled53(plan.py), out)
    return out


def _scaled53(p):
    """ceil(p * 2**53) as int64: ``u53 < ceil(p 2**53)`` iff ``u53 * 2**-53 < p`` (exact)."""
    if isinstance(p, np.ndarray):
        return np.ceil(p * 9007199254740992.0).astype(np.int64)
    return np.int64(math.ceil(float(p) * 9007199254740992.0))


def sampler_name() -> str:
    """Which sampling kernel is in use (for reports)."""
    return "numba" if _numba_sampler() is not None else "numpy"


def _check_rng(rng: Any) -> np.random.Generator:
    if not isinstance(rng, np.random.Generator):
        raise ParameterError("rng must be a numpy.random.Generator (e.g. numpy.random.default_rng(seed))")
    return rng


def _check_n(n: Any) -> int:
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)):
        if isinstance(n, float) and n.is_integer():
            n = int(n)
        else:
            raise ParameterError(f"the number of trials must be an integer, got {n!r}")
    if n < 1:
        raise ParameterError(f"the number of trials must be at least 1, got {n}")
    return int(n)


def iter_trial_chunks(
    n: int,
    source: Any,
    *,
    gamma: float = 1.0,
    generation: tuple[int, int] = (0, 0),
    settings_bias: tuple[float, float] | None = None,
    include_t: bool | None = None,
    rng: np.random.Generator,
    chunk: int = DEFAULT_CHUNK_TRIALS,
) -> Iterator[Any]:
    """Simulate ``n`` trials and yield them as :class:`dicert.logs.LogChunk` objects, in order.

    Parameters are those of :func:`simulate_trials`. Memory stays bounded by ``chunk`` trials
    (about 8 to 32 bytes per trial while a chunk is made). The trials do not depend on
    ``chunk``. The generator is validated before the first trial is drawn.
    """
    from dicert.logs import LogChunk

    n = _check_n(n)
    rng = _check_rng(rng)
    if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
        raise ParameterError(f"chunk must be a positive integer, got {chunk!r}")
    plan = _make_plan(source, gamma, generation, settings_bias, include_t)

    def gen() -> Iterator[Any]:
        bitgen = rng.bit_generator
        start = 0
        while start < n:
            m = min(int(chunk), n - start)
            words = bitgen.random_raw(m * plan.words)
            yield LogChunk(codes=_codes_from_words(words, plan), start=start, has_test_flag=plan.has_t)
            start += m

    return gen()


def simulate_trials(
    n: int,
    source: Any,
    *,
    gamma: float = 1.0,
    generation: tuple[int, int] = (0, 0),
    settings_bias: tuple[float, float] | None = None,
    include_t: bool | None = None,
    rng: np.random.Generator,
    chunk: int = DEFAULT_CHUNK_TRIALS,
) -> Any:
    """Simulate ``n`` independent trials of a box or device model; return a ``TrialArrays``.

    Parameters
    ----------
    n : int
        Number of trials.
    source : ndarray (2, 2, 2, 2) or DeviceModel
        The box p[x, y, a, b], or a :class:`DeviceModel` (local models draw a deterministic
        strategy afresh every trial).
    gamma : float in (0, 1]
        Test-round probability; 1 means every round is a test round with uniform settings.
    generation : (int, int)
        Settings (x, y) of generation rounds.
    settings_bias : (float, float), optional
        P(x=1), P(y=1) on test rounds (uniform when omitted).
    include_t : bool, optional
        Whether to record the test-round column ``t``; by default only when ``gamma < 1``.
    rng : numpy.random.Generator
        Source of randomness (e.g. ``Generator(PCG64(SeedSequence(seed)))``).
    chunk : int
        Trials per internal chunk.

    Returns
    -------
    dicert.logs.TrialArrays
    """
    from dicert.logs import TrialArrays

    parts = [c.codes for c in iter_trial_chunks(n, source, gamma=gamma, generation=generation,
                                                   settings_bias=settings_bias, include_t=include_t,
                                                   rng=rng, chunk=chunk)]
    codes = parts[0] if len(parts) == 1 else np.concatenate(parts)
    has_t = (float(gamma) < 1.0) if include_t is None else bool(include_t)
    return TrialArrays.from_codes(codes, has_t)


def make_rng(seed: int | None = None) -> tuple[np.random.Generator, int]:
    """A PCG64 generator from ``SeedSequence(seed)``; returns it and the seed's entropy (for replay)."""
    if seed is not None and (isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise ParameterError(f"rng seed must be a nonnegative integer, got {seed!r}")
    ss = np.random.SeedSequence(seed)
    return np.random.Generator(np.random.PCG64(ss)), int(ss.entropy)


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
    rng_seed: int
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
    rng_seed: int | None = None,
    chunk: int = DEFAULT_CHUNK_TRIALS,
    progress: Callable[[int, int], object] | None = None,
) -> SimulationSummary:
    """Simulate ``n`` trials of ``model`` and write them to ``path`` (atomically, streaming).

    The format comes from ``format`` or the extension (see :func:`dicert.logs.write_log`).
    Without ``rng_seed`` fresh entropy is drawn and reported as ``rng_seed`` so that the run can
    be replayed. Same seed and parameters give a byte-identical file.
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
    rng, seed = make_rng(rng_seed)
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
        rng_seed=seed,
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


__all__ = [
    "CHSH_OPTIMAL_ANGLES",
    "DeviceModel",
    "MODELS",
    "SimulationSummary",
    "box_classical",
    "box_from_state",
    "box_photonic",
    "box_quantum",
    "box_table",
    "ch_eberhard_j",
    "chsh_value",
    "classical_strategy_weights",
    "correlators",
    "deterministic_strategy",
    "device_model",
    "iter_trial_chunks",
    "local_model",
    "make_rng",
    "optimal_classical_strategies",
    "optimal_photonic_setup",
    "parse_setting_pair",
    "parse_trial_count",
    "settings_distribution",
    "signalling_gap",
    "simulate_to_file",
    "simulate_trials",
    "validate_box",
    "win_probability",
]
