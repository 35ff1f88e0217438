"""Choosing λ on held-out text: by perplexity (EM, exact to 1e-4), by keystroke savings
(search with the simulator), and per history count (λ buckets).

For held-out tokens i with history count c(v_i) > 0, let b_i = c(v_i, w_i)/c(v_i) and
u_i = c(w_i)/N. The held-out log-likelihood L(λ) = Σ ln(λ·b_i + (1−λ)·u_i) is concave in λ
(a sum of logs of affine functions), so it has one maximum on [0, 1]. EM for the
two-part mixture updates λ ← mean_i(λ·b_i / (λ·b_i + (1−λ)·u_i)) and never decreases L
(Dempster, Laird & Rubin 1977); it converges slowly near the optimum, so the optimum is
then pinned down by bisection on L'(λ) = Σ (b_i − u_i)/(λ·b_i + (1−λ)·u_i), which is
decreasing. Tokens after an unseen history do not depend on λ and are left out.

Every λ chosen here lies in [0, MAX_LAMBDA] (``nextword.store.MAX_LAMBDA`` = 0.999): on
held-out text whose pairs were all seen in training the likelihood keeps rising up to
λ = 1, where every unseen pair would get probability 0 (see the constant for why 0.999
costs at most 0.1 % perplexity). EM iterates, the bisection bracket, the keystroke
search grid and every bucket are all capped by it.

λ by history count follows the observation that one λ for every history is worse than
letting it depend on how often the history was seen (Chen & Goodman, "An empirical study
of smoothing techniques for language modeling", 1998): histories are grouped into
logarithmic count bins, neighbouring bins are merged until each holds enough held-out
events, and each bucket gets its own optimal λ. The likelihood separates by bucket, so
each bucket is fitted independently.

λ per order (the interpolated Jelinek-Mercer trigram, :class:`nextword.estimators.JelinekMercer`):
:func:`order_events` turns held-out id sentences into per-order counts (c(uvw), c(uv•);
c(vw), c(v•); c(w), N) with the contexts the estimator itself uses, and
:func:`optimal_order_lambdas` maximises the held-out likelihood over [λ2, λ3]. P is no
longer affine in the λ jointly (it is a product (1−λ3)·λ2 ...), but it is a mixture of the
seen orders, so EM applies unchanged (:func:`em_order_lambdas`, monotone), and it is
affine in each λ alone, so exact one-λ-at-a-time maximisation finishes where EM slows.
:func:`fit_order_buckets` does the same with λ per order and per bucket of context
count (the bins of :func:`fit_buckets`, per order).

Kneser-Ney discounts stay fixed at Chen & Goodman's count-of-counts estimate
(D_j = j − (j+1)·Y·n_{j+1}/n_j, Y = n_1/(n_1 + 2n_2), per order; ``reference_kn.fit_discounts``)
rather than being tuned on held-out text. Why: the estimate is a closed form of the
training counts alone, so ``train`` produces a complete model without held-out text and
the same counts always give the same file; modified Kneser-Ney has three discounts per
order where held-out tuning through ``KneserNey(discounts=...)`` can set only one; and
the gain measured is negligible: on CPython's ``pydoc_data.topics`` (20 % held out by
``evaluate.is_held_out``, words seen once → ``<unk>``) the count-of-counts model has
held-out perplexity 78.43, while the best single D per order found by a golden-section
search on that same held-out text (so an optimistic figure) gives 78.39 (−0.05 %).
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from .errors import InvalidArgumentError
from .estimators.base import Level
from .evaluate import evaluate
from .model import Model
from .ngrams import NgramCounts
from .store import MAX_LAMBDA

__all__ = [
    "Events",
    "events_of",
    "em_lambda",
    "optimal_lambda",
    "fit_buckets",
    "perplexity_at",
    "keystroke_search",
    "LambdaBuckets",
    "MAX_LAMBDA",
    "OrderEvents",
    "order_events",
    "order_probs",
    "order_perplexity",
    "order_loglik",
    "em_order_lambdas",
    "optimal_order_lambdas",
    "OrderBuckets",
    "fit_order_buckets",
    "CURVE_GRID",
    "check_tunable",
    "model_order_events",
    "OrderTuning",
    "tune_orders",
    "write_lambdas",
]


@dataclass(frozen=True)
class Events:
    """Held-out tokens as count arrays (see :meth:`nextword.Model.events`)."""

    cv: np.ndarray
    cvw: np.ndarray
    cw: np.ndarray
    total: int

    @property
    def seen(self) -> np.ndarray:
        return self.cv > 0

    def bu(self, mask: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
        """(b, u) of the tokens with a seen history (optionally restricted by ``mask``)."""
        m = self.seen if mask is None else (self.seen & mask)
        return self.cvw[m] / self.cv[m], self.cw[m] / self.total


def events_of(model: Model, lines: Sequence[str]) -> Events:
    cv, cvw, cw = model.events(lines)
    return Events(cv, cvw, cw, model.total)


def _loglik(lam: float, b: np.ndarray, u: np.ndarray) -> float:
    p = lam * b + (1.0 - lam) * u
    with np.errstate(divide="ignore"):
        return float(np.log(p).sum())


def em_lambda(b: np.ndarray, u: np.ndarray, *, start: float = 0.5, iterations: int = 200) -> tuple[float, list[float]]:
    """Run EM from ``start``; returns the last λ and the log-likelihood after each step.

    Iterates are capped at MAX_LAMBDA. The likelihood is concave, so when an EM step would
    pass the cap, the cap lies between the old and the new λ and its likelihood is at
    least the old one: the capped iteration still never decreases L.
    """
    lam = min(start, MAX_LAMBDA)
    trace = [_loglik(lam, b, u)]
    for _ in range(iterations):
        p = lam * b + (1.0 - lam) * u
        new = min(float(np.mean(np.divide(lam * b, p, out=np.zeros_like(p), where=p > 0))), MAX_LAMBDA)
        trace.append(_loglik(new, b, u))
        if abs(new - lam) < 1e-12:
            lam = new
            break
        lam = new
    return lam, trace


def optimal_lambda(b: np.ndarray, u: np.ndarray, *, tol: float = 1e-9) -> float:
    """The maximiser of L(λ) on [0, MAX_LAMBDA]: EM to get close, then bisection on L'(λ)."""
    if len(b) == 0:
        raise InvalidArgumentError("no held-out tokens with a seen history: cannot fit λ")

    def slope(lam: float) -> float:
        p = lam * b + (1.0 - lam) * u
        # a token with p = 0 at every λ (b = u = 0) does not depend on λ: leave it out
        return float(np.sum(np.divide(b - u, p, out=np.zeros_like(p), where=p > 0)))

    if slope(0.0) <= 0.0:
        return 0.0
    if slope(MAX_LAMBDA) >= 0.0:  # L still rising at the cap (e.g. every held-out pair seen)
        return MAX_LAMBDA
    lo, hi = 0.0, MAX_LAMBDA
    guess, _ = em_lambda(b, u, iterations=50)
    # bracket around the EM estimate when it is informative
    for a, c in ((max(0.0, guess - 0.01), min(MAX_LAMBDA, guess + 0.01)),):
        if a > 0.0 and slope(a) > 0.0:
            lo = a
        if c < MAX_LAMBDA and slope(c) < 0.0:
            hi = c
    while hi - lo > tol:
        mid = 0.5 * (lo + hi)
        if slope(mid) > 0.0:
            lo = mid
        else:
            hi = mid
    return 0.5 * (lo + hi)


