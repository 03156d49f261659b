"""Sizing a Toeplitz extraction: seed length and the leftover-hash-lemma output length.

Part of :mod:`dicert.extract` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np

from dicert.errors import ParameterError


#: Output-length rule implemented by :func:`lhl_output_length`.
OUTPUT_RULE = "lhl-conservative"

_REFERENCES = (
    ("Y. Mansour, N. Nisan, P. Tiwari, STOC 1990 / Theor. Comput. Sci. 107 (1993): Toeplitz "
     "hashing is universal_2 with n + m - 1 seed bits"),
    ("M. Tomamichel, C. Schaffner, A. Smith, R. Renner, IEEE Trans. Inf. Theory 57(8), "
     "5524-5535 (2011): leftover hashing against quantum side information"),
)


# --------------------------------------------------------------------------- sizing


def seed_bits_required(n_bits: int, m_bits: int) -> int:
    """Number of seed bits a Toeplitz extractor from n to m bits uses: n + m - 1.

    Parameters
    ----------
    n_bits : int
        Input length (>= 1).
    m_bits : int
        Output length (>= 1).

    References
    ----------
    .. [1] Mansour, Nisan, Tiwari, STOC 1990 (Toeplitz family with n + m - 1 seed bits).
    """
    n = _positive_int(n_bits, "n_bits")
    m = _positive_int(m_bits, "m_bits")
    return n + m - 1


def seed_bytes_required(n_bits: int, m_bits: int) -> int:
    """Bytes a seed file must hold: ceil((n + m - 1) / 8)."""
    return -(-seed_bits_required(n_bits, m_bits) // 8)


def _log2_inverse(eps: float) -> float | Any:
    """log2(1/eps), exactly for powers of two, else to 50 digits (mpmath)."""
    mant, exp = math.frexp(eps)
    if mant == 0.5:
        return 1 - exp  # eps = 2**(exp - 1)
    import mpmath

    with mpmath.workdps(50):
        return -mpmath.log(mpmath.mpf(eps), 2)


def lhl_output_length(certified_min_entropy_bits: float, eps_ext: float) -> int:
    """Conservative leftover-hash output length m = floor(k - 2 log2(1/eps_ext)), never negative.

    With k the (smooth) min-entropy of the input conditioned on the adversary's (possibly
    quantum) side information, a two-universal family such as Toeplitz hashing outputs
    m = floor(k - 2 log2(1/eps_ext)) bits whose distance from uniform (jointly with the seed and
    the side information) is at most 2 eps_s + eps_ext / 2 by Theorem 1 of [1]; this module
    reports the rounder, larger total 2 eps_s + eps_ext (see :func:`lhl_sizing`). The floor is
    taken exactly (50-digit arithmetic), so float rounding can never make m optimistic.

    Parameters
    ----------
    certified_min_entropy_bits : float
        k >= 0, the smooth min-entropy in bits.
    eps_ext : float
        Extractor error, 0 < eps_ext < 1.

    Returns
    -------
    int
        The output length (0 if k is too small).

    References
    ----------
    .. [1] M. Tomamichel, C. Schaffner, A. Smith, R. Renner, "Leftover hashing against quantum
       side information", IEEE Trans. Inf. Theory 57(8), 5524-5535 (2011).
    .. [2] R. Impagliazzo, L. A. Levin, M. Luby, STOC 1989 (classical leftover hash lemma).
    """
    k = _finite_float(certified_min_entropy_bits, "certified_min_entropy_bits")
    if k < 0:
        raise ParameterError(f"certified_min_entropy_bits must be >= 0, got {k!r}")
    eps = _finite_float(eps_ext, "eps_ext")
    if not 0.0 < eps < 1.0:
        raise ParameterError(f"eps_ext must be in (0, 1), got {eps!r}")
    loss = _log2_inverse(eps)
    if isinstance(loss, int):
        # k is a binary float, 2*loss an integer: floor is exact in float arithmetic.
        m = math.floor(k) - 2 * loss
    else:
        import mpmath

        with mpmath.workdps(50):
            m = int(mpmath.floor(mpmath.mpf(k) - 2 * loss))
    return max(int(m), 0)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class LhlSizing:
    """Output length and error accounting of the leftover-hash step.

    ``total_error`` = 2 * eps_smooth + eps_ext bounds the trace distance of (output, seed, side
    information) from (uniform, seed, side information); with the conservative length rule the
    lemma [TSSR 2011] gives the smaller 2 eps_s + eps_ext / 2, so the figure recorded is safe.
    """

    output_bits: int
    certified_min_entropy_bits: float
    eps_ext: float
    eps_smooth: float
    total_error: float
    entropy_loss_bits: float
    rule: str
    formula: str
    side_information: str
    references: tuple[str, ...]


def lhl_sizing(certified_min_entropy_bits: float, eps_ext: float, eps_smooth: float = 0.0) -> LhlSizing:
    """Output length per :func:`lhl_output_length` plus the documented error accounting.

    Parameters
    ----------
    certified_min_entropy_bits : float
        Smooth min-entropy k = H_min^{eps_smooth}(X|E) in bits.
    eps_ext : float
        Extractor error parameter, 0 < eps_ext < 1.
    eps_smooth : float, optional
        Smoothing parameter of k (0 for a non-smooth bound), 0 <= eps_smooth < 1.

    Returns
    -------
    LhlSizing

    References
    ----------
    .. [1] M. Tomamichel, C. Schaffner, A. Smith, R. Renner, IEEE Trans. Inf. Theory 57(8),
       5524-5535 (2011), Theorem 1 with delta = 2**-m (two-universal hashing).
    """
    m = lhl_output_length(certified_min_entropy_bits, eps_ext)
    es = _finite_float(eps_smooth, "eps_smooth")
    if not 0.0 <= es < 1.0:
        raise ParameterError(f"eps_smooth must be in [0, 1), got {es!r}")
    return LhlSizing(
        output_bits=m,
        certified_min_entropy_bits=float(certified_min_entropy_bits),
        eps_ext=float(eps_ext),
        eps_smooth=es,
        total_error=2.0 * es + float(eps_ext),
        entropy_loss_bits=float(2.0 * math.log2(1.0 / float(eps_ext))),
        rule=OUTPUT_RULE,
        formula="m = floor(k - 2 log2(1/eps_ext)); total error 2 eps_smooth + eps_ext",
        side_information="quantum (covers classical)",
        references=(_REFERENCES[1],),
    )


# --------------------------------------------------------------------------- helpers


def _positive_int(value: Any, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)):
        raise ParameterError(f"{name} must be a positive integer, got {value!r}")
    v = int(value)
    if v < 1:
        raise ParameterError(f"{name} must be a positive integer, got {v}")
    return v


def _finite_float(value: Any, name: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number, got {value!r}") from None
    if not math.isfinite(v):
        raise ParameterError(f"{name} must be finite, got {v!r}")
    return v
