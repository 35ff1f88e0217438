"""Mixtures of models: a general model and a domain model, with weights fitted on held-out text.

Keyboard engineers rarely have one corpus that fits: a large general text and a small
sample of their own users' domain. Counting both as one corpus lets the large one drown
the small one; mixing two separately trained models keeps the domain's own statistics and
borrows the general model's vocabulary and contexts where the domain has none:

    P(w | h) = Σ_i  w_i · P_i(w | h),   w_i ≥ 0,  Σ_i w_i = 1

over the **union vocabulary** of the parts. Each part reads the context its own way (a
bigram part the last word, a trigram part the last two, each through its own vocabulary).

**A word missing from a part** gets nothing from that part: the part's ``<unk>`` share
stays with the unknown-word outcome (so the mixture's ``<unk>`` is Σ_i w_i · P_i(<unk> | h)
minus nothing). This split is a choice: a part that never saw a word has no information
about it beyond "some unseen word", the other parts already give the word their own
probability, and keeping each part's unknown mass on ``<unk>`` keeps the perplexity of a
mixture comparable with its parts' on the same text (an out-of-vocabulary token costs
what it costs them). Every context still sums to 1 over the union, ``</s>`` and ``<unk>``
(tests/test_mix.py, hypothesis).

**Spelling.** A word is shown in the display spelling of the heaviest part that has it
(the earlier part on equal weights), so a mixture always shows one word one way.

**Ranking** is exact: the k words returned are the first k of *every* union word with
the prefix ordered by (mixture probability descending, key ascending); see
:meth:`MixedModel.rank_after` for why a few entries from each part's own exact top list
suffice (Fagin's threshold algorithm over the parts' sorted lists).

**Weights** come from EM on held-out text (:func:`fit_weights`, the standard update for
mixture weights; it never lowers the held-out likelihood), or are given.

The mixture is a small file of its own (:func:`write_mix`, docs/FORMAT.md "Mixture
files") that names its parts by path relative to itself, with each part's size and
SHA-256, so a part replaced after mixing is caught on opening rather than silently mixed
with weights fitted for another file.
"""

from __future__ import annotations

import bisect
import hashlib
import math
import os
from dataclasses import asdict, dataclass
from typing import Any, Iterable, Iterator, Sequence, TypeAlias

import msgpack
import numpy as np

from .errors import InputDataError, InvalidArgumentError, ModelFormatError
from .keyboard import Channel
from .model import Model, Suggestion, check_k, load
from .store import atomic_write
from .text import BOS, EOS, UNK, fold, parse_typed, recase, sentences

__all__ = [
    "Predictor",
    "MIX_MAGIC",
    "MIX_VERSION",
    "MAX_PARTS",
    "MixedModel",
    "check_weights",
    "fit_weights",
    "load_mix",
    "write_mix",
    "is_mix_file",
    "open_any",
    "EMResult",
]

#: The first 8 bytes of a mixture file (a model file starts with b"\x89NWM\r\n\x1a\n").
MIX_MAGIC = b"\x89NWX\r\n\x1a\n"
#: (major, minor) of the mixture file this module writes and reads.
MIX_VERSION = (1, 0)
#: At most this many parts (each suggest call asks every part; more is never worth it).
MAX_PARTS = 8
#: Largest mixture file accepted (a list of a few paths and numbers).
_MAX_MIX_BYTES = 1 << 20
#: Weights must sum to 1 within this (what a user types, e.g. 0.3 0.7, and float sums).
_SUM_TOLERANCE = 1e-6
#: How deep each part's sorted list starts when a part does not say (its skyband depth):
#: a list too short to bound the unmet words costs a second round, four times deeper,
#: which costs more than the deeper first list (measured: depth 4 → 1.6× the time of 8).
_FIRST_DEPTH = 8


def check_weights(weights: Sequence[float], n_parts: int) -> list[float]:
    """``weights`` as floats if there is one per part, each in [0, 1], summing to 1 (±1e-6); else InvalidArgumentError.

    The sum is then made exact (each weight divided by the sum), so a typed 0.3 0.7 works.
    """
    if isinstance(weights, (str, bytes)) or not isinstance(weights, Sequence):
        raise InvalidArgumentError(f"weights must be a sequence of numbers, got {type(weights).__name__}")
    if len(weights) != n_parts:
        raise InvalidArgumentError(f"{len(weights)} weights given for {n_parts} parts; give one weight per part")
    out = []
    for w in weights:
        if isinstance(w, bool) or not isinstance(w, (int, float)) or not math.isfinite(w):
            raise InvalidArgumentError(f"a weight must be a finite number, got {w!r}")
        if w < 0:
            raise InvalidArgumentError(f"a weight must not be negative, got {w!r}")
        out.append(float(w))
    try:
        total = math.fsum(out)
    except OverflowError:  # e.g. [1e308, 1e308]: no sum, so not 1
        raise InvalidArgumentError(f"weights must sum to 1, got {' + '.join(repr(w) for w in out)} (overflows)") from None
    if abs(total - 1.0) > _SUM_TOLERANCE:
        raise InvalidArgumentError(f"weights must sum to 1, got {' + '.join(repr(w) for w in out)} = {total!r}")
    return [w / total for w in out]


