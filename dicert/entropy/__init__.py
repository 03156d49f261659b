"""Single-round entropy bounds: from a Bell violation to entropy per round.

Recipe (what the CLI and later stages call):

- :func:`bound_entropy`: one call from a CHSH value, a Bell-functional value or observed
  correlators to a certified per-round entropy bound (:class:`EntropyBound`).
- :func:`pair_min_entropy_bound` / :func:`single_min_entropy_bound`: fast, certified,
  convex-compatible min-entropy bounds from the shipped table (:mod:`dicert.entropy.table`).

Public primitives for experts:

- :mod:`dicert.entropy.analytic`: closed-form CHSH bounds (min-entropy and von Neumann)
  and their derivatives.
- :mod:`dicert.entropy.npa`: NPA semidefinite relaxations with exactly checked dual
  certificates (guessing probabilities, maximal Bell values).
- :mod:`dicert.entropy.table`: the precomputed certificate table and its lookup rules.

Heavy dependencies (cvxpy, scipy) are imported only inside the functions that solve SDPs.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

from dicert._display import displayed
from dicert.errors import ParameterError, SolverError

MEASURES = ("min", "vn")
PARTIES = ("A", "AB")
METHODS = ("auto", "analytic", "npa", "table", "radau", "radau-table")

_REF_PIRONIO2010 = "S. Pironio et al., Nature 464, 1021-1024 (2010)"
_REF_ACIN2007 = "A. Acin et al., PRL 98, 230501 (2007)"
_REF_PIRONIO2009 = "S. Pironio et al., New J. Phys. 11, 045021 (2009)"
_REF_NPA = "M. Navascues, S. Pironio, A. Acin, PRL 98, 010401 (2007); New J. Phys. 10, 073013 (2008)"
_REF_NSPS2014 = "O. Nieto-Silleras, S. Pironio, J. Silman, New J. Phys. 16, 013035 (2014)"
_REF_BSS2014 = "J.-D. Bancal, L. Sheridan, V. Scarani, New J. Phys. 16, 033011 (2014)"
_REF_BFF2024 = (
    "P. Brown, H. Fawzi, O. Fawzi, Quantum 8, 1445 (2024), arXiv:2106.13692 (Gauss-Radau "
    "quadrature bound on the conditional von Neumann entropy)"
)
_REF_KRS2009 = (
    "R. Koenig, R. Renner, C. Schaffner, IEEE Trans. Inf. Theory 55, 4337 (2009) "
    "(min-entropy = -log2 guessing probability)"
)

_ASSUME_QUANTUM = (
    "devices are quantum systems; the two stations do not communicate during a round; "
    "settings are chosen independently of the devices and the adversary"
)


@displayed
@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class EntropyBound:
    """A certified single-round entropy lower bound.

    Fields
    ------
    measure, parties : str
        ``"min"`` or ``"vn"``; ``"A"`` (Alice's outcome) or ``"AB"`` (the pair).
    single_round_bound_bits : float
        The single-round bound, in bits per trial, of the entropy ``measure`` asks for (min-
        or von Neumann entropy).
    guessing_probability : float or None
        Certified upper bound on the adversary's guessing probability (min measure).
    chsh_used, chsh_input : float or None
        CHSH value used (after clamping to [2, 2*sqrt(2)] where it enters) and as given.
    method : str
        ``"analytic"``, ``"npa-dual-certified"``, ``"table"``, ``"analytic-fallback"``, or
        ``"max(analytic-vn-A, npa-min-AB)"`` for the pair's von Neumann bound.
    level : str or None
        NPA level used, if any.
    inputs : (int, int)
        Inputs (x*, y*) the bound refers to.
    certificate : NpaCertificate or None
        Dual objective, margin, residuals, solver and status of the NPA solve.
    table : dict or None
        Table digest and the active piece (table method).
    fallback_reason : str or None
        Why the analytic fallback was used instead of the SDP.
    quadrature : dict or None
        Gauss-Radau quadrature bound (methods "radau", "radau-table"): the certified line
        ``offset + slope * w`` (bits, valid for every w), nodes, relaxation, per-node duals.
    assumptions, references : tuple of str

    The names of earlier versions (``entropy_bits``, ``h_min_bits``, ``h_vn_bits``, ``chsh``)
    remain as read-only aliases.
    """

    measure: str
    parties: str
    single_round_bound_bits: float
    guessing_probability: float | None
    chsh_used: float | None
    chsh_input: float | None
    method: str
    level: str | None
    inputs: tuple[int, int]
    certificate: Any = None
    table: dict | None = None
    fallback_reason: str | None = None
    assumptions: tuple[str, ...] = ()
    references: tuple[str, ...] = ()
    quadrature: dict | None = None

    def _headline(self, full: bool) -> list[tuple[str, object]]:
        rows = [("single_round_bound_bits", self.single_round_bound_bits),
                ("measure", self.measure), ("parties", self.parties),
                ("chsh_used", self.chsh_used), ("method", self.method)]
        if full:
            rows += [("guessing_probability", self.guessing_probability),
                     ("level", self.level), ("inputs", self.inputs),
                     ("fallback_reason", self.fallback_reason)]
        return rows

    # Names of earlier versions (read-only).
    entropy_bits = property(lambda self: self.single_round_bound_bits)
    h_min_bits = property(lambda self: self.single_round_bound_bits
                          if self.measure == "min" else None)
    h_vn_bits = property(lambda self: self.single_round_bound_bits
                         if self.measure == "vn" else None)
    chsh = property(lambda self: self.chsh_used)


def _make(measure, parties, value, *, chsh=None, **kw) -> EntropyBound:
    return EntropyBound(measure=measure, parties=parties, single_round_bound_bits=value,
                        chsh_used=chsh, **kw)


def _clamped(chsh: float | None) -> float | None:
    from dicert.entropy.analytic import clamp_chsh

    return None if chsh is None else float(clamp_chsh(chsh))


# long: mostly its signature and numpydoc docstring (about 60 lines)
def bound_entropy(
    *,
    chsh: float | None = None,
    parties: str = "A",
    measure: str = "min",
    level: str = "1+AB",
    correlators=None,
    bell: tuple[Any, float] | None = None,
    inputs: tuple[int, int] = (0, 0),
    tolerance: float = 0.0,
    method: str = "auto",
    fallback: str = "analytic",
) -> EntropyBound:
    """Certified per-round entropy lower bound from Bell data (the recipe).

    Give exactly one of ``chsh`` (CHSH value S), ``bell`` ((16 coefficients c[x][y][a][b],
    value): the functional is at least value) or ``correlators``
    (:class:`dicert.entropy.npa.Correlators`, observed full statistics).

    Parameters
    ----------
    parties : {"A", "AB"}
        Entropy of Alice's outcome or of the pair of outcomes.
    measure : {"min", "vn"}
        Min-entropy (from a certified guessing probability) or von Neumann entropy.
    level : {"1", "1+AB", "2"}
        NPA level for SDP methods.
    inputs : (int, int)
        Inputs (x*, y*) whose outcomes are certified (SDP methods).
    tolerance : float
        Slack on each observed correlator (correlators only).
    method : {"auto", "analytic", "npa", "table", "radau", "radau-table"}
        ``auto``: the closed form where it is tight (one party from CHSH; von Neumann), the
        dual-certified SDP otherwise; for the pair's von Neumann entropy from a CHSH value,
        the shipped Gauss-Radau quadrature lines (at least the one-party bound).
        ``radau``: solve the quadrature SDPs at this CHSH value (von Neumann only; about a
        minute on two cores); ``radau-table``: the shipped certified lines
        (:mod:`dicert.entropy.vnquad`, Brown, Fawzi & Fawzi 2024).
    fallback : {"analytic", "raise"}
        On solver failure (not infeasibility), fall back to the analytic CHSH bound (recorded
        in ``method`` and ``fallback_reason``) or raise :class:`SolverError`.

    Notes
    -----
    - S <= 2 gives 0; S above 2*sqrt(2) is clamped to the maximum (a fluctuation).
    - The one-party analytic min-entropy f(S) = 1 - log2(1 + sqrt(2 - S^2/4)) [1] holds for
      either input of Alice and is also a (loose) bound for the pair.
    - von Neumann: the analytic bound 1 - h(1/2 + 1/2 sqrt(S^2/4 - 1)) [2, 3] is for one party.
      For the pair we use ``max(H(A|E) bound, H_min(AB|E) bound)``: both are valid because
      H(AB|E) >= H(A|E) (strong subadditivity / chain rule, as AB contains A) and the von
      Neumann entropy is never below the min-entropy; the maximum of two convex bounds stays
      convex.
    - SDP bounds come from exactly checked dual certificates (:mod:`dicert.entropy.npa`).

    References
    ----------
    .. [1] Pironio et al., Nature 464, 1021 (2010).
    .. [2] Acin et al., PRL 98, 230501 (2007).
    .. [3] Pironio et al., New J. Phys. 11, 045021 (2009).
    .. [4] Navascues, Pironio, Acin, PRL 98, 010401 (2007); NJP 10, 073013 (2008).
    .. [5] Nieto-Silleras, Pironio, Silman, NJP 16, 013035 (2014); Bancal, Sheridan,
       Scarani, NJP 16, 033011 (2014).
    """
    if measure not in MEASURES:
        raise ParameterError(f"measure: expected 'min' or 'vn', got {measure!r}")
    if parties not in PARTIES:
        raise ParameterError(f"parties: expected 'A' or 'AB', got {parties!r}")
    if method not in METHODS:
        raise ParameterError(f"method: expected one of {', '.join(METHODS)}, got {method!r}")
    if fallback not in ("analytic", "raise"):
        raise ParameterError(f"fallback: expected 'analytic' or 'raise', got {fallback!r}")
    given = [n for n, v in (("chsh", chsh), ("bell", bell), ("correlators", correlators)) if v is not None]
    if len(given) != 1:
        raise ParameterError("give exactly one of chsh, bell or correlators")
    if chsh is not None:
        chsh = float(chsh)
        if not math.isfinite(chsh):
            raise ParameterError(f"chsh: expected a finite number, got {chsh!r}")
    inputs = (int(inputs[0]), int(inputs[1]))
    chsh_input = chsh if chsh is not None else (correlators.chsh if correlators is not None else None)

    if measure == "min" and method in ("radau", "radau-table"):
        raise ParameterError(f"method {method!r} bounds the von Neumann entropy; use measure 'vn'")
    if measure == "vn":
        return _bound_vn(
            chsh=chsh, chsh_input=chsh_input, parties=parties, level=level,
            correlators=correlators, bell=bell, inputs=inputs, tolerance=tolerance,
            method=method, fallback=fallback,
        )
    return _bound_min(
        chsh=chsh, chsh_input=chsh_input, parties=parties, level=level, correlators=correlators,
        bell=bell, inputs=inputs, tolerance=tolerance, method=method, fallback=fallback,
    )


def _analytic_min(parties, chsh_input, inputs, level, reason=None) -> EntropyBound:
    from dicert.entropy.analytic import guessing_probability_single, min_entropy_single

    s = _clamped(chsh_input)
    h = float(min_entropy_single(s))
    note = (
        "one-party bound max_a P(a|x) <= (1 + sqrt(2 - S^2/4))/2, valid for either input"
        + ("; used for the pair via P(ab|xy) <= P(a|x) (loose)" if parties == "AB" else "")
    )
    return _make(
        "min", parties, h,
        guessing_probability=float(guessing_probability_single(s)),
        chsh=s, chsh_input=chsh_input,
        method="analytic" if reason is None else "analytic-fallback",
        level=None, inputs=inputs, fallback_reason=reason,
        assumptions=(_ASSUME_QUANTUM, note, "S <= 2 gives 0; S above 2*sqrt(2) clamped"),
        references=(_REF_PIRONIO2010,),
    )


def _bound_min(*, chsh, chsh_input, parties, level, correlators, bell, inputs, tolerance,
               method, fallback) -> EntropyBound:
    if method == "auto":
        method = "analytic" if (chsh is not None and parties == "A") else "npa"
    if method == "analytic":
        if chsh_input is None:
            raise ParameterError("method 'analytic' needs a CHSH value (or correlators)")
        return _analytic_min(parties, chsh_input, inputs, level)
    if method == "table":
        if chsh is None:
            raise ParameterError("method 'table' needs a CHSH value")
        if inputs != (0, 0):
            raise ParameterError("method 'table' covers inputs (0, 0) only")
        from dicert.entropy.table import load_table

        tab = load_table()
        if level != tab.level:
            raise ParameterError(f"level: the table is at level {tab.level!r}, got {level!r}")
        lk = tab.lookup(chsh, parties)
        return _make(
            "min", parties, lk.single_round_bound_bits,
            guessing_probability=lk.guessing_probability,
            chsh=lk.chsh, chsh_input=chsh, method="table", level=tab.level, inputs=inputs,
            table={"sha256": tab.sha256, "piece": lk.piece, "grid_chsh": lk.grid_chsh},
            assumptions=(
                _ASSUME_QUANTUM,
                "adversary with quantum side information, single round, CHSH >= the given value",
                "affine dual certificates from a precomputed table, each valid for every S",
            ),
            references=(_REF_PIRONIO2010, _REF_NPA, _REF_KRS2009),
        )
    # method == "npa"
    from dicert.entropy.npa import guessing_probability, min_entropy_from_guessing

    try:
        cert = guessing_probability(
            parties=parties, inputs=inputs, bell=bell, chsh=chsh, correlators=correlators,
            tolerance=tolerance, level=level,
        )
    except SolverError as exc:
        infeasible = (exc.status or "").startswith("unbounded")
        if fallback == "raise" or infeasible or chsh_input is None or bell is not None:
            raise
        return _analytic_min(parties, chsh_input, inputs, level, reason=str(exc))
    h = min_entropy_from_guessing(cert.upper_bound)
    refs = [_REF_NPA, _REF_PIRONIO2010, _REF_KRS2009]
    if correlators is not None:
        refs += [_REF_NSPS2014, _REF_BSS2014]
    constraint = (
        "CHSH >= the given value" if chsh is not None
        else "Bell functional >= the given value" if bell is not None
        else f"full correlators equal to the observed values (tolerance {tolerance}); these "
        "are point estimates: no finite-statistics margin is applied here (the finite-size "
        "stage does that)"
    )
    return _make(
        "min", parties, h,
        guessing_probability=min(1.0, cert.upper_bound),
        chsh=_clamped(chsh_input) if chsh_input is not None else None,
        chsh_input=chsh_input, method="npa-dual-certified", level=level, inputs=inputs,
        certificate=cert,
        assumptions=(
            _ASSUME_QUANTUM,
            f"adversary with quantum side information, single round, constraint: {constraint}",
            "bound from an exactly verified dual certificate of the NPA relaxation",
        ),
        references=tuple(refs),
    )


def _bound_vn(*, chsh, chsh_input, parties, level, correlators, bell, inputs, tolerance,
              method, fallback) -> EntropyBound:
    from dicert.entropy.analytic import vn_entropy_single

    if chsh_input is None:
        raise ParameterError(
            "measure 'vn' needs a CHSH value or correlators (only the CHSH bound is available)"
        )
    if method == "table" and parties == "A":
        raise ParameterError("method 'table' gives min-entropy; use measure 'min'")
    if method in ("radau", "radau-table") or (method == "auto" and parties == "AB"
                                              and chsh is not None):
        return _bound_vn_radau(chsh_input=chsh_input, chsh=chsh, parties=parties,
                               inputs=inputs, method=method)
    s = _clamped(chsh_input)
    h_a = float(vn_entropy_single(s))
    base = dict(
        chsh=s, chsh_input=chsh_input, inputs=inputs,
        references=(_REF_ACIN2007, _REF_PIRONIO2009),
    )
    assume_a = (
        _ASSUME_QUANTUM,
        "von Neumann entropy of one party's outcome given quantum side information for a round "
        "with CHSH value S (Acin 2007 / Pironio 2009 bound)",
        "S <= 2 gives 0; S above 2*sqrt(2) clamped",
    )
    if parties == "A" or method == "analytic":
        extra = () if parties == "A" else ("pair bounded by one party: H(AB|E) >= H(A|E)",)
        return _make("vn", parties, h_a, guessing_probability=None, method="analytic",
                     level=None, assumptions=assume_a + extra, **base)
    pair_min = _bound_min(
        chsh=chsh, chsh_input=chsh_input, parties="AB", level=level, correlators=correlators,
        bell=bell, inputs=inputs, tolerance=tolerance,
        method="table" if method == "table" else "npa", fallback=fallback,
    )
    h = max(h_a, pair_min.single_round_bound_bits)
    return _make(
        "vn", parties, h, guessing_probability=None,
        method=f"max(analytic-vn-A, {pair_min.method}-min-AB)", level=pair_min.level,
        certificate=pair_min.certificate, table=pair_min.table,
        fallback_reason=pair_min.fallback_reason,
        assumptions=assume_a + (
            "H(AB|E) >= max(H(A|E), H_min(AB|E)): AB contains A, and von Neumann entropy is at "
            "least the min-entropy",
        ) + pair_min.assumptions[1:],
        chsh=s, chsh_input=chsh_input, inputs=inputs,
        references=(_REF_ACIN2007, _REF_PIRONIO2009) + pair_min.references,
    )


def _bound_vn_radau(*, chsh_input, chsh, parties, inputs, method) -> EntropyBound:
    from fractions import Fraction

    from dicert.entropy.analytic import vn_entropy_single
    from dicert.entropy.vnquad import _round_down, certified_line, load_vn_table

    if chsh is None:
        raise ParameterError("the quadrature methods need a CHSH value (--chsh)")
    s = _clamped(chsh_input)
    w = 0.5 + s / 8.0
    if method == "radau":
        qb = certified_line(w, parties=parties)
        h = max(0.0, _round_down(Fraction(qb.offset) + Fraction(qb.slope) * Fraction(w)))
        quad = {"offset": qb.offset, "slope": qb.slope, "w0": qb.w0, "nodes": qb.nodes,
                "relaxation": qb.level, "per_node": list(qb.node_bounds), "source": "solved"}
        name = "radau-dual-certified"
    else:
        tab = load_vn_table()
        h, k = tab.bound(w, parties)
        w0, off, sl = tab.lines[parties][k]
        quad = {"offset": off, "slope": sl, "w0": w0, "nodes": tab.nodes,
                "relaxation": tab.level, "table_sha256": tab.sha256, "line": k,
                "source": "table"}
        name = "radau-table"
    assume = (
        _ASSUME_QUANTUM,
        "von Neumann entropy of "
        + ("the pair (A, B)" if parties == "AB" else "Alice's outcome")
        + " given quantum side information, for any quantum strategy with CHSH win "
        "probability w = 1/2 + S/8 (affine certified line, valid for every w; by the CHSH "
        "symmetry it holds for every input pair)",
        "bound from exactly verified dual certificates of one NPA-type relaxation per "
        "Gauss-Radau node; the quadrature under-approximates the logarithm",
    )
    refs = (_REF_BFF2024, _REF_NPA)
    if method == "auto":
        h_a = float(vn_entropy_single(s))
        if h_a > h:
            h = h_a
        name = "max(analytic-vn-A, radau-table)"
        refs = (_REF_BFF2024, _REF_NPA, _REF_ACIN2007, _REF_PIRONIO2009)
    return _make("vn", parties, h, guessing_probability=None, chsh=s, chsh_input=chsh_input,
                 method=name, level=quad["relaxation"], inputs=inputs, quadrature=quad,
                 assumptions=assume, references=refs)


def pair_min_entropy_bound(chsh: float) -> float:
    """Certified, convex, non-decreasing lower bound on H_min(AB|E) per round (bits).

    Table-based (see :mod:`dicert.entropy.table`); NPA level 1+AB, inputs (0, 0).
    """
    from dicert.entropy.table import pair_min_entropy_bound as _f

    return _f(chsh)


def single_min_entropy_bound(chsh: float) -> float:
    """Certified lower bound on H_min(A|E) per round from the table (NPA level 1+AB)."""
    from dicert.entropy.table import single_min_entropy_bound as _f

    return _f(chsh)


__all__ = [
    "METHODS",
    "EntropyBound",
    "bound_entropy",
    "pair_min_entropy_bound",
    "single_min_entropy_bound",
]
