"""Finite-size certification: from the counts of n trials to a certified (smooth) min-entropy.

One-call recipe: :func:`certify_counts` dispatches on the protocol's method. Primitives for
experts:

- :mod:`dicert.finite.params`: what a protocol fixes before the run (thresholds, errors).
- :mod:`dicert.finite.result`: :class:`FiniteSizeResult`, returned by every method.
- :mod:`dicert.finite.martingale`: Azuma-Hoeffding martingale bound with a pre-declared CHSH
  threshold (classical side information).
- :mod:`dicert.finite.eat`: entropy accumulation, original and improved second-order
  (quantum side information).
"""

from __future__ import annotations

from typing import Any

from dicert.errors import ParameterError
from dicert.finite.params import EatParams, MartingaleParams
from dicert.finite.result import FiniteSizeResult


def certify_martingale(counts: Any, params: MartingaleParams, design: Any = None, *,
                       harvest: Any = None) -> FiniteSizeResult:
    """See :func:`dicert.finite.martingale.certify_martingale`."""
    from dicert.finite.martingale import certify_martingale as _impl

    return _impl(counts, params, design, harvest=harvest)


def certify_eat(counts: Any, params: EatParams, design: Any = None, *,
                harvest: Any = None) -> FiniteSizeResult:
    """See :func:`dicert.finite.eat.certify_eat`."""
    from dicert.finite.eat import certify_eat as _impl

    return _impl(counts, params, design, harvest=harvest)


def certify_counts(counts: Any, protocol_like: Any) -> FiniteSizeResult:
    """Certify a run from its counts [t, x, y, a, b] under a protocol.

    ``protocol_like`` is a :class:`dicert.protocol.Protocol` or any object with ``method``
    ("martingale" | "eat" | "pef"), ``analysis`` (the method's params), ``design`` and
    ``harvest``. Logs without a t column put every trial under t = 1.
    """
    method = getattr(protocol_like, "method", None)
    params = getattr(protocol_like, "analysis", None)
    design = getattr(protocol_like, "design", None)
    harvest = getattr(protocol_like, "harvest", None)
    if method == "martingale" or (method is None and isinstance(params, MartingaleParams)):
        return certify_martingale(counts, params, design, harvest=harvest)
    if method == "eat" or (method is None and isinstance(params, EatParams)):
        return certify_eat(counts, params, design, harvest=harvest)
    if method == "pef":
        try:
            from dicert.finite import pef
        except ImportError:
            raise ParameterError("method 'pef' is not available in this installation") from None
        fn = getattr(pef, "certify_pef_counts", None) or getattr(pef, "certify_pef", None)
        if fn is None:
            raise ParameterError("method 'pef' cannot certify from counts alone; "
                                 "use the streaming PEF accumulator")
        return fn(counts, params, design)
    raise ParameterError(f"unknown finite-size method {method!r}")


__all__ = [
    "EatParams",
    "FiniteSizeResult",
    "MartingaleParams",
    "certify_counts",
    "certify_eat",
    "certify_martingale",
]