class MixedModel:
    """A weighted mixture of loaded models, queried like one :class:`~nextword.Model`.

    Read-only and safe to share between threads (its parts are). Build one from loaded
    parts, or open a mixture file with :func:`load_mix`.
    """

    #: what ``header()["estimator"]`` and the CLI call this kind of model
    estimator = "mix"

    def __init__(self, parts: Sequence[Model], weights: Sequence[float], *, path: str | None = None) -> None:
        if isinstance(parts, Model) or not isinstance(parts, Sequence) or not parts:
            raise InvalidArgumentError("a mixture needs a non-empty sequence of models")
        for p in parts:
            if not isinstance(p, Model):
                raise InvalidArgumentError(f"a mixture part must be a nextword.Model, got {type(p).__name__}")
        if len(parts) > MAX_PARTS:
            raise InvalidArgumentError(f"a mixture holds at most {MAX_PARTS} parts, got {len(parts)}")
        rules = {p.text_rules for p in parts}
        if len(rules) > 1:
            named = ", ".join(f"{p.path} (version {p.text_rules})" for p in parts)
            raise InvalidArgumentError(f"parts were counted with different text rules: {named}")
        self.parts: tuple[Model, ...] = tuple(parts)
        self.weights: tuple[float, ...] = tuple(check_weights(weights, len(parts)))
        self.path = path if path is not None else "+".join(str(p.path) for p in parts)
        #: the longest context any part reads, plus one
        self.order: int = max(p.order for p in parts)
        self.text_rules: int = parts[0].text_rules
        #: spelling preference: parts by weight descending, then as listed
        self._by_weight = sorted(range(len(parts)), key=lambda i: (-self.weights[i], i))
        depths = [p.header().get("skyband_k", _FIRST_DEPTH) for p in parts]
        self._depth = min(d for d in depths if isinstance(d, int) and d >= 1) if depths else _FIRST_DEPTH
        self._keys: list[str] | None = None  # the sorted union vocabulary, built on first use
        self._build_id_maps()
        # display spelling by key: a pure function of the immutable parts (dict reads and
        # writes are atomic, so sharing the mixture between threads stays safe)
        self._spelled: dict[str, str | None] = {}

    def _build_id_maps(self) -> None:
        """Maps between the parts' word ids, built once (about 15 ms per 30,000-word part).

        A word is named inside the mixture by its *canonical* number: offset_i + its id in
        the first part i that has it. ``_to[i][j][a]`` is part j's id of part i's word a
        (−1 if part j lacks it); ``_canon[j][b]`` the canonical number of part j's word b.
        Plain lists: indexing one is cheaper than indexing a numpy array per word.
        """
        keys = [p.word_keys() for p in self.parts]
        index = [{k: i for i, k in enumerate(ks)} for ks in keys]
        n = len(self.parts)
        self._part_keys = keys
        self._offsets = [0] * n
        for i in range(1, n):
            self._offsets[i] = self._offsets[i - 1] + len(keys[i - 1])
        self._to: list[list[list[int] | None]] = [[None] * n for _ in range(n)]
        for i in range(n):
            for j in range(n):
                if i != j:
                    get = index[j].get
                    self._to[i][j] = [get(k, -1) for k in keys[i]]
        self._canon: list[list[int]] = []
        for j in range(n):
            canon = np.arange(len(keys[j]), dtype=np.int64) + self._offsets[j]
            done = np.zeros(len(keys[j]), dtype=bool)
            for i in range(j):
                there = np.asarray(self._to[j][i], dtype=np.int64)
                hit = (there >= 0) & ~done
                canon[hit] = there[hit] + self._offsets[i]
                done |= hit
            self._canon.append(canon.tolist())
        # canonical number -> (part, id): the part that names it
        self._home = [(i, a) for i in range(n) for a in range(len(keys[i]))]
        self._shown_c: dict[int, str] = {}

    # -- lifecycle ----------------------------------------------------------------------------

    def close(self) -> None:
        """Close every part (see :meth:`Model.close`)."""
        for p in self.parts:
            p.close()

    def __enter__(self) -> MixedModel:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        inner = ", ".join(f"{w:.4g}×{p.path!r}" for p, w in zip(self.parts, self.weights))
        return f"<nextword.MixedModel {inner}>"

    # -- vocabulary -------------------------------------------------------------------------

    def __contains__(self, word: object) -> bool:
        return any(word in p for p in self.parts)

    def union_keys(self) -> list[str]:
        """Every word key of the union vocabulary, sorted (built once, on first use)."""
        keys = self._keys
        if keys is None:
            merged: set[str] = set()
            for ks in self._part_keys:
                merged.update(ks)
            keys = self._keys = sorted(merged)
        return keys

    @property
    def n_words(self) -> int:
        """Size of the union vocabulary."""
        return len(self.union_keys())

    def spelling(self, word: str) -> str | None:
        """The display spelling of ``word`` from the heaviest part that has it; None if no part has it."""
        if not isinstance(word, str):
            raise InvalidArgumentError(f"word must be str, got {type(word).__name__}")
        try:
            return self._spelled[word]
        except KeyError:
            pass
        found = None
        for i in self._by_weight:
            found = self.parts[i].spelling(word)
            if found is not None:
                break
        if len(self._spelled) >= 100_000:
            self._spelled.clear()
        self._spelled[word] = found
        return found

    def tie_rank(self, word: str) -> int:
        """Where ``word`` goes among words of equal probability: its position in the sorted union (``n_words`` if absent)."""
        if not isinstance(word, str):
            raise InvalidArgumentError(f"word must be str, got {type(word).__name__}")
        keys = self.union_keys()
        key = fold(word)
        i = bisect.bisect_left(keys, key)
        return i if i < len(keys) and keys[i] == key else len(keys)

    def words(self) -> Iterator[tuple[str, int]]:
        """(display spelling, summed stored unigram value) of every union word, by that value descending."""
        totals: dict[str, int] = {}
        for p, keys in zip(self.parts, self._part_keys):
            for key, (_, c) in zip(keys, p.words()):
                totals[key] = totals.get(key, 0) + int(c)
        for key, c in sorted(totals.items(), key=lambda kv: (-kv[1], kv[0])):
            yield self.spelling(key) or key, c

    def history_count(self, previous_word: str | None) -> int:
        """The largest c(v) as a history over the parts (how common a context is somewhere)."""
        return max(p.history_count(previous_word) for p in self.parts)

    # -- probabilities ------------------------------------------------------------------------

    def _no_lam(self, lam: float | None) -> None:
        if lam is not None:
            raise InvalidArgumentError(f"lam={lam!r} given for a mixture; set λ in its parts (nextword tune)")

    def _part_word(self, word: str) -> tuple[str, list[bool]]:
        """(the word as the parts are asked, which parts have it); a word no part has is asked as <unk>."""
        if word in (EOS, UNK):
            return word, [True] * len(self.parts)
        if word == BOS:
            raise InvalidArgumentError("'<s>' is never predicted")
        has = [word in p for p in self.parts]
        return (word, has) if any(has) else (UNK, [True] * len(self.parts))

    def prob_after(self, word: str, history: Sequence[str | None], *, lam: float | None = None) -> float:
        """P(word | history) under the mixture (``history`` oldest first; ``None``/``'<s>'`` = sentence start)."""
        self._no_lam(lam)
        if not isinstance(word, str):
            raise InvalidArgumentError(f"word must be str, got {type(word).__name__}")
        asked, has = self._part_word(word)
        s = 0.0
        for p, w, h in zip(self.parts, self.weights, has):
            s += w * (p.prob_after(asked, history) if h else 0.0)
        return s

    def prob(self, word: str, previous_word: str | None = None, *, lam: float | None = None) -> float:
        """P(word | previous_word) under the mixture: :meth:`prob_after` with a one-token history."""
        return self.prob_after(word, (previous_word,), lam=lam)

    def probs_after(self, words: Sequence[str], history: Sequence[str | None], *, lam: float | None = None) -> list[float]:
        """:meth:`prob_after` of each of ``words``, bit for bit, each part asked once per call."""
        self._no_lam(lam)
        if isinstance(words, str) or not isinstance(words, Sequence):
            raise InvalidArgumentError(f"words must be a sequence of words, got {type(words).__name__}")
        for w in words:
            if not isinstance(w, str):
                raise InvalidArgumentError(f"words must be str, got {type(w).__name__}")
        asked = [self._part_word(w) for w in words]
        out = [0.0] * len(words)
        for i, (p, wt) in enumerate(zip(self.parts, self.weights)):
            idx = [j for j, (_, has) in enumerate(asked) if has[i]]
            probs = p.probs_after([asked[j][0] for j in idx], history) if idx else []
            got = dict(zip(idx, probs))
            for j in range(len(words)):
                out[j] += wt * got.get(j, 0.0)
        return out

    def token_probs(self, lines: Iterable[str]) -> np.ndarray:
        """P_i(token | its context) for every predicted token of ``lines``, one column per part.

        Tokens are cut as in training (``</s>`` ends each sentence, a number or symbol is
        ``<unk>``); a word some part lacks has 0 in that part's column, a word every part
        lacks is each part's ``<unk>``. What :func:`fit_weights` and :meth:`log_likelihood` use.
        """
        if isinstance(lines, str):
            raise InvalidArgumentError("expected an iterable of messages, not one string")
        rows: list[list[float]] = []
        for line in lines:
            for sent in sentences(line):
                hist: list[str | None] = [BOS]
                for tok in [*sent, EOS]:
                    w = UNK if tok is None else tok
                    asked, has = self._part_word(w if w in (EOS, UNK) else fold(w))
                    rows.append([p.prob_after(asked, hist[-2:]) if h else 0.0 for p, h in zip(self.parts, has)])
                    hist.append(w)
        return np.asarray(rows, dtype=np.float64).reshape(-1, len(self.parts))

    def log_likelihood(self, lines: Iterable[str], *, lam: float | None = None) -> tuple[float, int]:
        """(Σ ln P, predicted tokens) over ``lines`` under the mixture, as :meth:`Model.log_likelihood`."""
        self._no_lam(lam)
        probs = self.token_probs(lines)
        log_sum = 0.0
        for row in probs.tolist():
            s = 0.0
            for w, p in zip(self.weights, row):
                s += w * p
            log_sum += math.log(s) if s > 0.0 else -math.inf
        return log_sum, len(probs)

    def perplexity(self, lines: Iterable[str], *, lam: float | None = None) -> float:
        """Per-token perplexity of ``lines`` under the mixture (``</s>`` and ``<unk>`` counted)."""
        log_sum, events = self.log_likelihood(lines, lam=lam)
        if events == 0:
            raise InvalidArgumentError("no words to score: the text is empty")
        return math.exp(-log_sum / events)

    # -- ranking -------------------------------------------------------------------------------

    def rank_after(
        self, history: Sequence[str | None], prefix: str = "", k: int = 3, *, lam: float | None = None,
        typo: Channel | None = None,
    ) -> list[tuple[str, float]]:
        """Top k (key, P) under the mixture after ``history`` among union words starting with ``prefix``.

        Exact: equal to scoring every union word that starts with ``prefix`` with
        :meth:`prob_after` and sorting by (probability descending, key ascending).

        Why a few entries per part suffice (the threshold algorithm): each part returns
        its own exact top ``m`` (:meth:`Model.rank_after`) with probabilities
        t_i,1 ≥ … ≥ t_i,m. A word x in none of the lists has P_i(x) ≤ t_i,m in every part
        whose list is not the whole range (and P_i(x) = 0 where it is: x is not in that
        part), so score(x) ≤ Σ_i w_i·t_i,m — multiplication by w_i ≥ 0 and addition are
        monotone in IEEE arithmetic, and the bound is summed in the same order as the
        scores. Every word met in some list is scored exactly (the other parts asked for
        it directly). Once the k-th best exact score is *strictly* above the bound, no
        unmet word can enter or tie; otherwise every part's list is made four times deeper.
        """
        self._no_lam(lam)
        k = check_k(k)
        if not isinstance(prefix, str):
            raise InvalidArgumentError(f"prefix must be str, got {type(prefix).__name__}")
        if typo is not None:
            if not isinstance(typo, Channel):
                raise InvalidArgumentError(f"typo must be a nextword.keyboard.Channel or None, got {type(typo).__name__}")
            return [(self._key_c(c), p) for c, p in self._rank_typo(tuple(history), prefix, k, typo)]
        return self._rank(tuple(history), prefix, k)

    def rank_ids(self, previous_word: str | None, prefix: str = "", k: int = 3, *, lam: float | None = None) -> list[tuple[str, float]]:
        """:meth:`rank_after` with the one-token context ``(previous_word,)``."""
        return self.rank_after((previous_word,), prefix, k, lam=lam)

    def _rank(self, hist: tuple[str | None, ...], prefix: str, k: int) -> list[tuple[str, float]]:
        return [(self._key_c(c), p) for c, p in self._rank_c(hist, prefix, k)]

    def _key_c(self, c: int) -> str:
        i, a = self._home[c]
        return self._part_keys[i][a]

    def _rank_c(self, hist: tuple[str | None, ...], prefix: str, k: int) -> list[tuple[int, float]]:
        """The top k as (canonical number, probability); see :meth:`rank_after`."""
        parts, weights = self.parts, self.weights
        n = len(parts)
        want = max(k, self._depth)
        canon = self._canon
        while True:
            lists = [p.rank_after_ids(hist, prefix, want) for p in parts]
            complete = [len(lst) < want for lst in lists]
            # the most an unmet part can give a word: its list's last probability (0 for a whole range)
            cap = [0.0 if done else lst[-1][1] for lst, done in zip(lists, complete)]
            seen: dict[int, list[float | None]] = {}
            # unknown (None) where a part's list is not the whole range; a part that lacks the
            # word is found out only if the word may still enter (its id map then says -1: 0.0)
            template: list[float | None] = [0.0 if done else None for done in complete]
            for j, lst in enumerate(lists):
                cj = canon[j]
                for b, pr in lst:
                    c = cj[b]
                    row = seen.get(c)
                    if row is None:
                        row = seen[c] = template.copy()
                    row[j] = pr
            exact, pending = self._bounds(seen, cap, k)
            if pending:
                self._resolve(pending, seen, hist)
                for c in pending:  # every part of these is known now
                    tot = 0.0
                    for w, known in zip(weights, seen[c]):
                        tot += w * known  # type: ignore[operator]
                    exact.append((-tot, c))
            exact.sort()
            if all(complete):
                break
            bound = 0.0
            for w, cp in zip(weights, cap):
                bound += w * cp
            if len(exact) >= k and -exact[k - 1][0] > bound:
                break
            want *= 4
        if len(exact) > k:
            # equal probabilities go by key: sort the words tied with the k-th by key (only those need keys)
            last = exact[k - 1][0]
            top = [e for e in exact if e[0] <= last]
            if len(top) > k or any(top[i][0] == top[i + 1][0] for i in range(len(top) - 1)):
                top.sort(key=lambda e: (e[0], self._key_c(e[1])))
            exact = top
        elif any(exact[i][0] == exact[i + 1][0] for i in range(len(exact) - 1)):
            exact.sort(key=lambda e: (e[0], self._key_c(e[1])))
        return [(c, -s) for s, c in exact[:k]]

    def _bounds(self, seen: dict[int, list[float | None]], cap: list[float], k: int) -> tuple[list[tuple[float, int]], list[int]]:
        """(−score, word) of the words whose every part is known, and the words that may still enter the top k.

        A word with an unknown part i scores between its sum with P_i = 0 and with P_i =
        cap_i (the same additions in the same order, monotone): one whose upper end is
        strictly below the k-th best lower end cannot enter, and is never looked up.
        """
        weights = self.weights
        exact: list[tuple[float, int]] = []
        partial: list[tuple[float, int]] = []
        lows: list[float] = []
        for c, row in seen.items():
            lo = hi = 0.0
            known = True
            for w, pr, cp in zip(weights, row, cap):
                if pr is None:
                    known = False
                    hi += w * cp
                else:
                    lo += w * pr
                    hi += w * pr
            lows.append(lo)
            if known:
                exact.append((-lo, c))
            else:
                partial.append((hi, c))
        if not partial:
            return exact, []
        lows.sort(reverse=True)
        kth = lows[k - 1] if len(lows) >= k else -1.0
        return exact, [c for hi, c in partial if hi >= kth]

    def _resolve(self, words: list[int], seen: dict[int, list[float | None]], hist: tuple[str | None, ...]) -> None:
        """Fill in every unknown part probability of ``words`` (one batched lookup per part)."""
        home, to = self._home, self._to
        for j, p in enumerate(self.parts):
            ask, ids = [], []
            for c in words:
                row = seen[c]
                if row[j] is not None:
                    continue
                i0, a = home[c]
                b = a if i0 == j else to[i0][j][a]  # type: ignore[index]
                if b < 0:
                    row[j] = 0.0  # the part lacks the word: it gives it nothing
                else:
                    ask.append(c)
                    ids.append(b)
            if ids:
                for c, pr in zip(ask, p.probs_of_ids(ids, hist)):
                    seen[c][j] = pr

    def _shown(self, c: int) -> str:
        """Display spelling of canonical word c: from the heaviest part that has it."""
        hit = self._shown_c.get(c)
        if hit is not None:
            return hit
        i0, a = self._home[c]
        for j in self._by_weight:
            b = a if j == i0 else self._to[i0][j][a]  # type: ignore[index]
            if b >= 0:
                shown = self.parts[j].display(b)
                break
        if len(self._shown_c) >= 100_000:
            self._shown_c.clear()
        self._shown_c[c] = shown
        return shown

    def suggest(self, typed: str, k: int = 3, *, lam: float | None = None, typo: Channel | None = None) -> list[Suggestion]:
        """Like :meth:`Model.suggest`, over the mixture: complete the partial word or predict the next one.

        With ``typo`` (a :class:`~nextword.keyboard.Channel`) the partial word may hold a
        slip, as in :meth:`Model.suggest`; scores are then channel weight × mixture probability.
        """
        self._no_lam(lam)
        if not isinstance(typed, str):
            raise InvalidArgumentError(f"typed must be str, got {type(typed).__name__}")
        k = check_k(k)
        ctx = parse_typed(typed)
        at_start = ctx.previous == BOS
        ranked = self._rank_c(ctx.history, ctx.prefix, k) if typo is None else self._rank_typo(ctx.history, ctx.prefix, k, typo)
        return [Suggestion(recase(self._shown(c), ctx.prefix, at_start), p) for c, p in ranked]

    def typo_prefixes(self, prefix: str, typo: Channel) -> list[tuple[str, float]]:
        """The union prefixes typed ``prefix`` may have meant under ``typo``, with channel weights, best first.

        The union of the parts' readings (:meth:`Model.typo_prefixes`); a reading's weight
        depends only on the typed letters and the reading, so parts agree on it.
        """
        readings: dict[str, float] = {}
        for p in self.parts:
            for r, w in p.typo_prefixes(prefix, typo):
                if w > readings.get(r, -1.0):
                    readings[r] = w
        return sorted(readings.items(), key=lambda t: (-t[1], t[0]))

    def _rank_typo(self, hist: tuple[str | None, ...], prefix: str, k: int, typo: Channel) -> list[tuple[int, float]]:
        """Top k by channel weight × mixture probability, each word with its best reading.

        Exact as ``candidates.merge_ranked`` is: a word of the true top k is in the exact top
        k of the reading that gives it its best weight (fl(w·p) is monotone in p), so the
        mixture's exact top k per reading, merged by best score, holds it. Ties by key.
        """
        best: dict[int, float] = {}
        for reading, w in self.typo_prefixes(prefix, typo):
            for c, p in self._rank_c(hist, reading, k):
                s = w * p
                if s > best.get(c, -1.0):
                    best[c] = s
        top = sorted(best.items(), key=lambda t: (-t[1], self._key_c(t[0])))
        return top[:k]

    # -- description ------------------------------------------------------------------------------

    def header(self) -> dict[str, Any]:
        """The mixture as plain data: parts (path, estimator, order), weights, and the parts' smallest skyband depth."""
        return {
            "estimator": self.estimator,
            "order": self.order,
            "text_rules": self.text_rules,
            "weights": list(self.weights),
            "parts": [{"path": str(p.path), "estimator": p.estimator, "order": p.order} for p in self.parts],
            "skyband_k": self._depth,
        }

    def info(self) -> dict[str, Any]:
        """Sizes and settings, as plain data (for ``nextword info``): the mixture and each part's own info."""
        parts = [p.info() for p in self.parts]
        return {
            "path": self.path,
            "kind": "mixture",
            "weights": list(self.weights),
            "vocabulary": self.n_words,
            "file_bytes": sum(int(d["file_bytes"]) for d in parts) + (os.path.getsize(self.path) if os.path.isfile(self.path) else 0),
            "parts": parts,
        }


