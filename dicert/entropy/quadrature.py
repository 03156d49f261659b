"""Gauss-Radau quadrature on [0, 1] with the end point 1 fixed, in high precision.

The m-point rule ``sum_i w_i f(t_i)`` has nodes ``t_1 < ... < t_{m-1} < t_m = 1`` and is exact
for polynomials of degree <= 2m - 2 (Abramowitz & Stegun, Handbook of Mathematical Functions,
eq. 25.4.31, Radau integration, mapped from [-1, 1] to [0, 1] and reflected so that the fixed
node is the right end point).

Construction (mpmath, ``DPS`` decimal digits):

- the free nodes on [-1, 1] are the zeros of the Jacobi polynomial P_{m-1}^{(1,0)} (weight
  ``1 - x``), found by Newton's method from Chebyshev-like starting points;
- the weights are w_m = 2/m^2 at the fixed node x = 1 and, at the free nodes,
  w_i = (1 + x_i) / (m^2 P_{m-1}(x_i)^2) (A&S 25.4.31 with x -> -x), where P is Legendre;
- finally ``t = (1 + x)/2`` and ``w -> w/2``.

The sign of the error is what makes the entropy bound of :mod:`dicert.entropy.vnquad` valid:
for the right-end-point Radau rule, ``int_0^1 f - Q_m(f) = -c_m f^{(2m-1)}(xi)`` with c_m > 0
(A&S 25.4.31 error term, reflected: odd derivatives change sign). See
:func:`log_quadrature` and the module docstring of :mod:`dicert.entropy.vnquad`.
"""

from __future__ import annotations

import functools
from fractions import Fraction

from dicert.errors import ParameterError

#: Working precision (decimal digits) of the node computation.
DPS = 60


@functools.lru_cache(maxsize=32)
def radau_nodes(m: int) -> tuple[tuple[Fraction, ...], tuple[Fraction, ...]]:
    """Nodes and weights of the m-point right-end-point Gauss-Radau rule on [0, 1].

    Returns exact rationals (rounded from ``DPS``-digit mpmath values; the last node is exactly
    1). ``m`` must be between 2 and 40.
    """
    import mpmath

    if isinstance(m, bool) or not isinstance(m, int) or not (2 <= m <= 40):
        raise ParameterError(f"quadrature size m: expected an integer in [2, 40], got {m!r}")
    with mpmath.workdps(DPS + 20):
        k = m - 1  # number of free nodes
        xs = []
        for j in range(1, k + 1):
            # starting point: Chebyshev-Gauss-Radau-like guess, then Newton on P_k^(1,0)
            x = -mpmath.cos((2 * j - 1) * mpmath.pi / (2 * k + 1))
            for _ in range(200):
                p = mpmath.jacobi(k, 1, 0, x)
                dp = (k + 2) / mpmath.mpf(2) * mpmath.jacobi(k - 1, 2, 1, x) if k >= 1 else 0
                step = p / dp
                x -= step
                if abs(step) < mpmath.mpf(10) ** (-(DPS + 10)):
                    break
            xs.append(x)
        xs.sort()
        if any(abs(xs[i + 1] - xs[i]) < mpmath.mpf(10) ** (-10) for i in range(k - 1)):
            raise ArithmeticError("Radau node search converged to a repeated root")
        ws = [(1 + x) / (m * m * mpmath.legendre(m - 1, x) ** 2) for x in xs]
        ws.append(mpmath.mpf(2) / (m * m))
        xs.append(mpmath.mpf(1))
        t = [Fraction(mpmath.nstr((1 + x) / 2, DPS + 5, min_fixed=-1, max_fixed=1))
             for x in xs[:-1]]
        t.append(Fraction(1))
        w = [Fraction(mpmath.nstr(v / 2, DPS + 5, min_fixed=-1, max_fixed=1)) for v in ws]
    return tuple(t), tuple(w)


def log_quadrature(x, m: int):
    """r_m(x) = sum_i w_i (x - 1)/(t_i (x - 1) + 1) (mpmath), the rule applied to
    ln x = int_0^1 (x - 1)/(t (x - 1) + 1) dt. For x > 0, r_m(x) <= ln x (error sign above)."""
    import mpmath

    t, w = radau_nodes(m)
    x = mpmath.mpf(x)
    return mpmath.fsum(mpmath.mpf(wi.numerator) / wi.denominator * (x - 1)
                       / (mpmath.mpf(ti.numerator) / ti.denominator * (x - 1) + 1)
                       for ti, wi in zip(t, w, strict=True))


__all__ = ["DPS", "log_quadrature", "radau_nodes"]
