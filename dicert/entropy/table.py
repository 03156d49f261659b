"""Precomputed, dual-certified guessing-probability bounds on a grid of CHSH values.

Used only in the valid direction. Each grid point ``s_i`` carries the affine certificate
``U_i(s) = offset_i - slope_i * s`` of an NPA dual solution (see
:meth:`dicert.entropy.npa.NpaCertificate.bound_at`). Because a dual-feasible point does not
depend on the right-hand side of the constraint "CHSH >= s", **each** ``U_i`` upper-bounds the
guessing probability at **every** s (weak duality). Hence

    P_guess(s) <= U(s) := min(1, min_i U_i(s))

for all s, and ``H_min(s) >= -log2 U(s)``. ``U`` is a minimum of affine functions, so it is
concave and piecewise linear; ``-log2 U`` is therefore convex (a convex non-increasing function
of a concave one), so the bound is convex-compatible: tangents and Jensen's inequality apply to
it. Note this is NOT chord interpolation of the grid values (chords of the convex entropy curve
lie above it and are not valid lower bounds); at a grid point ``U`` equals the certified value
there, and between grid points it is at most the value at the grid point below (slopes are
>= 0), so it is never weaker than the "nearest grid point below" rule.

The table is computed by ``python -m dicert.entropy.table`` (see :func:`build_table`) and
shipped as ``dicert/data/entropy_chsh_table.json``. The grid is uniform in
``u = sqrt(S_max - S)``, which packs points near the Tsirelson bound where the curve is steep.

References
----------
.. [1] S. Boyd, L. Vandenberghe, "Convex Optimization", Cambridge University Press (2004),
   sec. 3.2.3 (pointwise minimum of affine functions is concave), sec. 3.2.4 (composition
   rules), sec. 5.2 (weak duality).
.. [2] S. Pironio et al., "Random numbers certified by Bell's theorem", Nature 464,
   1021-1024 (2010) (guessing probability against quantum adversaries via NPA).
"""

from __future__ import annotations

import dataclasses
import functools
import hashlib
import json
import math
from fractions import Fraction
from importlib import resources
from pathlib import Path

import numpy as np

from dicert.errors import ParameterError

TABLE_FORMAT = "dicert-entropy-table/1"
TABLE_FILE = "entropy_chsh_table.json"
DEFAULT_POINTS = 121


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class TableLookup:
    """Result of a table lookup.

    ``guessing_probability`` is the certified upper bound at ``chsh``; ``single_round_bound_bits``
    the matching lower bound (rounded down); ``piece`` the index of the active affine piece and
    ``grid_chsh`` its grid point.
    """

    chsh: float
    parties: str
    guessing_probability: float
    single_round_bound_bits: float
    piece: int
    grid_chsh: float
    level: str
    table_sha256: str

    #: Name of earlier versions (read-only).
    min_entropy_bits = property(lambda self: self.single_round_bound_bits)


@dataclasses.dataclass(frozen=True, slots=True, kw_only=True)
class EntropyTable:
    """Affine guessing-probability certificates on a CHSH grid, for parties "A" and "AB"."""

    level: str
    chsh: tuple[float, ...]
    pieces: dict  # parties -> (offsets tuple, slopes tuple)
    sha256: str
    meta: dict

    def guessing_bound(self, chsh: float, parties: str = "AB") -> tuple[float, int]:
        """Certified upper bound on the guessing probability at ``chsh`` and the active piece.

        ``chsh`` is clamped to the table's range top (a value above Tsirelson's bound is a
        fluctuation); below 2 the bound is 1.
        """
        if parties not in self.pieces:
            raise ParameterError(f"parties: expected one of {sorted(self.pieces)}, got {parties!r}")
        s = float(chsh)
        if not math.isfinite(s):
            raise ParameterError(f"chsh: expected a finite number, got {chsh!r}")
        s = min(s, self.chsh[-1])
        offsets, slopes = self.pieces[parties]
        vals = np.asarray(offsets) - np.asarray(slopes) * s
        i = int(np.argmin(vals))
        # every piece is valid; evaluate the chosen one exactly and round up
        q = Fraction(offsets[i]) - Fraction(slopes[i]) * Fraction(s)
        f = float(q)
        if Fraction(f) < q:
            f = math.nextafter(f, math.inf)
        return min(1.0, f), i

    def lookup(self, chsh: float, parties: str = "AB") -> TableLookup:
        """Certified guessing probability and min-entropy at ``chsh`` (see module docstring)."""
        from dicert.entropy.npa import min_entropy_from_guessing

        u, i = self.guessing_bound(chsh, parties)
        return TableLookup(
            chsh=min(float(chsh), self.chsh[-1]),
            parties=parties,
            guessing_probability=u,
            single_round_bound_bits=min_entropy_from_guessing(u),
            piece=i,
            grid_chsh=self.chsh[i],
            level=self.level,
            table_sha256=self.sha256,
        )

    def min_entropy(self, chsh, parties: str = "AB"):
        """Vectorised certified min-entropy lower bound (bits) at one or many CHSH values."""
        s = np.asarray(chsh, dtype=float)
        out = np.array([self.lookup(float(v), parties).single_round_bound_bits for v in s.ravel()])
        out = out.reshape(s.shape)
        return float(out) if out.ndim == 0 else out

    def tangent(self, chsh: float, parties: str = "AB") -> tuple[float, float]:
        """A line ``(value, slope)`` with ``H_min(s) >= value + slope * (s - chsh)`` for ALL s.

        It is a tangent of the convex function ``-log2 U(s)`` (slope taken on the active
        piece, a subgradient), lowered by a small safety term that covers float rounding for
        |s - chsh| <= 4. Useful for min-tradeoff functions.
        """
        u, i = self.guessing_bound(chsh, parties)
        from dicert.entropy.npa import min_entropy_from_guessing

        h = min_entropy_from_guessing(u)
        if u >= 1.0:
            return 0.0, 0.0
        slope = self.pieces[parties][1][i] / (u * math.log(2.0))
        safety = 1e-12 * (1.0 + abs(slope))
        return h - safety, slope


