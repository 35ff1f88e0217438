"""Jelinek-Mercer interpolation of orders 1..3: λ per order (per bucket of context counts).

    P_m(w | h) = λ_m · c(h w) / c(h •) + (1 − λ_m) · P_{m−1}(w | h′),   P_1(w) = c(w) / N

with c(h •) the context's total as a history (so every context's distribution sums to
1) and a context never seen falling back entirely to the lower order. For order 2 this
is the engine's bigram formula, evaluated in the same operation order as
:class:`nextword.baselines.DictBigram` (``lam * (c / cv) + (1 - lam) * u``).
"""

from __future__ import annotations

from typing import Any, ClassVar, Sequence

import numpy as np

from ..errors import InvalidArgumentError
from ..ngrams import NgramCounts
from ..store import MAX_LAMBDA  # one source: why the cap is 0.999 is documented there
from .base import Estimator, Fitted, Level

__all__ = ["JelinekMercer", "FittedJelinekMercer", "MAX_LAMBDA"]


class FittedJelinekMercer(Fitted):
    name: ClassVar[str] = "jm"

    def __init__(self, counts: NgramCounts, levels: list[Level], lams: list[float]) -> None:
        super().__init__(counts, levels)
        self.lams = lams  # lams[m-1] for order m (λ_1 unused: the unigram level is not interpolated)

    def alpha(self, m: int, j: int, i: int) -> float:
        lev = self.levels[m - 1]
        c, cv = int(lev.value[i]), int(lev.ctx_total[j])
        return (self.lams[m - 1] if m > 1 else 1.0) * (c / cv)

    def gamma(self, m: int, j: int) -> float:
        if m == 1:
            return 0.0
        lam = self.lams[m - 1]
        lev = self.levels[m - 1]
        dropped = int(lev.ctx_total[j]) - lev.kept_total(j)
        # a pruned context's dropped counts back off: their λ share joins 1 − λ
        return 1.0 - lam if dropped == 0 else (1.0 - lam) + lam * (dropped / int(lev.ctx_total[j]))

    def alphas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        owner = np.repeat(np.arange(len(lev.ctx)), np.diff(lev.ctx_start))
        lam = self.lams[m - 1] if m > 1 else 1.0
        return np.asarray(lam * (lev.value / lev.ctx_total[owner]), dtype=np.float64)

    def gammas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        if m == 1:
            return np.zeros(len(lev.ctx))
        lam = self.lams[m - 1]
        dropped = lev.dropped()
        return np.where(dropped == 0, 1.0 - lam, (1.0 - lam) + lam * (dropped / np.maximum(lev.ctx_total, 1)))

    def base(self) -> float:
        return 0.0

    def params(self) -> dict[str, Any]:
        return {"lambdas": list(self.lams[1:])}


class JelinekMercer(Estimator):
    """λ per order above the unigram: ``lams[0]`` for order 2, ``lams[1]`` for order 3."""

    name: ClassVar[str] = "jm"

    def __init__(self, lams: Sequence[float] = (0.9, 0.9)) -> None:
        for lam in lams:
            if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0 <= lam <= MAX_LAMBDA:
                raise InvalidArgumentError(f"λ must be a number in [0, {MAX_LAMBDA}], got {lam!r}")
        self.lams = [float(x) for x in lams]

    def fit(self, counts: NgramCounts) -> FittedJelinekMercer:
        if len(self.lams) < counts.order - 1:
            raise InvalidArgumentError(f"{len(self.lams)} λ values given for order {counts.order}")
        levels = [Level.of(counts.grams[m], counts.counts[m]) for m in range(counts.order)]
        return FittedJelinekMercer(counts, levels, [1.0, *self.lams[: counts.order - 1]])
