"""Export to the ARPA back-off format, the n-gram trade's standard text format.

The layout (from memory of the format's description): a ``\\data\\`` header with one
``ngram N=count`` line per order, then one ``\\N-grams:`` section per order whose lines
are ``log10prob<TAB>w1 .. wN[<TAB>log10backoff]``, then ``\\end\\``. A reader computes

    P(w | h) = 10^prob(h w)                    if h w is listed,
             = 10^backoff(h) · P(w | h′)       otherwise (backoff(h) = 0 when h is unlisted),

h′ being h without its first word. ``<s>`` is never predicted: probability −99 (the
format's convention for log 0).

**Every interpolated model is exactly such a back-off model.** An interpolated model
(:mod:`nextword.estimators`) scores P_m(w | h) = α_m(h w) + γ_m(h)·P_{m−1}(w | h′) with
α = 0 when h w was not stored, so for every w not stored after h, P(w | h) = γ(h)·P(w | h′)
— the back-off reading with back-off weight γ(h). :func:`write_arpa_fitted` therefore
lists every stored n-gram with the *full* interpolated log10 P(w | h) and every context
with log10 γ(h); the file read back by the rule above gives the model's probability for
every (h, w), not only for the listed ones.

The format also needs the context h of a listed n-gram to be listed itself (it carries
the back-off weight). With the counting scheme of :mod:`nextword.ngrams` every prefix of
a counted n-gram is counted (it is the window one token shorter at the same position;
the one exception, ``<s>`` alone, is the unigram listed by convention), but a pruned or
hand-made table need not be: a missing context is then added with its implied
probability (P(v | u) computed by the model, which is what the reader would have
computed without it), so the reading is unchanged.

:func:`write_arpa` exports a loaded :class:`~nextword.model.Model` of any estimator and
order through the same writer: :func:`fitted_from_model` rebuilds the file's fitted
estimator from its stored values (``Model.stored_ngrams``; Jelinek-Mercer with the λ a
query uses, per order, and per history count when the bigram file stores λ buckets;
Kneser-Ney with the file's discounts), whose probabilities equal the model's. For the
Jelinek-Mercer bigram this is the familiar layout: every seen pair with
log10(λ·c(v,w)/c(v) + (1−λ)·c(w)/N), every unigram with log10 c(w)/N and, for a history,
back-off weight log10(1 − λ) (its own bucket's λ), so an unseen pair gets (1 − λ)·P(w).

Words are written as their case-folded keys (unique, never containing spaces). Log values are
written with 10 decimals (an absolute error ≤ 5e-11 in log10, so a probability — even a
product of three back-off terms — reads back within about 4e-10 relative; 10 significant
digits would not do: −12.34567890 keeps only 8 decimals, 1e-8 relative).
"""

from __future__ import annotations

import math
import os
import zlib
from typing import Iterable, Iterator, Sequence, Union

import numpy as np

from .errors import InvalidArgumentError
from .estimators import Fitted, FittedJelinekMercer, FittedKneserNey
from .mix import MixedModel
from .model import Model
from .ngrams import NgramCounts
from .paths import check_outputs
from .reference_kn import Discounts
from .store import atomic_write
from .text import BOS, EOS, UNK

__all__ = ["write_arpa", "arpa_lines", "fitted_from_model", "write_arpa_fitted", "arpa_lines_fitted", "write_arpa_mix"]

PathArg = Union[str, "os.PathLike[str]"]


def _log10(p: float) -> str:
    return f"{math.log10(p):.10f}" if p > 0 else "-99"


def _document(counts: Sequence[int], sections: Iterable[Iterable[str]]) -> Iterator[str]:
    """The ARPA frame around the entry lines of each order (``sections[m-1]`` for order m)."""
    yield "\\data\\"
    for m, k in enumerate(counts, 1):
        yield f"ngram {m}={k}"
    for m, lines in enumerate(sections, 1):
        yield ""
        yield f"\\{m}-grams:"
        yield from lines
    yield ""
    yield "\\end\\"


#: Text is encoded (and compressed) in pieces of about this many characters, so a large
#: model's file is streamed to disk rather than built in memory.
CHUNK_CHARS = 1 << 20


def _chunks(lines: Iterable[str]) -> Iterator[bytes]:
    batch: list[str] = []
    size = 0
    for line in lines:
        batch.append(line)
        size += len(line) + 1
        if size >= CHUNK_CHARS:
            yield ("\n".join(batch) + "\n").encode("utf-8")
            batch, size = [], 0
    if batch:
        yield ("\n".join(batch) + "\n").encode("utf-8")