def _file_path() -> Path:
    return Path(str(resources.files("dicert").joinpath("data", TABLE_FILE)))


@functools.lru_cache(maxsize=4)
def load_table(path: str | None = None) -> EntropyTable:
    """Load the shipped table (or one at ``path``); cached."""
    p = Path(path) if path is not None else _file_path()
    try:
        raw = p.read_bytes()
    except FileNotFoundError:
        raise ParameterError(
            f"{p}: entropy table missing; rebuild it with `python -m dicert.entropy.table`"
        ) from None
    try:
        d = json.loads(raw)
        if d.get("format") != TABLE_FORMAT:
            raise ValueError(f"format {d.get('format')!r}, expected {TABLE_FORMAT!r}")
        chsh = tuple(float(v) for v in d["chsh"])
        pieces = {}
        for parties, entry in d["pieces"].items():
            off = tuple(float(v) for v in entry["offset"])
            slo = tuple(float(v) for v in entry["slope"])
            if len(off) != len(chsh) or len(slo) != len(chsh) or min(slo) < 0:
                raise ValueError(f"pieces.{parties}: inconsistent lengths or negative slope")
            pieces[parties] = (off, slo)
    except (ValueError, KeyError, TypeError) as exc:
        raise ParameterError(f"{p}: invalid entropy table: {exc}") from None
    return EntropyTable(
        level=str(d["level"]),
        chsh=chsh,
        pieces=pieces,
        sha256=hashlib.sha256(raw).hexdigest(),
        meta=dict(d.get("meta", {})),
    )


def table_grid(points: int = DEFAULT_POINTS) -> np.ndarray:
    """CHSH grid from 2 to just below 2*sqrt(2), uniform in sqrt(S_max - S)."""
    from dicert.entropy.npa import CHSH_CEILING

    if points < 2:
        raise ParameterError("points must be at least 2")
    umax = math.sqrt(CHSH_CEILING - 2.0)
    u = umax * (1.0 - np.arange(points) / (points - 1))
    s = CHSH_CEILING - u * u
    s[0] = 2.0
    s[-1] = CHSH_CEILING
    return s


def build_table(points: int = DEFAULT_POINTS, level: str = "1+AB", progress=None) -> dict:
    """Solve and certify the NPA guessing problems on the grid; return the JSON document."""
    import cvxpy

    from dicert import __version__
    from dicert.entropy.npa import guessing_probability

    grid = table_grid(points)
    pieces = {}
    for parties in ("A", "AB"):
        off, slo, ub = [], [], []
        for k, s in enumerate(grid):
            c = guessing_probability(parties=parties, chsh=float(s), level=level)
            off.append(c.offset)
            slo.append(c.slope["bell"])
            ub.append(c.upper_bound)
            if progress is not None:
                progress(parties, k, len(grid))
        pieces[parties] = {"offset": off, "slope": slo, "upper_bound_at_grid": ub}
    return {
        "format": TABLE_FORMAT,
        "level": level,
        "chsh": [float(v) for v in grid],
        "pieces": pieces,
        "meta": {
            "description": (
                "Affine dual certificates U_i(S) = offset_i - slope_i * S bounding the "
                "guessing probability of one party's outcome (A, input 0) or the pair (AB, "
                "inputs 0,0) for any quantum box with CHSH >= S (NPA level " + level + ")."
            ),
            "generator": "python -m dicert.entropy.table",
            "dicert_version": __version__,
            "cvxpy_version": cvxpy.__version__,
            "grid": "uniform in sqrt(S_max - S), S_max = nextafter(2*sqrt(2), 0)",
        },
    }


def write_table(path: str | Path | None = None, points: int = DEFAULT_POINTS) -> Path:
    """Build the table and write it atomically (default: the packaged data file)."""
    from dicert._io import atomic_write_bytes

    p = Path(path) if path is not None else _file_path()
    doc = build_table(points)
    atomic_write_bytes(p, (json.dumps(doc, indent=1, sort_keys=True) + "\n").encode())
    load_table.cache_clear()
    return p


def pair_min_entropy_bound(chsh: float) -> float:
    """Certified lower bound (bits) on H_min(AB|E) per round at CHSH value ``chsh``.

    From the shipped table (NPA level 1+AB, generation inputs (0, 0)); valid for any quantum
    box with CHSH >= chsh against quantum side information; convex and non-decreasing in
    ``chsh`` (see the module docstring). 0 for chsh <= 2; clamped at the Tsirelson bound.
    """
    return load_table().lookup(chsh, "AB").single_round_bound_bits


def single_min_entropy_bound(chsh: float) -> float:
    """Table-based certified lower bound on H_min(A|E) per round (NPA level 1+AB, input 0)."""
    return load_table().lookup(chsh, "A").single_round_bound_bits


__all__ = [
    "TABLE_FORMAT",
    "EntropyTable",
    "TableLookup",
    "build_table",
    "load_table",
    "pair_min_entropy_bound",
    "single_min_entropy_bound",
    "table_grid",
    "write_table",
]


if __name__ == "__main__":  # pragma: no cover
    out = write_table()
    print(f"wrote {out}")
