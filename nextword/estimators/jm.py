"""Jelinek-Mercer interpolation of orders 1..3: λ per order, optionally per bucket of context counts.

    P_m(w | h) = λ_m · c(h w) / c(h •) + (1 − λ_m) · P_{m−1}(w | h′),   P_1(w) = c(w) / N

with c(h •) the context's total as a history (so every context's distribution sums to
1) and a context never seen falling back entirely to the lower order. For order 2 this
is the engine's bigram formula, evaluated in the same operation order as
:class:`nextword.baselines.DictBigram` (``lam * (c / cv) + (1 - lam) * u``).

λ by context count (``buckets``): order m's λ for a context seen c(h •) times is
``lambdas[i]`` with i the number of ``bounds`` ≤ c(h •) — the rule of a bigram file's
stored buckets (:meth:`nextword.Model.lam_for`) and of :class:`nextword.tune.OrderBuckets`.
"""

from __future__ import annotations

import bisect
from typing import Any, ClassVar, Final, Sequence

import numpy as np

from ..errors import InvalidArgumentError
from ..ngrams import NgramCounts
from .base import Estimator, Fitted, Level

#: Largest λ a model file stores (and tuning chooses). At λ = 1 every pair not seen in
#: training gets probability 0, so one unseen held-out pair makes perplexity infinite;
#: at λ ≤ 0.999 every word keeps at least 0.001·c(w)/N. The cap costs little: for any λ
#: in (0.999, 1], λ·b + (1−λ)·u ≥ 0.999·(λ·b + (1−λ)·u), so no held-out token loses more
#: than ln(1/0.999) ≈ 0.001 nats, i.e. perplexity rises by at most 0.1 %. Queries may
#: still pass λ = 1 explicitly (the pure bigram estimate); only stored λ are capped.
MAX_LAMBDA: Final = 0.999

__all__ = ["JelinekMercer", "FittedJelinekMercer", "MAX_LAMBDA", "jm_alpha", "jm_gamma", "jm_step"]


# The engine's one copy of the Jelinek-Mercer step. The fitted estimator below, the query
# paths (nextword.model), the skyband build (nextword.store.level_mix) and the export all
# call these, so every layer computes the same floating-point numbers, in the operation
# order of the dict oracle (``lam * (c / cv) + (1 - lam) * u``; with no dropped mass the
# γ below is exactly 1 − λ, since x + 0.0 == x). Work on floats and float64 arrays alike.
# (λ tuning's EM and the entropy pruning criterion work with the parts of this formula,
# c/T and the lower-order probability, in their own derived expressions.)


def jm_alpha(lam: Any, value: Any, total: Any) -> Any:
    """α = λ·c/T: a stored n-gram's own share (``value`` c, context total T)."""
    return lam * (value / total)


def jm_gamma(lam: Any, dropped: Any, total: Any) -> Any:
    """γ = (1 − λ) + λ·dropped/T: the weight of the lower order (dropped: mass pruned from the context)."""
    return (1.0 - lam) + lam * (dropped / total)


def jm_step(lam: Any, value: Any, total: Any, lower: Any, dropped: Any = 0) -> Any:
    """P = α + γ·lower: one interpolation step of a seen context."""
    return jm_alpha(lam, value, total) + jm_gamma(lam, dropped, total) * lower


#: λ by context count for one order: (bounds c1 < c2 < ..., one more λ than bounds)
Buckets = tuple[list[int], list[float]]


