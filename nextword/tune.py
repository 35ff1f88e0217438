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
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np

from .errors import InvalidArgumentError
from .evaluate import evaluate
from .model import Model
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


def fit_buckets(events: Events, *, min_events: int = 500, base: float = 2.0) -> LambdaBuckets:
    """Logarithmic count bins merged until each has ``min_events`` held-out tokens; λ per bucket."""
    if min_events < 1:
        raise InvalidArgumentError(f"min_events must be >= 1, got {min_events}")
    seen = events.seen
    cv = events.cv[seen]
    if len(cv) == 0:
        raise InvalidArgumentError("no held-out tokens with a seen history: cannot fit λ buckets")
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
    bounds = [edges[g[0]] for g in groups[1:]]
    lambdas, counts = [], []
    for gi, g in enumerate(groups):
        lo = edges[g[0]] if gi else 0
        hi = edges[g[-1] + 1] if gi < len(groups) - 1 else math.inf
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
