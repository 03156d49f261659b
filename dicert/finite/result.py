"""The result every finite-size method returns."""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from dicert._display import displayed

SIDE_INFORMATION = ("classical", "quantum")


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class FiniteSizeResult:
    """A finite-size certificate (or an abort) for one run.

    Attributes
    ----------
    method : str
        "martingale-azuma", "eat-dfr", "eat-df-conservative" (with "+radau-vn-AB" when the pair
        bound is used), "pef", ...
    side_information : str
        Adversary model covered: "classical" or "quantum".
    accepted : bool
        Whether the pre-declared acceptance test passed.
    certified_min_entropy_bits : float
        Certified (smooth) min-entropy of the harvested raw string in bits; >= 0, and 0 when
        the run aborted or the bound is not positive.
    eps : dict[str, float]
        Every error parameter by name (e.g. "eps_est", "eps_s", "eps_ea").
    smoothing_eps : float
        Smoothing parameter of the min-entropy (purified distance), 0 if none.
    entropy_error : float
        Error terms added to the extractor's before the total, e.g. eps_est or eps_ea.
    assumptions : tuple of str
        Every assumption the certificate rests on, in words.
    references : tuple of str
        Published sources of the bound.
    details : dict
        Intermediate numbers an auditor needs to re-derive the certificate.
    """

    method: str
    side_information: str
    accepted: bool
    certified_min_entropy_bits: float
    eps: dict[str, float]
    smoothing_eps: float = 0.0
    entropy_error: float = 0.0
    assumptions: tuple[str, ...] = ()
    references: tuple[str, ...] = ()
    details: dict[str, Any] = dataclasses.field(default_factory=dict)

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("method", self.method), ("accepted", self.accepted),
                ("certified_min_entropy_bits", self.certified_min_entropy_bits),
                ("side_information", self.side_information)]
        if full:
            rows += [(name, val) for name, val in self.eps.items()]
            rows += [("smoothing_eps", self.smoothing_eps), ("entropy_error", self.entropy_error)]
        return rows

    #: The error parameters by protocol key, under the record's (the glossary's) name.
    error_parameters = property(lambda self: self.eps)
    #: Name of earlier versions (read-only).
    min_entropy_bits = property(lambda self: self.certified_min_entropy_bits)

    def __post_init__(self) -> None:
        if self.side_information not in SIDE_INFORMATION:
            raise ValueError(f"side_information must be one of {SIDE_INFORMATION}, "
                             f"got {self.side_information!r}")
        k = float(self.certified_min_entropy_bits)
        if not math.isfinite(k) or k < 0.0:
            raise ValueError(f"certified_min_entropy_bits must be finite and >= 0, got {k!r}")
        if not self.accepted and k != 0.0:
            raise ValueError("an aborted run certifies 0 bits")
        for name, val in (("smoothing_eps", self.smoothing_eps),
                          ("entropy_error", self.entropy_error), *self.eps.items()):
            if not (0.0 <= float(val) <= 1.0):
                raise ValueError(f"error term {name} must lie in [0, 1], got {val!r}")

    def total_error(self, eps_ext: float) -> float:
        """Soundness error after extraction, in "P(accept) x distance" form.

        entropy_error + 2 * smoothing_eps + eps_ext: eps_est + eps_ext for the martingale
        method, eps_ea + 2 eps_s + eps_ext for entropy accumulation (the factor 2 converts a
        purified-distance smoothing into trace distance), eps_PE + eps_ext for PEF.
        """
        if not (0.0 <= eps_ext <= 1.0):
            raise ValueError(f"eps_ext must lie in [0, 1], got {eps_ext!r}")
        return float(self.entropy_error + 2.0 * self.smoothing_eps + eps_ext)


__all__ = ["SIDE_INFORMATION", "FiniteSizeResult"]