#: What evaluation, the personal layer, the service and the typing views accept: a model
#: file or a mixture (both answer suggest, rank_after, probs_after, prob_after, spelling,
#: tie_rank, words, history_count, header, info, log_likelihood).
Predictor: TypeAlias = "Model | MixedModel"


# -- fitting the weights ---------------------------------------------------------------------------


@dataclass(frozen=True)
class EMResult:
    """What :func:`fit_weights` found, and on how much text."""

    weights: list[float]
    iterations: int
    #: Σ ln P of the held-out tokens under the fitted mixture, and their number
    log_likelihood: float
    tokens: int
    perplexity: float
    #: held-out words some part knows / no part knows (the out-of-vocabulary count)
    known_words: int
    unknown_words: int

    def as_dict(self) -> dict[str, Any]:
        """Plain data (for JSON output and the mixture file's ``fitted`` record)."""
        return asdict(self)


def fit_weights(
    parts: Sequence[Model], lines: Iterable[str], *, max_iterations: int = 500, tolerance: float = 1e-9
) -> EMResult:
    """Mixture weights that maximise the likelihood of held-out ``lines`` (EM), from equal weights.

    The EM update for mixture weights (Dempster, Laird & Rubin 1977; common practice for
    interpolating language models): w_i ← mean over tokens of w_i·P_i / Σ_j w_j·P_j. Each
    step never lowers the held-out likelihood, and the likelihood is concave in the
    weights, so the fixed point is the global optimum. Stops when no weight moves by more
    than ``tolerance``.

    Raises InputDataError when the held-out text has no word any part knows: then every
    token is ``<unk>`` and the weights would be fitted to nothing but unknown-word mass.
    """
    if isinstance(max_iterations, bool) or not isinstance(max_iterations, int) or max_iterations < 1:
        raise InvalidArgumentError(f"max_iterations must be an integer >= 1, got {max_iterations!r}")
    if isinstance(tolerance, bool) or not isinstance(tolerance, (int, float)) or not tolerance > 0:
        raise InvalidArgumentError(f"tolerance must be a number > 0, got {tolerance!r}")
    lines = list(lines)
    mix = MixedModel(parts, [1.0 / len(parts)] * len(parts))
    known = unknown = 0
    for line in lines:
        for sent in sentences(line):
            for tok in sent:
                if tok is None:
                    continue
                if fold(tok) in mix:
                    known += 1
                else:
                    unknown += 1
    if known == 0:
        raise InputDataError(
            f"the held-out text has no in-vocabulary word ({unknown} words, none known to any part): nothing to fit weights on"
        )
    probs = mix.token_probs(lines)
    keep = probs.sum(axis=1) > 0.0  # a token no part can give probability (λ = 1 files only) says nothing
    probs = probs[keep]
    w = np.full(len(parts), 1.0 / len(parts))
    it = 0
    for it in range(1, max_iterations + 1):
        mixed = probs @ w
        new = (probs * w).T @ (1.0 / mixed) / len(probs)
        new /= new.sum()
        moved = float(np.abs(new - w).max())
        w = new
        if moved <= tolerance:
            break
    weights = check_weights([float(x) for x in w], len(parts))
    ll = float(np.log(probs @ np.asarray(weights)).sum())
    return EMResult(
        weights=weights, iterations=it, log_likelihood=ll, tokens=int(len(probs)),
        perplexity=math.exp(-ll / len(probs)), known_words=known, unknown_words=unknown,
    )


