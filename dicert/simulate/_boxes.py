"""Boxes: utilities (CHSH value, win probability, signalling gap) and the quantum, classical and photonic box models.

Part of :mod:`dicert.simulate` (import the names from there).
"""

from __future__ import annotations

import functools
import math
from collections.abc import Sequence
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
    A reference table of rho(c|z) (r = 2.918, efficiency 0.76, J = 0.0084; from memory, the
    Eberhard-type setting of Eberhard, Phys. Rev. A 47, R747 (1993)) is reproduced to about 2e-6
    with r = 2.918 exactly and to about 1e-7 with the J-optimal r = 2.91802 (``r=None``); the
    table's r is that optimum rounded to three decimals.

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
