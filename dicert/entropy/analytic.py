"""Closed-form single-round entropy bounds for CHSH, with derivatives.

All entropies are in bits. ``S`` is the CHSH value E00 + E01 + E10 - E11 and ``w`` the
CHSH-game win probability on uniform inputs, w = 1/2 + S/8.

Edge cases are handled conservatively: S <= 2 gives 0 entropy; an observed S above the
Tsirelson bound 2*sqrt(2) (a statistical fluctuation) is clamped to the maximum.

References
----------
.. [1] S. Pironio et al., "Random numbers certified by Bell's theorem", Nature 464,
   1021-1024 (2010), eq. (3) and SI.
.. [2] A. Acin, N. Brunner, N. Gisin, S. Massar, S. Pironio, V. Scarani, "Device-independent
   security of quantum cryptography against collective attacks", PRL 98, 230501 (2007).
.. [3] S. Pironio et al., "Device-independent quantum key distribution secure against
   collective attacks", New J. Phys. 11, 045021 (2009).
.. [4] B. S. Cirel'son, "Quantum generalizations of Bell's inequality", Lett. Math. Phys. 4,
   93-100 (1980).
"""

from __future__ import annotations

import math

import numpy as np

#: Tsirelson's bound on the CHSH value (Cirel'son 1980).
TSIRELSON = 2.0 * math.sqrt(2.0)
#: Local (classical) bound on the CHSH value.
LOCAL_BOUND = 2.0
#: Maximal quantum CHSH-game win probability cos^2(pi/8) = (2 + sqrt 2)/4.
W_QUANTUM = (2.0 + math.sqrt(2.0)) / 4.0
#: Classical CHSH-game win probability.
W_LOCAL = 0.75


def clamp_chsh(chsh):
    """Clamp CHSH values into [2, 2*sqrt(2)] (below 2 carries no entropy; above is a fluctuation)."""
    return np.clip(np.asarray(chsh, dtype=float), LOCAL_BOUND, TSIRELSON)


def chsh_from_win(w):
    """CHSH value from the win probability on uniform inputs: S = 8 w - 4."""
    return 8.0 * np.asarray(w, dtype=float) - 4.0


def win_from_chsh(chsh):
    """Win probability on uniform inputs from the CHSH value: w = 1/2 + S/8."""
    return 0.5 + np.asarray(chsh, dtype=float) / 8.0


def _out(x):
    x = np.asarray(x, dtype=float)
    return float(x) if x.ndim == 0 else x


def guessing_probability_single(chsh):
    """Maximal probability of guessing one party's outcome, (1 + sqrt(2 - S^2/4))/2 [1]."""
    s = clamp_chsh(chsh)
    return _out(0.5 * (1.0 + np.sqrt(np.maximum(2.0 - s * s / 4.0, 0.0))))


def min_entropy_single(chsh):
    """Min-entropy of one party's outcome per round, f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) [1].

    Also a (loose) lower bound for the pair of outcomes. Convex and increasing on
    [2, 2*sqrt(2)]; 0 at S <= 2 and 1 at the Tsirelson bound.
    """
    s = clamp_chsh(chsh)
    return _out(np.maximum(1.0 - np.log2(1.0 + np.sqrt(np.maximum(2.0 - s * s / 4.0, 0.0))), 0.0))


def min_entropy_single_derivative(chsh):
    """df/dS of :func:`min_entropy_single`; 0 below S = 2, +inf at the Tsirelson bound."""
    s = np.asarray(chsh, dtype=float)
    sc = clamp_chsh(s)
    root = np.sqrt(np.maximum(2.0 - sc * sc / 4.0, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        d = (sc / 4.0) / (root * (1.0 + root) * math.log(2.0))
    d = np.where(s < LOCAL_BOUND, 0.0, d)
    d = np.where(root == 0.0, np.inf, d)
    return _out(d)


def binary_entropy(p):
    """h(p) = -p log2 p - (1-p) log2(1-p), with h(0) = h(1) = 0."""
    p = np.clip(np.asarray(p, dtype=float), 0.0, 1.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        h = -(p * np.log2(p)) - (1.0 - p) * np.log2(1.0 - p)
    return _out(np.nan_to_num(h, nan=0.0))


def vn_entropy_single(chsh):
    """von Neumann bound H(A|E) >= 1 - h(1/2 + 1/2 sqrt(S^2/4 - 1)) [2, 3].

    Convex and increasing on [2, 2*sqrt(2)]; 0 at S <= 2 and 1 at the Tsirelson bound.
    """
    s = clamp_chsh(chsh)
    x = 0.5 + 0.5 * np.sqrt(np.maximum(s * s / 4.0 - 1.0, 0.0))
    return _out(np.maximum(1.0 - np.asarray(binary_entropy(x)), 0.0))


def vn_entropy_single_derivative(chsh):
    """dH/dS of :func:`vn_entropy_single`; 0 below S = 2, +inf at the Tsirelson bound.

    With r = sqrt(S^2/4 - 1) and x = (1 + r)/2: dH/dS = log2(x/(1-x)) * S / (8 r).
    At S -> 2+ this tends to 1/(2 ln 2).
    """
    s = np.asarray(chsh, dtype=float)
    sc = clamp_chsh(s)
    r = np.sqrt(np.maximum(sc * sc / 4.0 - 1.0, 0.0))
    x = 0.5 * (1.0 + r)
    with np.errstate(divide="ignore", invalid="ignore"):
        d = np.log2(x / (1.0 - x)) * sc / (8.0 * r)
    d = np.where(r == 0.0, 1.0 / (2.0 * math.log(2.0)), d)
    d = np.where(s < LOCAL_BOUND, 0.0, d)
    d = np.where(x >= 1.0, np.inf, d)
    return _out(d)


def vn_entropy_win(w):
    """The von Neumann bound as a function of the win probability, G(w) (zero for w <= 3/4)."""
    return vn_entropy_single(chsh_from_win(w))


def vn_entropy_win_derivative(w):
    """G'(w) = 8 * dH/dS; equals 4/ln 2 at w = 3/4+."""
    return _out(8.0 * np.asarray(vn_entropy_single_derivative(chsh_from_win(w))))


__all__ = [
    "LOCAL_BOUND",
    "TSIRELSON",
    "W_LOCAL",
    "W_QUANTUM",
    "binary_entropy",
    "chsh_from_win",
    "clamp_chsh",
    "guessing_probability_single",
    "min_entropy_single",
    "min_entropy_single_derivative",
    "vn_entropy_single",
    "vn_entropy_single_derivative",
    "vn_entropy_win",
    "vn_entropy_win_derivative",
    "win_from_chsh",
]