# -- mixture files ----------------------------------------------------------------------------------


def _sha256(path: str) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for block in iter(lambda: f.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def write_mix(path: str | os.PathLike[str], part_paths: Sequence[str | os.PathLike[str]], weights: Sequence[float], *,
              fitted: dict[str, Any] | None = None) -> None:
    """Write a mixture file at ``path`` naming ``part_paths`` (relative to ``path``'s folder) with ``weights``.

    Each part is opened first (so a damaged or foreign file is refused now, not on first
    use) and recorded with its size and SHA-256. ``fitted`` (plain data) records how the
    weights were chosen. Written atomically.
    """
    path = os.fspath(path)
    if not part_paths:
        raise InvalidArgumentError("a mixture needs at least one part")
    models = [load(p) for p in part_paths]
    try:
        MixedModel(models, weights)  # every check of the parts and weights
    finally:
        for m in models:
            m.close()
    ws = check_weights(weights, len(part_paths))
    folder = os.path.dirname(os.path.abspath(path))
    parts = []
    for p in part_paths:
        ap = os.path.abspath(os.fspath(p))
        parts.append({"path": os.path.relpath(ap, folder), "bytes": os.path.getsize(ap), "sha256": _sha256(ap)})
    body: dict[str, Any] = {"version": list(MIX_VERSION), "parts": parts, "weights": ws}
    if fitted is not None:
        body["fitted"] = fitted
    atomic_write(path, [MIX_MAGIC, msgpack.packb(body, use_bin_type=True)])


def is_mix_file(path: str | os.PathLike[str]) -> bool:
    """Whether ``path`` starts with the mixture magic (False for a missing or short file)."""
    try:
        with open(path, "rb") as f:
            return f.read(len(MIX_MAGIC)) == MIX_MAGIC
    except OSError:
        return False


def _fail(path: str, msg: str) -> ModelFormatError:
    return ModelFormatError(f"{path}: {msg}"[:400])


def read_mix(path: str | os.PathLike[str]) -> dict[str, Any]:
    """The checked contents of a mixture file: version, parts (absolute path, bytes, sha256), weights, fitted."""
    name = os.fspath(path)
    try:
        size = os.path.getsize(name)
        if size > _MAX_MIX_BYTES:
            raise _fail(name, f"a mixture file is at most {_MAX_MIX_BYTES} bytes; this one has {size}")
        with open(name, "rb") as f:
            raw = f.read(_MAX_MIX_BYTES + 1)
    except FileNotFoundError:
        raise InputDataError(f"{name}: no such file") from None
    except OSError as e:
        raise InputDataError(f"{name}: cannot read: {e.strerror or e}") from None
    if raw[: len(MIX_MAGIC)] != MIX_MAGIC:
        raise _fail(name, "not a nextword mixture file (bad magic)")
    try:
        body = msgpack.unpackb(raw[len(MIX_MAGIC):], raw=False, strict_map_key=True)
    except Exception as e:  # msgpack raises several types for damaged data
        raise _fail(name, f"damaged mixture data: {type(e).__name__}") from None
    if not isinstance(body, dict):
        raise _fail(name, "mixture data is not a map")
    version = body.get("version")
    if not (isinstance(version, list) and len(version) == 2 and all(isinstance(v, int) and not isinstance(v, bool) for v in version)):
        raise _fail(name, f"mixture field 'version' is invalid: {version!r}")
    if version[0] != MIX_VERSION[0] or version[1] > MIX_VERSION[1]:
        raise _fail(name, f"mixture version {version[0]}.{version[1]} is not supported (this nextword reads {MIX_VERSION[0]}.0–{MIX_VERSION[0]}.{MIX_VERSION[1]})")
    parts = body.get("parts")
    if not isinstance(parts, list) or not 1 <= len(parts) <= MAX_PARTS:
        raise _fail(name, f"mixture field 'parts' must list 1 to {MAX_PARTS} parts")
    folder = os.path.dirname(os.path.abspath(name))
    checked = []
    for i, part in enumerate(parts):
        if not isinstance(part, dict):
            raise _fail(name, f"part {i} is not a map")
        rel, nbytes, digest = part.get("path"), part.get("bytes"), part.get("sha256")
        if not isinstance(rel, str) or not rel or "\x00" in rel:
            raise _fail(name, f"part {i}: field 'path' is invalid: {rel!r}")
        if isinstance(nbytes, bool) or not isinstance(nbytes, int) or nbytes < 0:
            raise _fail(name, f"part {i}: field 'bytes' is invalid: {nbytes!r}")
        if not isinstance(digest, str) or len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise _fail(name, f"part {i}: field 'sha256' is invalid: {digest!r}")
        checked.append({"path": os.path.normpath(os.path.join(folder, rel)), "bytes": nbytes, "sha256": digest})
    weights = body.get("weights")
    if not isinstance(weights, list):
        raise _fail(name, f"mixture field 'weights' is invalid: {weights!r}")
    try:
        ws = check_weights(weights, len(checked))
    except InvalidArgumentError as e:
        raise _fail(name, f"mixture field 'weights': {e}") from None
    fitted = body.get("fitted")
    if fitted is not None and not isinstance(fitted, dict):
        raise _fail(name, "mixture field 'fitted' is not a map")
    return {"version": tuple(version), "parts": checked, "weights": ws, "fitted": fitted}


def load_mix(path: str | os.PathLike[str], *, verify_parts: bool = True) -> MixedModel:
    """Open a mixture file and its parts.

    Each part must have the size recorded when the mixture was written and, with
    ``verify_parts`` (the default; it reads each part once), the same SHA-256: weights
    fitted for one file say nothing about another.
    """
    name = os.fspath(path)
    data = read_mix(name)
    models: list[Model] = []
    try:
        for i, part in enumerate(data["parts"]):
            ppath = part["path"]
            if not os.path.isfile(ppath):
                raise InputDataError(f"{name}: part {i} ({ppath}) is missing")
            if os.path.getsize(ppath) != part["bytes"]:
                raise ModelFormatError(f"{name}: part {i} ({ppath}) has changed since mixing: {os.path.getsize(ppath)} bytes, recorded {part['bytes']}")
            if verify_parts and _sha256(ppath) != part["sha256"]:
                raise ModelFormatError(f"{name}: part {i} ({ppath}) has changed since mixing (SHA-256 differs)")
            models.append(load(ppath))
        return MixedModel(models, data["weights"], path=name)
    except BaseException:
        for m in models:
            m.close()
        raise


def open_any(path: str | os.PathLike[str], *, lam: float | None = None, verify: bool = False) -> Predictor:
    """A model file (:func:`nextword.load`) or a mixture file (:func:`load_mix`), told apart by magic.

    ``lam`` applies to a model file only (a mixture's parts keep their own λ).
    """
    if is_mix_file(path):
        if lam is not None:
            raise InvalidArgumentError(f"lam={lam!r} given for a mixture; set λ in its parts (nextword tune)")
        return load_mix(path)
    return load(path, lam=lam, verify=verify)