def _gzipped(chunks: Iterable[bytes]) -> Iterator[bytes]:
    """One gzip member, level 9, modification time 0 (the same bytes for the same text)."""
    z = zlib.compressobj(9, zlib.DEFLATED, 31)
    for chunk in chunks:
        out = z.compress(chunk)
        if out:
            yield out
    yield z.flush()


def _write(lines: Iterable[str], path: PathArg) -> None:
    """Write the lines atomically, streamed; a name ending in ``.gz`` is gzip-compressed."""
    chunks = _chunks(lines)
    atomic_write(path, _gzipped(chunks) if os.fspath(path).endswith(".gz") else chunks)


# -- a loaded model file, any estimator and order ------------------------------------------


def fitted_from_model(model: Model, *, lam: float | None = None) -> Fitted:
    """The fitted estimator a model file stores, scoring exactly as the model does.

    Built from the stored levels (:meth:`Model.stored_levels`: values and context totals as
    queries read them): Jelinek-Mercer with the λ
    per order a query uses (``lam`` replaces every order's, as at query time; else a bigram
    file's λ buckets by history count apply), Kneser-Ney with the file's discounts (``lam``
    is refused: it has no λ).
    """
    levels = model.stored_levels()
    counts = NgramCounts(model.n_words, tuple(lev.grams for lev in levels), tuple(lev.value for lev in levels))
    if model.estimator == "kn":
        if lam is not None:
            raise InvalidArgumentError(f"lam={lam!r} given for a Kneser-Ney model, which has no λ")
        return FittedKneserNey(counts, levels, [Discounts(*d) for d in model.discounts], {})
    lams = model.query_lambdas(lam)
    buckets: list[tuple[list[int], list[float]] | None] = [None] * (model.order - 1)
    if lam is None and model.order == 2 and model.uses_lambda_buckets():
        buckets = [(list(model.lambda_bounds), list(model.lambda_values))]
    return FittedJelinekMercer(counts, levels, [1.0, *lams], [None, *buckets])


def arpa_lines(model: Model, *, lam: float | None = None) -> Iterator[str]:
    """The ARPA text of ``model`` (any estimator and order), line by line (``lam`` overrides λ)."""
    return arpa_lines_fitted(fitted_from_model(model, lam=lam), model.word_keys())


def write_arpa(model: Model, path: PathArg, *, lam: float | None = None) -> list[int]:
    """Write the ARPA file of ``model`` (any estimator, order 2 or 3) atomically.

    A name ending in ``.gz`` is gzip-compressed. Raises
    :class:`~nextword.errors.InvalidArgumentError` if ``path`` is the model file (checked
    before any work). Returns the number of entries per order (unigrams include ``<s>``).
    """
    check_outputs([("model", model.path)], [("ARPA file", path)])
    return write_arpa_fitted(fitted_from_model(model, lam=lam), model.word_keys(), path)


# -- any fitted estimator, order 1..3 ------------------------------------------------------


def _pack(rows: np.ndarray, base: int) -> np.ndarray:
    """One int64 per id row (rows of at most two ids here), ordered like the rows."""
    if base ** max(rows.shape[1], 1) >= 2**63:
        raise InvalidArgumentError(f"{base} ids do not fit a packed key of {rows.shape[1]} ids")
    key = np.zeros(len(rows), np.int64)
    for c in range(rows.shape[1]):
        key = key * base + rows[:, c]
    return key


def _lookup(table: np.ndarray, rows: np.ndarray, base: int) -> np.ndarray:
    """Index of each row in the sorted distinct ``table`` rows, or −1."""
    if len(table) == 0 or len(rows) == 0:
        return np.full(len(rows), -1, np.int64)
    tk, rk = _pack(table, base), _pack(rows, base)
    pos = np.minimum(np.searchsorted(tk, rk), len(tk) - 1)
    return np.where(tk[pos] == rk, pos, -1).astype(np.int64)


