"""Words in the measurement operators of the NPA hierarchy: reduction, products, the moment
matrix structure of each level.

Part of :mod:`dicert.entropy.npa` (import the names from there).
"""

from __future__ import annotations

import dataclasses
import functools
from collections.abc import Sequence

import numpy as np

from dicert.errors import ParameterError


LEVELS = ("1", "1+AB", "2")

# ---------------------------------------------------------------------------------------------
# Words and moment matrices
# ---------------------------------------------------------------------------------------------

Word = tuple[tuple[int, ...], tuple[int, ...]]  # (Alice's word, Bob's word)
IDENTITY: Word = ((), ())


def _reduce(seq: Sequence[int]) -> tuple[int, ...]:
    """Cancel adjacent repeats (X^2 = 1 for +-1 observables)."""
    out: list[int] = []
    for s in seq:
        if out and out[-1] == s:
            out.pop()
        else:
            out.append(s)
    return tuple(out)


def _canonical(w: Word) -> Word:
    adj = (tuple(reversed(w[0])), tuple(reversed(w[1])))
    return min(w, adj)


def _product(wi: Word, wj: Word) -> Word:
    """Canonical word of O_i^dagger O_j (Alice's and Bob's operators commute)."""
    a = _reduce(tuple(reversed(wi[0])) + wj[0])
    b = _reduce(tuple(reversed(wi[1])) + wj[1])
    return _canonical((a, b))


def _operators(level: str) -> list[Word]:
    ops: list[Word] = [IDENTITY, ((0,), ()), ((1,), ()), ((), (0,)), ((), (1,))]
    if level in ("1+AB", "2"):
        ops += [((x,), (y,)) for x in (0, 1) for y in (0, 1)]
    if level == "2":
        ops += [((0, 1), ()), ((1, 0), ()), ((), (0, 1)), ((), (1, 0))]
    return ops


@dataclasses.dataclass(frozen=True, slots=True)
class MomentStructure:
    """Index bookkeeping of one NPA level.

    ``words[k]`` is the k-th distinct moment (``words[0]`` is the identity), and
    ``positions[k]`` the (i, j) entries of the moment matrix that hold it.
    """

    level: str
    operators: tuple[Word, ...]
    words: tuple[Word, ...]
    positions: tuple[tuple[tuple[int, int], ...], ...]
    index: dict

    @property
    def size(self) -> int:
        return len(self.operators)

    @property
    def n_moments(self) -> int:
        return len(self.words)

    def adjoint_map(self) -> np.ndarray:
        """Matrix M (n_moments x size^2) with (M vec(Z))_k = sum of Z over positions[k]."""
        d = self.size
        m = np.zeros((self.n_moments, d * d))
        for k, pos in enumerate(self.positions):
            for i, j in pos:
                m[k, i * d + j] += 1.0
        return m


@functools.lru_cache(maxsize=None)
def moment_structure(level: str) -> MomentStructure:
    """The moment-matrix layout for NPA ``level`` ("1", "1+AB" or "2")."""
    if level not in LEVELS:
        raise ParameterError(f"level: expected one of {', '.join(LEVELS)}, got {level!r}")
    ops = _operators(level)
    index: dict[Word, int] = {IDENTITY: 0}
    words: list[Word] = [IDENTITY]
    pos: dict[int, list[tuple[int, int]]] = {0: []}
    for i, wi in enumerate(ops):
        for j, wj in enumerate(ops):
            w = _product(wi, wj)
            if w not in index:
                index[w] = len(words)
                words.append(w)
                pos[index[w]] = []
            pos[index[w]].append((i, j))
    # every diagonal entry is the identity moment (O^dagger O = 1 for products of +-1 observables):
    # this is what justifies |moment| <= q_e in the certificate.
    assert sorted(pos[0]) == [(i, i) for i in range(len(ops))]
    for w in (((0,), ()), ((1,), ()), ((), (0,)), ((), (1,))) + tuple(
        ((x,), (y,)) for x in (0, 1) for y in (0, 1)
    ):
        assert w in index
    return MomentStructure(
        level=level,
        operators=tuple(ops),
        words=tuple(words),
        positions=tuple(tuple(pos[k]) for k in range(len(words))),
        index=index,
    )


def _a(x: int) -> Word:
    return ((x,), ())


def _b(y: int) -> Word:
    return ((), (y,))


def _ab(x: int, y: int) -> Word:
    return ((x,), (y,))