def perplexity_at(events: Events, lam: float | Sequence[float], bounds: Sequence[int] = ()) -> float:
    """Held-out perplexity for a single λ, or for bucketed λ (``lam`` a list, ``bounds`` the edges)."""
    if isinstance(lam, (int, float)):
        lam_v = np.full(len(events.cv), float(lam))
    else:
        lam_v = np.asarray(lam, dtype=np.float64)[np.searchsorted(np.asarray(bounds), events.cv, side="right")]
    u = events.cw / events.total
    seen = events.cv > 0
    b = np.where(seen, events.cvw / np.maximum(events.cv, 1), 0.0)
    p = np.where(seen, lam_v * b + (1.0 - lam_v) * u, u)
    with np.errstate(divide="ignore"):
        return float(np.exp(-np.log(p).mean()))


@dataclass
class LambdaBuckets:
    """λ by history count: bucket i holds histories with bounds[i−1] ≤ c(v) < bounds[i]."""

    bounds: list[int]
    lambdas: list[float]
    events: list[int] = field(default_factory=list)

    def as_meta(self) -> dict[str, list[Any]]:
        return {"bounds": self.bounds, "lambdas": self.lambdas}


def _bucket_bounds(cv: np.ndarray, *, min_events: int, base: float) -> list[int]:
    """Edges of logarithmic count bins of the (seen, ≥ 1) context counts ``cv``, merged until each has ``min_events``."""
    top = int(cv.max())
    edges = [1]
    while edges[-1] <= top:
        edges.append(max(edges[-1] + 1, int(math.ceil(edges[-1] * base))))
    # counts per bin [edges[i], edges[i+1])
    per_bin = [int(np.count_nonzero((cv >= a) & (cv < b))) for a, b in zip(edges, edges[1:])]
    groups: list[list[int]] = []  # each a list of bin indices
    for i in range(len(per_bin)):
        if groups and sum(per_bin[j] for j in groups[-1]) < min_events:
            groups[-1].append(i)
        else:
            groups.append([i])
    while len(groups) > 1 and sum(per_bin[j] for j in groups[-1]) < min_events:
        last = groups.pop()
        groups[-1].extend(last)
    return [edges[g[0]] for g in groups[1:]]


