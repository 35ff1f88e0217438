"""Interpolated modified Kneser-Ney (Chen & Goodman 1998), orders 1..3, from count arrays.

The same definition as the plain-dict oracle :mod:`nextword.reference_kn` (which is
checked against nltk and by hand); this one works on arrays so it can fit millions of
n-grams and produce what a model file stores. Stored values are the *adjusted* counts:
raw counts at the highest order and for n-grams that start with ``<s>``, continuation
counts (distinct left extensions) below. Three discounts per order come from that
order's count-of-counts, with the oracle's stated fallbacks.
"""

from __future__ import annotations

from collections import Counter
from typing import Any, ClassVar, Sequence

import numpy as np

from ..errors import InvalidArgumentError
from ..ngrams import NgramCounts
from ..reference_kn import Discounts, fit_discounts
from .base import Estimator, Fitted, Level

__all__ = ["KneserNey", "FittedKneserNey", "unigram_floor"]


def adjusted_values(counts: NgramCounts) -> list[np.ndarray]:
    """Adjusted count of every stored n-gram, per order (see the module docstring)."""
    out: list[np.ndarray] = []
    order = counts.order
    for m in range(1, order + 1):
        grams, raw = counts.grams[m - 1], counts.counts[m - 1]
        if m == order:
            out.append(raw.copy())
            continue
        # every upper n-gram (u, …) is distinct, so the number of distinct left extensions
        # of a suffix is the number of upper rows ending in it: one lookup per row + a bincount
        # (no sort of the suffixes, which are not in order)
        suffix = counts.grams[m][:, 1:]
        value = np.zeros(len(grams), np.int64)
        if len(suffix):
            idx = _rows_index(grams, suffix, counts.bos + 1)
            value = np.bincount(idx, minlength=len(grams)).astype(np.int64)
        starts_bos = grams[:, 0] == counts.bos
        value[starts_bos] = raw[starts_bos]
        if int((value < 1).sum()):
            raise InvalidArgumentError(f"order {m}: an n-gram has no left extension; counts are inconsistent")
        out.append(value)
    return out


def _rows_index(table: np.ndarray, rows: np.ndarray, base: int) -> np.ndarray:
    """Positions of ``rows`` (each present) in the sorted ``table``, by packed integer keys."""
    def pack(a: np.ndarray) -> np.ndarray:
        key = np.zeros(len(a), np.int64)
        for c in range(a.shape[1]):
            key = key * base + a[:, c]
        return key

    tk, rk = pack(table), pack(rows)
    pos = np.searchsorted(tk, rk)
    if len(rk) and (int(pos.max()) >= len(tk) or not bool((tk[pos] == rk).all())):
        raise InvalidArgumentError("a suffix n-gram is missing from the lower order; counts are inconsistent")
    return pos


class FittedKneserNey(Fitted):
    name: ClassVar[str] = "kn"

    def __init__(self, counts: NgramCounts, levels: list[Level], discounts: list[Discounts], fallbacks: dict[int, str]) -> None:
        super().__init__(counts, levels)
        self.discounts = discounts  # discounts[m-1] for order m
        self.fallbacks = fallbacks
        self._d = [np.asarray([0.0, d.d1, d.d2, d.d3]) for d in discounts]

    def alpha(self, m: int, j: int, i: int) -> float:
        lev = self.levels[m - 1]
        a = int(lev.value[i])
        return max(a - self.discounts[m - 1].of(a), 0.0) / int(lev.ctx_total[j])

    def gamma(self, m: int, j: int) -> float:
        lev = self.levels[m - 1]
        d = self.discounts[m - 1]
        n1, n2, n3 = (int(x) for x in lev.ctx_n123[j])
        dropped = int(lev.ctx_total[j]) - lev.kept_total(j)
        if dropped:  # a pruned context: the whole value of each dropped n-gram backs off
            return (d.d1 * n1 + d.d2 * n2 + d.d3 * n3 + dropped) / int(lev.ctx_total[j])
        return (d.d1 * n1 + d.d2 * n2 + d.d3 * n3) / int(lev.ctx_total[j])

    def alphas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        owner = np.repeat(np.arange(len(lev.ctx)), np.diff(lev.ctx_start))
        d = self._d[m - 1]
        a = lev.value
        disc = d[np.minimum(a, 3)]
        return np.asarray(np.maximum(a - disc, 0.0) / lev.ctx_total[owner], dtype=np.float64)

    def gammas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        d = self.discounts[m - 1]
        n = lev.ctx_n123
        num = d.d1 * n[:, 0] + d.d2 * n[:, 1] + d.d3 * n[:, 2]
        dropped = lev.dropped()
        num = np.where(dropped == 0, num, num + dropped)
        return np.asarray(num / lev.ctx_total, dtype=np.float64)

    def base(self) -> float:
        return 1.0 / self.n_outcomes

    def params(self) -> dict[str, Any]:
        return {"discounts": [[d.d1, d.d2, d.d3] for d in self.discounts], "fallbacks": dict(self.fallbacks)}


class KneserNey(Estimator):
    """Interpolated modified Kneser-Ney; ``discounts`` fixes one discount per order instead."""

    name: ClassVar[str] = "kn"

    def __init__(self, *, discounts: list[float] | None = None) -> None:
        if discounts is not None and not all(
            isinstance(d, (int, float)) and not isinstance(d, bool) and 0 < d < 1 for d in discounts
        ):
            raise InvalidArgumentError(f"discounts must be numbers in (0, 1), got {discounts!r}")
        self.fixed = discounts

    def fit(self, counts: NgramCounts) -> FittedKneserNey:
        if self.fixed is not None and len(self.fixed) != counts.order:
            raise InvalidArgumentError(f"{len(self.fixed)} discounts given for order {counts.order}")
        values = adjusted_values(counts)
        levels = [Level.of(counts.grams[m], values[m]) for m in range(counts.order)]
        discounts: list[Discounts] = []
        fallbacks: dict[int, str] = {}
        for m, v in enumerate(values, 1):
            if self.fixed is not None:
                d = float(self.fixed[m - 1])
                discounts.append(Discounts(d, d, d))
                continue
            coc = Counter({int(k): int(c) for k, c in zip(*np.unique(v[v <= 4], return_counts=True))})
            fitted, why = fit_discounts(coc)
            discounts.append(fitted)
            if why is not None:
                fallbacks[m] = why
        return FittedKneserNey(counts, levels, discounts, fallbacks)


def unigram_floor(values: np.ndarray, d: Sequence[float], total: int) -> np.ndarray:
    """P₁ of every outcome from the unigram level's adjusted counts (length n_words + 2).

    P₁(w) = max(a − D(a), 0)/A + γ₀ · 1/(n+2), γ₀ = (D₁n₁ + D₂n₂ + D₃n₃)/A, evaluated in the
    operation order of :meth:`nextword.reference_kn.DictKneserNey.prob_key`, so the model
    file's id order (by this floor, ties by key) and the queries use the same numbers.
    """
    a = np.asarray(values, dtype=np.int64)
    disc = np.where(a >= 3, d[2], np.where(a >= 2, d[1], np.where(a >= 1, d[0], 0.0)))
    alpha1 = np.maximum(a - disc, 0.0) / total
    n1, n2, n3 = int((a == 1).sum()), int((a == 2).sum()), int((a >= 3).sum())
    g0 = (d[0] * n1 + d[1] * n2 + d[2] * n3) / total
    return np.asarray(alpha1 + g0 * (1.0 / len(a)), dtype=np.float64)
