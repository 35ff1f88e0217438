"""The estimator interface: fit stored values from counts, score a word after a context.

Every estimator here is an *interpolated* one, so a probability has the same shape at
every order m (context h of m−1 tokens, h′ = h without its first token):

    P_m(w | h) = α_m(h w) + γ_m(h) · P_{m−1}(w | h′)        P_0 = the floor's base

α ≥ 0 is the estimator's own mass for a stored n-gram (0 when h w was not stored),
γ_m(h) the weight left for the lower order (1 when h was never seen as a context). What
is stored per order is estimator-neutral: the n-grams, one integer *value* each (raw
counts for Jelinek-Mercer, adjusted counts for Kneser-Ney), and per context the sum of
its values and the number of its n-grams whose value is 1, 2 and ≥ 3. From those, α and
γ are computed at query time by the estimator's formulas (this is the exact codec;
docs/SEAMS.md says how a quantised codec stores α and γ directly instead).
The *floor* P_1 over the outcomes orders the candidates of a prefix (ids rank by it) and
bounds every word's score from below (see docs/SEAMS.md).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass
from typing import Any, ClassVar

import numpy as np

from ..errors import InvalidArgumentError
from ..ngrams import NgramCounts, group_starts

__all__ = ["Estimator", "Fitted", "Level"]


@dataclass(frozen=True)
class Level:
    """What one order m stores: n-grams, their values, and per-context sums."""

    grams: np.ndarray  # (k, m) int64, sorted
    value: np.ndarray  # (k,) int64 >= 1
    ctx: np.ndarray  # (j, m-1) int64, sorted distinct contexts
    ctx_start: np.ndarray  # (j+1,) offsets of each context's block in grams
    ctx_total: np.ndarray  # (j,) int64: sum of values
    ctx_n123: np.ndarray  # (j, 3) int64: n-grams with value 1, 2, >= 3

    @classmethod
    def of(cls, grams: np.ndarray, value: np.ndarray) -> Level:
        m = grams.shape[1]
        starts = group_starts(grams[:, : m - 1])
        ctx = grams[starts[:-1], : m - 1] if len(grams) else np.zeros((0, m - 1), np.int64)
        total = np.add.reduceat(value, starts[:-1]) if len(grams) else np.zeros(0, np.int64)
        n123 = np.zeros((len(ctx), 3), np.int64)
        if len(grams):
            owner = np.repeat(np.arange(len(ctx)), np.diff(starts))
            for j, mask in enumerate((value == 1, value == 2, value >= 3)):
                n123[:, j] = np.bincount(owner[mask], minlength=len(ctx))
        return cls(grams, value, ctx, starts, total.astype(np.int64), n123)

    def find_context(self, h: tuple[int, ...]) -> int:
        """Index of context ``h`` in :attr:`ctx`, or −1."""
        if len(self.ctx) == 0:
            return -1
        if len(h) == 0:
            return 0
        lo, hi = 0, len(self.ctx)
        for col, v in enumerate(h):  # narrow the sorted block column by column
            c = self.ctx[lo:hi, col]
            a = int(np.searchsorted(c, v, "left"))
            b = int(np.searchsorted(c, v, "right"))
            lo, hi = lo + a, lo + b
            if lo >= hi:
                return -1
        return lo

    def kept_total(self, j: int) -> int:
        """Sum of the values stored in context ``j`` (below :attr:`ctx_total` once pruned)."""
        return int(self.value[int(self.ctx_start[j]) : int(self.ctx_start[j + 1])].sum())

    def dropped(self) -> np.ndarray:
        """Per context, the part of its total no longer in stored n-grams (0 unless pruned).

        A pruned level keeps each context's total as estimated on the full data; the mass
        of its dropped n-grams moves to the lower order (see :mod:`nextword.prune`).
        """
        # prefix sums, not reduceat: a context may have an empty block (Model.stored_levels)
        cs = np.concatenate([[0], np.cumsum(self.value, dtype=np.int64)])
        kept = cs[self.ctx_start[1:]] - cs[self.ctx_start[:-1]]
        return np.asarray(self.ctx_total - kept, dtype=np.int64)

    def find(self, j: int, w: int) -> int:
        """Index of n-gram (context j, w) in :attr:`grams`, or −1."""
        s, e = int(self.ctx_start[j]), int(self.ctx_start[j + 1])
        col = self.grams[s:e, -1]
        i = int(np.searchsorted(col, w))
        return s + i if i < len(col) and int(col[i]) == w else -1


class Fitted(ABC):
    """A fitted estimator: stored levels + parameters; scores any word after any context."""

    name: ClassVar[str]

    def __init__(self, counts: NgramCounts, levels: list[Level]) -> None:
        self.n_words = counts.n_words
        self.order = counts.order
        self.levels = levels  # levels[m-1] for order m
        self.bos = counts.bos
        self.n_outcomes = counts.n_outcomes

    @abstractmethod
    def alpha(self, m: int, j: int, i: int) -> float:
        """α_m for the n-gram at index ``i`` of context ``j`` of order m."""

    @abstractmethod
    def gamma(self, m: int, j: int) -> float:
        """γ_m of context ``j`` of order m."""

    @abstractmethod
    def alphas(self, m: int) -> np.ndarray:
        """α_m of every stored n-gram of order m (float64, the scalar :meth:`alpha`'s formula)."""

    @abstractmethod
    def gammas(self, m: int) -> np.ndarray:
        """γ_m of every context of order m (float64, the scalar :meth:`gamma`'s formula)."""

    @abstractmethod
    def base(self) -> float:
        """What the unigram level interpolates with (per outcome), times its γ."""

    @abstractmethod
    def params(self) -> dict[str, Any]:
        """The parameters a file header records (names and values)."""

    def context_of(self, history: tuple[int, ...]) -> tuple[int, ...]:
        """The last order−1 ids of ``history``, never reaching across a sentence start."""
        h = tuple(history)
        if self.bos in h:
            h = h[len(h) - 1 - h[::-1].index(self.bos):]
        return h[-(self.order - 1):] if self.order > 1 else ()

    def prob(self, w: int, history: tuple[int, ...] = ()) -> float:
        """P(w | history) for an outcome id (word, ``</s>`` or ``<unk>``)."""
        if not 0 <= w < self.n_outcomes:
            raise InvalidArgumentError(f"outcome id {w} outside 0..{self.n_outcomes - 1}")
        h = self.context_of(history)
        return self._prob(w, h)

    def _prob(self, w: int, h: tuple[int, ...]) -> float:
        m = len(h) + 1
        lower = self._prob(w, h[1:]) if m > 1 else self.base()
        lev = self.levels[m - 1]
        j = lev.find_context(h)
        if j < 0:
            return lower
        i = lev.find(j, w)
        a = self.alpha(m, j, i) if i >= 0 else 0.0
        return a + self.gamma(m, j) * lower

    def floor(self) -> np.ndarray:
        """P_1 of every outcome (float64, length n_words + 2): orders candidates, bounds scores."""
        out = np.full(self.n_outcomes, self.base())
        lev = self.levels[0]
        if len(lev.ctx):
            g = self.gamma(1, 0)
            out *= g
            for i, w in enumerate(lev.grams[:, 0]):
                out[int(w)] += self.alpha(1, 0, i)
        return out


class Estimator(ABC):
    """A smoothing method: turns raw counts of every order into a :class:`Fitted` model."""

    name: ClassVar[str]

    @abstractmethod
    def fit(self, counts: NgramCounts) -> Fitted:
        """Fit from raw counts (stored values, parameters); never keeps the counts object."""