def fit_buckets(events: Events, *, min_events: int = 500, base: float = 2.0) -> LambdaBuckets:
    """Logarithmic count bins merged until each has ``min_events`` held-out tokens; λ per bucket."""
    if min_events < 1:
        raise InvalidArgumentError(f"min_events must be >= 1, got {min_events}")
    seen = events.seen
    cv = events.cv[seen]
    if len(cv) == 0:
        raise InvalidArgumentError("no held-out tokens with a seen history: cannot fit λ buckets")
    bounds = _bucket_bounds(cv, min_events=min_events, base=base)
    lambdas, counts = [], []
    for gi in range(len(bounds) + 1):
        lo = bounds[gi - 1] if gi else 0
        hi = bounds[gi] if gi < len(bounds) else math.inf
        mask = (events.cv >= lo) & (events.cv < hi)
        b, u = events.bu(mask)
        counts.append(len(b))
        lambdas.append(optimal_lambda(b, u) if len(b) else 0.9)
    return LambdaBuckets(bounds, lambdas, counts)


def keystroke_search(
    model: Model,
    lines: list[str],
    *,
    k: int = 3,
    coarse: Sequence[float] = (0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99),
    refine_step: float = 0.01,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[float, dict[float, float]]:
    """λ maximising KSR@k in [0, MAX_LAMBDA]: a coarse grid, then steps of ``refine_step`` around the best.

    Every run reuses the model's caches of prefix ranges, top lists and spellings, so
    later λ values cost only the ranking itself. Returns (best λ, {λ: KSR}); ties go to
    the smallest λ among the best.

    ``progress(done, total)`` counts simulated messages over all λ runs; until the
    refinement grid is known, ``total`` assumes the largest one any coarse best could
    need (an upper bound), then it is exact.
    """
    curve: dict[float, float] = {}
    n = sum(1 for m in lines if m.strip())  # the messages evaluate() simulates per λ
    grid = {round(min(max(lam, 0.0), 1.0), 6) for lam in coarse}

    def new_refine(best: float) -> int:  # λ values the refinement around ``best`` adds to the grid
        lo, hi = max(0.0, best - 5 * refine_step), min(1.0, best + 5 * refine_step)
        return len({round(min(lo + i * refine_step, 1.0), 6) for i in range(int(round((hi - lo) / refine_step)) + 1)} - grid)

    runs = len(grid) + max(new_refine(b) for b in grid)

    def ksr(lam: float) -> float:
        lam = round(min(max(lam, 0.0), MAX_LAMBDA), 6)
        if lam not in curve:
            base = len(curve) * n
            report = None if progress is None else (lambda d: progress(base + d, runs * n))
            overall, _ = evaluate(model, [("tune", lines)], (k,), lam=lam, progress=report)
            curve[lam] = overall.per_k[k].ksr
        return curve[lam]

    for lam in coarse:
        ksr(lam)
    best = max(sorted(curve), key=lambda x: curve[x])
    lo, hi = max(0.0, best - 5 * refine_step), min(MAX_LAMBDA, best + 5 * refine_step)
    steps = int(round((hi - lo) / refine_step))
    runs = len(curve) + new_refine(best)
    for i in range(steps + 1):
        ksr(lo + i * refine_step)
    best = max(sorted(curve), key=lambda x: curve[x])
    return best, dict(sorted(curve.items()))


# -- λ per order: an interpolated Jelinek-Mercer model of order n (n ≤ 3) ----------------------


@dataclass(frozen=True)
class OrderEvents:
    """Held-out tokens of an order-n model as per-order counts (one row per token).

    Column m−1 is order m: ``count[:, m−1]`` = c(h w) and ``total[:, m−1]`` = c(h •) for
    the token's context h of m−1 tokens (the last m−1 tokens before w in its sentence,
    ``<s>`` included, exactly what :meth:`nextword.estimators.Fitted.context_of` keeps);
    ``total`` is 0 when h was never seen as a context (or the sentence has fewer than m−1
    tokens before w, e.g. order 3 for a sentence's first token). Column 0 is c(w) and N.
    Counts are kept (not ratios) so the probabilities below repeat the estimator's own
    float operations and equal :meth:`Fitted.prob` exactly.
    """

    count: np.ndarray  # (T, n) int64
    total: np.ndarray  # (T, n) int64

    @property
    def order(self) -> int:
        return int(self.count.shape[1])

    def __len__(self) -> int:
        return int(self.count.shape[0])

    def seen(self, m: int) -> np.ndarray:
        """Tokens whose order-m context was seen (every token for m = 1 when N > 0)."""
        return self.total[:, m - 1] > 0

    def freqs(self) -> np.ndarray:
        """(T, n) float64 relative frequencies c(h w)/c(h •), NaN where the context is unseen."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.total > 0, self.count / np.maximum(self.total, 1), np.nan)


def order_events(counts: NgramCounts, sentences: Iterable[Sequence[int]]) -> OrderEvents:
    """Per-order counts of every held-out token of id ``sentences`` under ``counts``.

    Sentences hold word ids and ``<unk>`` (as :meth:`NgramCounts.from_sentences` takes
    them); each predicts its tokens and a final ``</s>``. Lookups are vectorised: n-grams
    are packed into sorted int64 keys (an order-3 key is its context's index times the
    id base plus w, so no key overflows) and found with ``searchsorted``.
    """
    n = counts.order
    bos, eos, base = counts.bos, counts.eos, counts.bos + 1
    flat_parts: list[np.ndarray] = []
    for s in sentences:
        a = np.asarray(s, dtype=np.int64).reshape(-1)
        if len(a) and (int(a.min()) < 0 or int(a.max()) > counts.unk or bool((a == eos).any())):
            bad = int(a[(a < 0) | (a > counts.unk) | (a == eos)][0])
            raise InvalidArgumentError(f"sentence id {bad} is not a word or <unk> id (0..{counts.unk}, not {eos})")
        flat_parts.append(np.concatenate(([bos], a, [eos])))
    flat = np.concatenate(flat_parts) if flat_parts else np.zeros(0, np.int64)
    pos = np.flatnonzero(flat != bos)
    w = flat[pos]
    p1 = flat[pos - 1] if len(pos) else np.zeros(0, np.int64)
    p2 = np.full(len(pos), -1, np.int64)
    has2 = p1 != bos
    p2[has2] = flat[pos[has2] - 2]
    T = len(w)
    count = np.zeros((T, n), np.int64)
    total = np.zeros((T, n), np.int64)
    levels = [Level.of(counts.grams[m], counts.counts[m]) for m in range(n)]
    # order 1: c(w) and N
    lev = levels[0]
    if len(lev.grams):
        count[:, 0] = _lookup(lev.grams[:, 0], lev.value, w)
        total[:, 0] = int(lev.ctx_total[0])
    for m in range(2, n + 1):
        lev = levels[m - 1]
        if len(lev.grams) == 0:
            continue
        if m == 2:
            ckey, tkey, ok = lev.ctx[:, 0], p1, np.ones(T, bool)
        else:
            ckey, tkey, ok = lev.ctx[:, 0] * base + lev.ctx[:, 1], p2 * base + p1, has2
        j = _index(ckey, tkey)
        j[~ok] = -1
        found = j >= 0
        total[found, m - 1] = lev.ctx_total[j[found]]
        owner = np.repeat(np.arange(len(lev.ctx), dtype=np.int64), np.diff(lev.ctx_start))
        gkey = owner * base + lev.grams[:, -1]
        count[found, m - 1] = _lookup(gkey, lev.value, j[found] * base + w[found])
    return OrderEvents(count, total)


def _index(keys: np.ndarray, query: np.ndarray) -> np.ndarray:
    """Position of each query in the sorted distinct ``keys``, −1 when absent."""
    if len(keys) == 0:
        return np.full(len(query), -1, np.int64)
    i = np.searchsorted(keys, query)
    i_c = np.minimum(i, len(keys) - 1)
    return np.where(keys[i_c] == query, i_c, -1).astype(np.int64)


def _lookup(keys: np.ndarray, values: np.ndarray, query: np.ndarray) -> np.ndarray:
    i = _index(keys, query)
    return np.where(i >= 0, values[np.maximum(i, 0)], 0).astype(np.int64)


@dataclass
class OrderBuckets:
    """λ per order and per bucket of context count.

    For order m (list index m−2), bucket i holds the contexts h with
    ``bounds[m−2][i−1] ≤ c(h •) < bounds[m−2][i]``; ``lambdas[m−2][i]`` is its λ and
    ``events[m−2][i]`` the number of held-out tokens it was fitted on.
    """

    bounds: list[list[int]]
    lambdas: list[list[float]]
    events: list[list[int]] = field(default_factory=list)

    def lam_for(self, m: int, context_count: int) -> float:
        """λ of order m for a context seen ``context_count`` times."""
        i = int(np.searchsorted(np.asarray(self.bounds[m - 2], np.int64), context_count, side="right"))
        return self.lambdas[m - 2][i]

    def as_meta(self) -> dict[str, list[Any]]:
        return {"bounds": self.bounds, "lambdas": self.lambdas}


Lambdas = Sequence[float] | OrderBuckets


def _groups(events: OrderEvents, bounds: Sequence[Sequence[int]]) -> list[np.ndarray]:
    """Bucket of every token at each order m ≥ 2 (by its context count c(h •))."""
    return [
        np.searchsorted(np.asarray(b, np.int64), events.total[:, m - 1], side="right").astype(np.int64)
        for m, b in enumerate(bounds, 2)
    ]


def _single(events: OrderEvents) -> list[np.ndarray]:
    return [np.zeros(len(events), np.int64) for _ in range(events.order - 1)]


def _check_lams(events: OrderEvents, lams: Lambdas) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """(λ per bucket, bucket of each token) per order m ≥ 2, validated."""
    n = events.order
    if isinstance(lams, OrderBuckets):
        if len(lams.bounds) != n - 1 or len(lams.lambdas) != n - 1:
            raise InvalidArgumentError(f"{len(lams.lambdas)} orders of λ buckets given for order {n} (need {n - 1})")
        for b, v in zip(lams.bounds, lams.lambdas):
            if len(v) != len(b) + 1 or any(x >= y for x, y in zip(b, b[1:])):
                raise InvalidArgumentError(f"λ buckets need increasing bounds and one λ more than bounds, got {b!r} and {v!r}")
        values, groups = list(lams.lambdas), _groups(events, lams.bounds)
    else:
        if len(lams) != n - 1:
            raise InvalidArgumentError(f"{len(lams)} λ values given for order {n} (need {n - 1})")
        values, groups = [[x] for x in lams], _single(events)
    for v in values:
        for lam in v:
            if isinstance(lam, bool) or not isinstance(lam, (int, float)) or not 0.0 <= float(lam) <= MAX_LAMBDA:
                raise InvalidArgumentError(f"λ must be a number in [0, {MAX_LAMBDA}], got {lam!r}")
    return [np.asarray(v, np.float64) for v in values], groups


def _levels(events: OrderEvents, lam_tok: Sequence[float | np.ndarray]) -> list[np.ndarray]:
    """P_m of every token for m = 1..n, in the operations of ``FittedJelinekMercer``.

    ``lam_tok[m−2]`` is λ_m, one number or one per token (elementwise, the same IEEE
    operations, so the result equals the estimator's ``prob`` exactly).
    """
    c, t = events.count, events.total
    seen = t > 0
    p = np.where(seen[:, 0], 1.0 * (c[:, 0] / np.maximum(t[:, 0], 1)) + 0.0 * 0.0, 0.0)
    out = [p]
    for m in range(2, events.order + 1):
        lam = lam_tok[m - 2]
        a = lam * (c[:, m - 1] / np.maximum(t[:, m - 1], 1))
        p = np.where(seen[:, m - 1], a + (1.0 - lam) * p, p)
        out.append(p)
    return out


def _per_token(values: list[np.ndarray], groups: list[np.ndarray]) -> list[np.ndarray]:
    return [v[g] for v, g in zip(values, groups)]


def order_probs(events: OrderEvents, lams: Lambdas) -> np.ndarray:
    """P(w | context) of every held-out token under ``JelinekMercer(lams)`` ([λ2, λ3, ...] or buckets)."""
    values, groups = _check_lams(events, lams)
    return _levels(events, _per_token(values, groups))[-1]


def order_perplexity(events: OrderEvents, lams: Lambdas) -> float:
    """Held-out perplexity over every token (``inf`` if one has P = 0, e.g. a word never seen)."""
    if len(events) == 0:
        raise InvalidArgumentError("no held-out tokens: the text is empty")
    p = order_probs(events, lams)
    with np.errstate(divide="ignore"):
        return float(np.exp(-np.log(p).mean()))


def _scored(events: OrderEvents) -> OrderEvents:
    """The tokens λ can act on: c(w) > 0 (a word never seen has P = 0 for every λ)."""
    keep = events.count[:, 0] > 0
    return OrderEvents(events.count[keep], events.total[keep])


def order_loglik(events: OrderEvents, lams: Lambdas) -> float:
    """Σ ln P over the held-out tokens with c(w) > 0 (the others are 0 for every λ)."""
    p = order_probs(_scored(events), lams)
    return float(np.log(p).sum())


def _loglik_of(events: OrderEvents, values: list[np.ndarray], groups: list[np.ndarray]) -> float:
    return float(np.log(_levels(events, _per_token(values, groups))[-1]).sum())


def _em_step(events: OrderEvents, values: list[np.ndarray], groups: list[np.ndarray]) -> list[np.ndarray]:
    """One EM update of every λ (``events`` already restricted to tokens with c(w) > 0).

    A token's probability is a mixture over the orders whose context was seen: order m
    takes A_m = λ_m b_m Π_{k>m, seen}(1−λ_k), the unigram A_1 = u Π_{k≥2, seen}(1−λ_k),
    and P = Σ A_m (an unseen context passes its whole mass down). E-step: the posterior
    shares r_m = A_m / P. The complete-data log-likelihood separates into one binomial
    per order and bucket (at order m, "stop here" against "go lower", for the tokens
    that reached m), so the M-step is λ_m = Σ r_m / Σ_{k≤m} r_k over the bucket's tokens
    with a seen order-m context. Capping at MAX_LAMBDA is the constrained M-step (each
    term is concave in its λ), so this generalised EM never decreases the likelihood.
    """
    lam_tok = _per_token(values, groups)
    c, t = events.count, events.total
    P = _levels(events, lam_tok)[-1]
    n = events.order
    above = np.ones(len(P))  # product of (1 − λ_k) over the seen orders above m
    shares: dict[int, np.ndarray] = {}
    for m in range(n, 1, -1):
        seen = t[:, m - 1] > 0
        lam = lam_tok[m - 2]
        b = c[:, m - 1] / np.maximum(t[:, m - 1], 1)
        shares[m] = np.where(seen, above * lam * b, 0.0) / P
        above = np.where(seen, above * (1.0 - lam), above)
    new = [v.copy() for v in values]
    cum_above = np.zeros(len(P))  # Σ_{k>m} r_k
    for m in range(n, 1, -1):
        seen = t[:, m - 1] > 0
        g, k = groups[m - 2][seen], len(values[m - 2])
        num = np.bincount(g, shares[m][seen], minlength=k)
        den = np.bincount(g, (1.0 - cum_above)[seen], minlength=k)  # Σ_{k≤m} r_k
        upd = den > 0.0
        new[m - 2][upd] = np.clip(num[upd] / den[upd], 0.0, MAX_LAMBDA)
        cum_above = cum_above + shares[m]
    return new


def _line_max(alpha: np.ndarray, beta: np.ndarray) -> float:
    """argmax over x in [0, MAX_LAMBDA] of Σ ln(α + β x), a concave function (α + βx > 0 on the interval)."""
    def slope(x: float) -> float:
        return float(np.sum(beta / (alpha + beta * x)))

    if len(alpha) == 0 or slope(0.0) <= 0.0:
        return 0.0
    if slope(MAX_LAMBDA) >= 0.0:
        return MAX_LAMBDA
    lo, hi = 0.0, MAX_LAMBDA
    x = 0.5 * (lo + hi)
    for _ in range(200):  # safeguarded Newton: the bracket always holds the root of the slope
        q = beta / (alpha + beta * x)
        g = float(np.sum(q))
        if g > 0.0:
            lo = x
        else:
            hi = x
        h = -float(np.sum(q * q))
        nx = x - g / h if h < 0.0 else 0.5 * (lo + hi)
        if not lo < nx < hi:
            nx = 0.5 * (lo + hi)
        if abs(nx - x) <= 1e-15 or hi - lo <= 1e-15:
            return nx
        x = nx
    return x


def _coordinate_step(events: OrderEvents, values: list[np.ndarray], groups: list[np.ndarray], m: int) -> list[np.ndarray]:
    """Maximise the likelihood exactly in each λ of order m, the other orders fixed.

    For a token with a seen order-m context, P = hi + coef·(λ b_m + (1 − λ) P_{m−1}),
    where hi is the mass of the orders above and coef the product of their (1 − λ); so P
    is affine in λ (α + β λ with α = hi + coef·P_{m−1}, β = coef·(b_m − P_{m−1})) and the
    likelihood is concave in it. Each bucket's λ touches only its own tokens, so the
    buckets of one order are solved independently.
    """
    lam_tok = _per_token(values, groups)
    levels = _levels(events, lam_tok)
    c, t = events.count, events.total
    P = levels[-1]
    seen = t[:, m - 1] > 0
    coef = np.ones(len(P))
    for k in range(events.order, m, -1):
        coef = np.where(t[:, k - 1] > 0, coef * (1.0 - lam_tok[k - 2]), coef)
    lower = levels[m - 2]
    b = c[:, m - 1] / np.maximum(t[:, m - 1], 1)
    lam = lam_tok[m - 2]
    hi = P - coef * (lam * b + (1.0 - lam) * lower)
    alpha = hi + coef * lower
    beta = coef * (b - lower)
    new = [v.copy() for v in values]
    for gi in range(len(values[m - 2])):
        sel = seen & (groups[m - 2] == gi)
        if bool(sel.any()):
            new[m - 2][gi] = _line_max(alpha[sel], beta[sel])
    return new


def _em(events: OrderEvents, values: list[np.ndarray], groups: list[np.ndarray], iterations: int) -> tuple[list[np.ndarray], list[float]]:
    trace = [_loglik_of(events, values, groups)]
    for _ in range(iterations):
        new = _em_step(events, values, groups)
        trace.append(_loglik_of(events, new, groups))
        done = max((float(np.abs(a - b).max()) for a, b in zip(new, values)), default=0.0) < 1e-13
        values = new
        if done:
            break
    return values, trace


def _optimise(events: OrderEvents, values: list[np.ndarray], groups: list[np.ndarray], iterations: int, cycles: int) -> list[np.ndarray]:
    values, _ = _em(events, values, groups, iterations)
    for _ in range(cycles):
        old = values
        for m in range(2, events.order + 1):
            values = _coordinate_step(events, values, groups, m)
        if max((float(np.abs(a - b).max()) for a, b in zip(old, values)), default=0.0) <= 1e-12:
            break
    return values


def em_order_lambdas(
    events: OrderEvents, *, start: Sequence[float] | None = None, iterations: int = 200
) -> tuple[list[float], list[float]]:
    """EM for [λ2, ..., λn] from ``start`` (0.5 each); returns the last λ and the log-likelihood after each step.

    Every iterate lies in [0, MAX_LAMBDA]; the trace never decreases (Dempster, Laird &
    Rubin 1977; see :func:`_em_step` for the capped M-step). A λ whose order has no
    held-out token with a seen context does not change the likelihood and keeps its start.
    """
    ev = _scored(events)
    values, groups = _check_lams(ev, [0.5] * (ev.order - 1) if start is None else list(start))
    values, trace = _em(ev, values, groups, iterations)
    return [float(v[0]) for v in values], trace


def optimal_order_lambdas(events: OrderEvents, *, iterations: int = 200, cycles: int = 500) -> list[float]:
    """[λ2, ..., λn] maximising the held-out log-likelihood on [0, MAX_LAMBDA]^(n−1).

    EM gets close (``iterations`` steps) but slows down near the optimum; exact
    one-λ-at-a-time maximisation then finishes (the likelihood is concave in each λ
    alone, since P is affine in it), up to ``cycles`` rounds over the orders until no λ
    moves by more than 1e-12. Every step of both never lowers the likelihood.
    """
    ev = _scored(events)
    if len(ev) == 0:
        raise InvalidArgumentError("no held-out tokens with a seen word: cannot fit λ")
    values, groups = _check_lams(ev, [0.5] * (ev.order - 1))
    return [float(v[0]) for v in _optimise(ev, values, groups, iterations, cycles)]


def fit_order_buckets(
    events: OrderEvents, *, min_events: int = 500, base: float = 2.0, iterations: int = 200, cycles: int = 500
) -> OrderBuckets:
    """λ per order and per bucket of context count c(h •), bucketed as :func:`fit_buckets` does.

    Each order's seen contexts are put in logarithmic count bins merged until each holds
    ``min_events`` held-out tokens. The fit starts from the single optimal λ per order
    (every bucket equal to it) and only climbs from there (EM, then exact per-bucket
    maximisation), so its held-out likelihood is never below the single λ's.
    """
    if isinstance(min_events, bool) or not isinstance(min_events, int) or min_events < 1:
        raise InvalidArgumentError(f"min_events must be an integer >= 1, got {min_events!r}")
    ev = _scored(events)
    single = optimal_order_lambdas(ev, iterations=iterations, cycles=cycles)
    bounds: list[list[int]] = []
    for m in range(2, ev.order + 1):
        cv = ev.total[ev.seen(m), m - 1]
        bounds.append(_bucket_bounds(cv, min_events=min_events, base=base) if len(cv) else [])
    groups = _groups(ev, bounds)
    start = [np.full(len(b) + 1, lam) for b, lam in zip(bounds, single)]
    values = _optimise(ev, start, groups, iterations, cycles)
    counts = [
        np.bincount(g[ev.seen(m)], minlength=len(b) + 1).tolist() for m, (g, b) in enumerate(zip(groups, bounds), 2)
    ]
    return OrderBuckets(bounds, [[float(x) for x in v] for v in values], counts)


# -- tuning a model file of any kind ----------------------------------------------------------

#: λ values at which :func:`tune_orders` draws each order's perplexity curve (the optimum is added)
CURVE_GRID: tuple[float, ...] = (0.0, 0.1, 0.2, 0.3, 0.4, 0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99)


def check_tunable(model: Model) -> None:
    """Refuse a Kneser-Ney file in one line: it has no λ, and its discounts stay fixed (see the module docstring)."""
    if model.estimator == "kn":
        raise InvalidArgumentError(
            f"{model.path} is a Kneser-Ney model: it has no λ, and its discounts stay at the count-of-counts "
            "estimate (tuning them on held-out text gained 0.05% perplexity); nextword eval reports its held-out perplexity"
        )


def model_order_events(model: Model, lines: Iterable[str]) -> OrderEvents:
    """:func:`order_events` of held-out messages under a Jelinek-Mercer model file's stored counts.

    Refuses a file whose context totals are not the sums of its stored counts (pruned with
    the dropped mass kept): the events would not be the file's own probabilities.
    """
    check_tunable(model)
    if model.order == 3 and not model.totals_are_sums():
        raise InvalidArgumentError(f"{model.path}: a pruned trigram file keeps dropped mass in its totals; tune λ before pruning")
    return order_events(model.stored_ngrams(), model.sentence_ids(lines))


@dataclass
class OrderTuning:
    """What :func:`tune_orders` found on the tune text.

    ``curves[m]`` is {λ_m: held-out perplexity} with every other order at its optimum;
    ``buckets`` (if asked for) the λ per order and context-count bucket, with
    ``bucket_perplexity`` its held-out perplexity.
    """

    events: OrderEvents
    stored: list[float]
    lambdas: list[float]
    stored_perplexity: float
    perplexity: float
    curves: dict[int, dict[float, float]]
    buckets: OrderBuckets | None = None
    bucket_perplexity: float | None = None


def tune_orders(
    model: Model, lines: Sequence[str], *, buckets: bool = False, min_events: int = 500, grid: Sequence[float] = CURVE_GRID
) -> OrderTuning:
    """λ per order of a Jelinek-Mercer model file maximising the held-out likelihood of ``lines``.

    The optimum is :func:`optimal_order_lambdas` over the file's own stored counts (for a
    pruned bigram, the kept pairs), so the perplexities here are the model's. ``buckets``
    also fits λ per order and bucket of context count (:func:`fit_order_buckets`).
    """
    ev = model_order_events(model, lines)
    if len(ev) == 0:
        raise InvalidArgumentError("no held-out tokens: the text is empty")
    stored = model.query_lambdas()
    best = optimal_order_lambdas(ev)
    curves: dict[int, dict[float, float]] = {}
    for m in range(2, ev.order + 1):
        pts = sorted({*(min(max(float(x), 0.0), MAX_LAMBDA) for x in grid), round(best[m - 2], 4)})
        curve = {}
        for lam in pts:
            lams = list(best)
            lams[m - 2] = lam
            curve[lam] = order_perplexity(ev, lams)
        curves[m] = curve
    out = OrderTuning(ev, stored, best, order_perplexity(ev, stored), order_perplexity(ev, best), curves)
    if buckets:
        out.buckets = fit_order_buckets(ev, min_events=min_events)
        out.bucket_perplexity = order_perplexity(ev, out.buckets)
    return out


def write_lambdas(model: Model, path: str | os.PathLike[str], lams: Sequence[float]) -> None:
    """Write ``model`` (a Jelinek-Mercer file of order 3) again with λ per order ``lams``, atomically.

    The file is rebuilt from the stored counts by the one build path (``store.build``), so
    it is the file ``train`` writes for the same counts with these λ (byte for byte; a
    test checks it). A bigram file keeps its own rewrite, which also carries λ buckets
    and pruned history counts (``store.rewrite_model``). Never over the model itself.
    """
    from .build import tables_like
    from .estimators import JelinekMercer
    from .paths import check_new_output
    from .store import build

    check_tunable(model)
    if model.order != 3:
        raise InvalidArgumentError(f"{model.path}: write_lambdas rebuilds order-3 files; a bigram file is rewritten by store.rewrite_model")
    check_new_output(model.path, path, "tuned model")
    if not model.totals_are_sums():
        raise InvalidArgumentError(f"{model.path}: a pruned trigram file keeps dropped mass in its totals; tune λ before pruning")
    counts = model.stored_ngrams()
    tables = tables_like(model, counts)
    head = model.header()
    build(counts, tables, JelinekMercer(list(lams)), path, skyband_k=head["skyband_k"], skyband_min=head["skyband_min"])