class _Tables:
    """Per order: the listed n-grams (stored + added contexts), P of each, γ of each context.

    P is evaluated bottom-up with the estimator's own α and γ in the operation order of
    :meth:`Fitted.prob` (``α + γ·lower``), so it equals the model's probability exactly.
    """

    def __init__(self, fitted: Fitted) -> None:
        self.fitted = fitted
        self.base = fitted.bos + 1
        order = fitted.order
        # P_1 of every outcome, plus <s> (never predicted) at the end
        self.p1 = np.concatenate([fitted.floor(), [0.0]])
        self.gammas: list[np.ndarray] = []  # gammas[m-1][j]: γ_m of context j of order m
        self.stored_p: list[np.ndarray] = []  # P_m of each stored n-gram of order m
        for m in range(1, order + 1):
            lev = fitted.levels[m - 1]
            g = np.asarray([fitted.gamma(m, j) for j in range(len(lev.ctx))], dtype=np.float64)
            self.gammas.append(g)
            if m == 1:
                self.stored_p.append(self.p1[lev.grams[:, 0]] if len(lev.grams) else np.zeros(0))
                continue
            owner = np.repeat(np.arange(len(lev.ctx)), np.diff(lev.ctx_start))
            alpha = np.asarray([fitted.alpha(m, int(j), i) for i, j in enumerate(owner)], dtype=np.float64)
            lower = self.prob_rows(m - 1, lev.grams[:, 1:])
            self.stored_p.append(alpha + g[owner] * lower)
        # listed n-grams per order m >= 2: stored ones plus contexts of order m+1 that are missing
        self.listed: list[np.ndarray] = []
        self.listed_p: list[np.ndarray] = []
        for m in range(1, order + 1):
            grams, p = fitted.levels[m - 1].grams, self.stored_p[m - 1]
            if 2 <= m < order:
                ctx = fitted.levels[m].ctx
                missing = ctx[_lookup(grams, ctx, self.base) < 0]
                if len(missing):
                    grams = np.concatenate([grams, missing])
                    p = np.concatenate([p, self.prob_rows(m, missing)])
                    sort = np.lexsort(grams.T[::-1])
                    grams, p = grams[sort], p[sort]
            self.listed.append(grams)
            self.listed_p.append(p)

    def prob_rows(self, m: int, rows: np.ndarray) -> np.ndarray:
        """P_m(w | h) for each row (h w) of m ids, stored or not (what :meth:`Fitted.prob` does)."""
        if m == 1:
            return self.p1[rows[:, 0]]
        lev = self.fitted.levels[m - 1]
        lower = self.prob_rows(m - 1, rows[:, 1:])
        i = _lookup(lev.grams, rows, self.base)
        j = _lookup(lev.ctx, rows[:, :-1], self.base)
        g = self.gammas[m - 1]
        unstored = np.where(j >= 0, g[np.maximum(j, 0)] * lower if len(g) else lower, lower)
        return np.where(i >= 0, self.stored_p[m - 1][np.maximum(i, 0)] if len(lev.grams) else 0.0, unstored)

    def backoffs(self, m: int) -> list[str | None]:
        """log10 γ_{m+1} of each listed n-gram of order m that is a context of order m+1, else None."""
        rows = self.listed[m - 1]
        if m >= self.fitted.order:
            return [None] * len(rows)
        j = _lookup(self.fitted.levels[m].ctx, rows, self.base)
        g = self.gammas[m]
        return [None if k < 0 else _log10(float(g[k])) for k in j.tolist()]


def _check_keys(fitted: Fitted, keys: Sequence[str]) -> list[str]:
    if isinstance(keys, str) or len(keys) != fitted.n_words:
        raise InvalidArgumentError(f"need one key per word id (0..{fitted.n_words - 1}), got {len(keys)} keys")
    seen: set[str] = set()
    for i, k in enumerate(keys):
        if not isinstance(k, str) or not k or any(ch.isspace() for ch in k):
            raise InvalidArgumentError(f"word key {k!r} (id {i}) must be a non-empty string without white space")
        if k in (BOS, EOS, UNK) or k in seen:
            raise InvalidArgumentError(f"word key {k!r} (id {i}) is a special token or repeats an earlier key")
        seen.add(k)
    return [*keys, EOS, UNK, BOS]


def arpa_lines_fitted(fitted: Fitted, keys: Sequence[str]) -> Iterator[str]:
    """The ARPA text of a fitted interpolated model of order 1..3, line by line.

    ``keys[i]`` is the written form of word id i (unique, no white space); ``</s>``,
    ``<unk>`` and ``<s>`` name ids n, n+1, n+2. Unigrams: every outcome plus ``<s>``.
    """
    return _fitted_document(fitted, keys)[1]