class FittedJelinekMercer(Fitted):
    name: ClassVar[str] = "jm"

    def __init__(
        self, counts: NgramCounts, levels: list[Level], lams: list[float], buckets: list[Buckets | None] | None = None
    ) -> None:
        super().__init__(counts, levels)
        self.lams = lams  # lams[m-1] for order m (λ_1 unused: the unigram level is not interpolated)
        #: buckets[m-1]: (bounds, lambdas) of order m, or None for one λ (order 1 always None)
        self.buckets: list[Buckets | None] = list(buckets) if buckets is not None else [None] * len(lams)

    def lam_of(self, m: int, j: int) -> float:
        """λ_m of context ``j`` of order m (its bucket's, else the order's single λ)."""
        b = self.buckets[m - 1]
        if b is None:
            return self.lams[m - 1]
        return b[1][bisect.bisect_right(b[0], int(self.levels[m - 1].ctx_total[j]))]

    def alpha(self, m: int, j: int, i: int) -> float:
        lev = self.levels[m - 1]
        c, cv = int(lev.value[i]), int(lev.ctx_total[j])
        return jm_alpha(self.lam_of(m, j) if m > 1 else 1.0, c, cv)  # type: ignore[no-any-return]

    def lams_of(self, m: int) -> np.ndarray:
        """λ_m of every context of order m (:meth:`lam_of`, vectorised; 1.0 for the unigram level)."""
        lev = self.levels[m - 1]
        if m == 1:
            return np.ones(len(lev.ctx))
        b = self.buckets[m - 1]
        if b is None:
            return np.full(len(lev.ctx), self.lams[m - 1])
        return np.asarray(b[1], dtype=np.float64)[np.searchsorted(np.asarray(b[0], dtype=np.int64), lev.ctx_total, side="right")]

    def gamma(self, m: int, j: int) -> float:
        if m == 1:
            return 0.0
        lam = self.lam_of(m, j)
        lev = self.levels[m - 1]
        dropped = int(lev.ctx_total[j]) - lev.kept_total(j)
        # a pruned context's dropped counts back off: their λ share joins 1 − λ
        return jm_gamma(lam, dropped, int(lev.ctx_total[j]))  # type: ignore[no-any-return]

    def alphas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        owner = np.repeat(np.arange(len(lev.ctx)), np.diff(lev.ctx_start))
        return np.asarray(jm_alpha(self.lams_of(m)[owner], lev.value, lev.ctx_total[owner]), dtype=np.float64)

    def gammas(self, m: int) -> np.ndarray:
        lev = self.levels[m - 1]
        if m == 1:
            return np.zeros(len(lev.ctx))
        lam = self.lams_of(m)
        dropped = lev.dropped()
        return np.asarray(jm_gamma(lam, dropped, np.maximum(lev.ctx_total, 1)), dtype=np.float64)

    def base(self) -> float:
        return 0.0

    def params(self) -> dict[str, Any]:
        out: dict[str, Any] = {"lambdas": list(self.lams[1:])}
        if any(b is not None for b in self.buckets):
            out["buckets"] = [None if b is None else {"bounds": list(b[0]), "lambdas": list(b[1])} for b in self.buckets[1:]]
        return out



def _check_lam(lam: object) -> float:
    if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0 <= lam <= MAX_LAMBDA:
        raise InvalidArgumentError(f"λ must be a number in [0, {MAX_LAMBDA}], got {lam!r}")
    return float(lam)


class JelinekMercer(Estimator):
    """λ per order above the unigram: ``lams[0]`` for order 2, ``lams[1]`` for order 3.

    ``buckets[m-2]`` (keyword-only, optional) replaces order m's single λ by λ per bucket of
    context count: ``(bounds, lambdas)`` with increasing bounds ≥ 1 and one more λ than
    bounds, or None to keep the single λ.
    """

    name: ClassVar[str] = "jm"

    def __init__(
        self, lams: Sequence[float] = (0.9, 0.9), *, buckets: Sequence[tuple[Sequence[int], Sequence[float]] | None] = ()
    ) -> None:
        self.lams = [_check_lam(x) for x in lams]
        self.buckets: list[Buckets | None] = []
        for b in buckets:
            if b is None:
                self.buckets.append(None)
                continue
            bounds, values = list(b[0]), [_check_lam(x) for x in b[1]]
            ok = all(isinstance(x, int) and not isinstance(x, bool) and x >= 1 for x in bounds) and all(
                x < y for x, y in zip(bounds, bounds[1:])
            )
            if not ok or len(values) != len(bounds) + 1:
                raise InvalidArgumentError(f"λ buckets need increasing bounds >= 1 and one λ more than bounds, got {b!r}")
            self.buckets.append((bounds, values))

    def fit(self, counts: NgramCounts) -> FittedJelinekMercer:
        if len(self.lams) < counts.order - 1:
            raise InvalidArgumentError(f"{len(self.lams)} λ values given for order {counts.order}")
        if len(self.buckets) > counts.order - 1:
            raise InvalidArgumentError(f"λ buckets given for {len(self.buckets)} orders, the counts have order {counts.order}")
        levels = [Level.of(counts.grams[m], counts.counts[m]) for m in range(counts.order)]
        per_order = [None, *self.buckets, *[None] * (counts.order - 1 - len(self.buckets))]
        return FittedJelinekMercer(counts, levels, [1.0, *self.lams[: counts.order - 1]], per_order)