def _fitted_document(fitted: Fitted, keys: Sequence[str]) -> tuple[list[int], Iterator[str]]:
    names = _check_keys(fitted, keys)
    t = _Tables(fitted)
    n_out = fitted.n_outcomes
    counts = [n_out + 1] + [len(g) for g in t.listed[1:]]

    def unigrams() -> Iterator[str]:
        ctx1 = np.full(n_out + 1, -1, np.int64)
        if fitted.order > 1:
            lev2 = fitted.levels[1]
            ctx1[lev2.ctx[:, 0]] = np.arange(len(lev2.ctx))
        for w in range(n_out + 1):
            prob = "-99" if w == n_out else _log10(float(t.p1[w]))
            j = int(ctx1[w])
            yield f"{prob}\t{names[w]}" if j < 0 else f"{prob}\t{names[w]}\t{_log10(float(t.gammas[1][j]))}"

    def section(m: int) -> Iterator[str]:
        bows = t.backoffs(m)
        columns = [[names[i] for i in col] for col in t.listed[m - 1].T.tolist()]  # one list lookup per id
        for words, p, bow in zip(map(" ".join, zip(*columns)), t.listed_p[m - 1].tolist(), bows):
            yield f"{_log10(p)}\t{words}" if bow is None else f"{_log10(p)}\t{words}\t{bow}"

    return counts, _document(counts, [unigrams(), *(section(m) for m in range(2, fitted.order + 1))])


def write_arpa_fitted(
    fitted: Fitted, keys: Sequence[str], path: PathArg, *, inputs: Sequence[PathArg] = ()
) -> list[int]:
    """Write ``fitted`` (order 1..3, any interpolated estimator) as an ARPA back-off file.

    Atomic; a name ending in ``.gz`` is gzip-compressed. ``inputs`` are the files the
    model came from (model file, corpora): the ARPA file must not be one of them
    (:class:`~nextword.errors.InvalidArgumentError`, checked before any work). Returns
    the number of entries written per order (unigrams include ``<s>``).
    """
    check_outputs([("input", p) for p in inputs], [("ARPA file", path)])
    counts, lines = _fitted_document(fitted, keys)
    _write(lines, path)
    return counts


# -- a mixture of models -------------------------------------------------------------------------


def write_arpa_mix(mix: MixedModel, path: PathArg) -> list[int]:
    """Write a mixture as an ARPA back-off file (static interpolation), atomically.

    A mixture of back-off models is not itself a back-off model: after a context h, a
    word no part lists scores Σ_i w_i·γ_i(h)·P_i(w | h′), which is not one weight times one
    lower-order distribution. The file is the usual static approximation of it:

    * every n-gram some part lists (in the union vocabulary; a context word a part lacks
      is that part's ``<unk>``, as the mixture reads it) with the **exact** mixture
      probability Σ_i w_i·P_i(w | h) — at the highest order these are the mixture's own
      probabilities (:meth:`MixedModel.prob_after`); a lower order m uses each part's
      order-m distribution, which is what a sentence start asks for and what the file
      backs off to;
    * every context with the back-off weight that makes it sum to 1 over the outcomes:
      bow(h) = (1 − Σ_listed P(w | h)) / (1 − Σ_listed P_file(w | h′)).

    So the file reproduces the mixture for every listed n-gram and sums to 1 for every
    context; an unlisted n-gram gets bow(h)·P(w | h′) instead of the exact mixture
    (tests/test_mix.py measures both). Returns the entries per order.
    """
    paths = [("model", str(p.path)) for p in mix.parts]
    check_outputs(paths, [("ARPA file", path)])
    keys = mix.union_keys()
    n = len(keys)
    names = [*keys, EOS, UNK, BOS]
    eos, unk, bos = n, n + 1, n + 2
    base = n + 3
    order = mix.order
    # each part: its exact tables, and the map from union ids to its own ids
    tables: list[_Tables] = []
    maps: list[np.ndarray] = []  # union id -> part id as a context token (unknown word -> part's <unk>)
    present: list[np.ndarray] = []  # union id -> whether the part predicts it with its own probability
    part_keys = [part.word_keys() for part in mix.parts]
    for part, pk in zip(mix.parts, part_keys):
        pn = len(pk)
        index = {k: i for i, k in enumerate(pk)}
        mp = np.full(base, pn + 1, np.int64)  # default: the part's <unk>
        have = np.zeros(base, bool)
        for u, k in enumerate(keys):
            i = index.get(k)
            if i is not None:
                mp[u], have[u] = i, True
        mp[eos], mp[unk], mp[bos] = pn, pn + 1, pn + 2
        have[eos] = have[unk] = True
        tables.append(_Tables(fitted_from_model(part)))
        maps.append(mp)
        present.append(have)

    def mix_prob(m: int, rows: np.ndarray) -> np.ndarray:
        """Σ_i w_i·P_i^(m)(w | h) for union rows (h w) of m ids (each part at most its own order)."""
        out = np.zeros(len(rows), np.float64)
        for t, mp, have, w in zip(tables, maps, present, mix.weights):
            mm = min(m, t.fitted.order)
            part_rows = mp[rows[:, m - mm:]]
            p = t.prob_rows(mm, part_rows) if len(rows) else np.zeros(0)
            out += w * np.where(have[rows[:, -1]], p, 0.0)
        return out

    # listed n-grams per order: the union of the parts' listed n-grams, in union ids
    listed: list[np.ndarray] = [np.arange(base, dtype=np.int64).reshape(-1, 1)]
    pos = {k: i for i, k in enumerate(names)}
    to_union = [np.asarray([pos[k] for k in [*pk, EOS, UNK, BOS]], np.int64) for pk in part_keys]
    for m in range(2, order + 1):
        found = []
        for t, tu in zip(tables, to_union):
            if m > t.fitted.order:
                continue
            found.append(tu[t.listed[m - 1]])
        rows = np.unique(np.concatenate(found), axis=0) if found else np.zeros((0, m), np.int64)
        listed.append(rows)
    # a listed context of order m+1 must be listed at order m (it carries the back-off weight)
    for m in range(order - 1, 1, -1):
        ctx = np.unique(listed[m][:, :-1], axis=0) if len(listed[m]) else np.zeros((0, m), np.int64)
        missing = ctx[_lookup(listed[m - 1], ctx, base) < 0]
        if len(missing):
            listed[m - 1] = np.unique(np.concatenate([listed[m - 1], missing]), axis=0)
    probs = [mix_prob(1, listed[0][:eos + 2])]  # every outcome; <s> is never predicted
    probs[0] = np.concatenate([probs[0], [0.0]])
    for m in range(2, order + 1):
        probs.append(mix_prob(m, listed[m - 1]))
    bows: list[np.ndarray] = [np.zeros(len(listed[m - 1])) for m in range(1, order + 1)]  # log10 bow per listed row

    def file_prob(m: int, rows: np.ndarray) -> np.ndarray:
        """What a reader of the file computes for rows (h w) of m ids, with the weights found so far."""
        if m == 1:
            return probs[0][rows[:, 0]]
        i = _lookup(listed[m - 1], rows, base)
        j = _lookup(listed[m - 2], rows[:, :-1], base)
        low = file_prob(m - 1, rows[:, 1:])
        logb = np.nan_to_num(bows[m - 2], nan=0.0)  # a context without a weight backs off with weight 1
        bw = np.where(j >= 0, 10.0 ** logb[np.maximum(j, 0)], 1.0) if len(listed[m - 2]) else np.ones(len(rows))
        return np.where(i >= 0, probs[m - 1][np.maximum(i, 0)], bw * low)

    for m in range(2, order + 1):
        rows = listed[m - 1]
        if not len(rows):
            continue
        ctx_of = _lookup(listed[m - 2], rows[:, :-1], base)
        hi = np.bincount(ctx_of, weights=probs[m - 1], minlength=len(listed[m - 2]))
        lo = np.bincount(ctx_of, weights=file_prob(m - 1, rows[:, 1:]), minlength=len(listed[m - 2]))
        has = np.bincount(ctx_of, minlength=len(listed[m - 2])) > 0
        tiny = 1e-300
        bow = np.maximum(1.0 - hi, tiny) / np.maximum(1.0 - lo, tiny)
        bows[m - 2] = np.where(has, np.log10(bow), np.nan)  # NaN: no back-off weight written
    counts = [len(listed[0])] + [len(listed[m - 1]) for m in range(2, order + 1)]

    def section(m: int) -> Iterator[str]:
        columns = [[names[i] for i in col] for col in listed[m - 1].T.tolist()]
        p = probs[m - 1].tolist()
        b = bows[m - 1].tolist() if m < order else [math.nan] * len(p)
        for idx, words in enumerate(map(" ".join, zip(*columns))):
            prob = "-99" if m == 1 and listed[0][idx, 0] == bos else _log10(p[idx])
            yield f"{prob}\t{words}" if math.isnan(b[idx]) else f"{prob}\t{words}\t{b[idx]:.10f}"

    _write(_document(counts, [section(m) for m in range(1, order + 1)]), path)
    return counts
