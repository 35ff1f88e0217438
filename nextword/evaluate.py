"""Keystroke simulation: how many keystrokes a model saves on held-out typing logs.

The rules (also in README, "Measuring a model"):

* An ideal user types each message left to right; messages are independent.
* Words are the text rules' words (``nextword.text``). Before each letter of a word,
  including the first, the engine is asked ``suggest(typed, k)``. If the
  intended word, spelled exactly as in the message, is among the suggestions, one tap
  accepts it, and a single space that follows the word in the message is then free.
  Otherwise the user types the next character.
* Every other character (spaces, punctuation, digits) costs one keystroke.
* Keystroke savings KSR = 1 − keystrokes / characters (the measure framed by Trnka &
  McCoy 2008, "Evaluating word prediction: framing keystroke savings").

A *noisy typist* (:class:`NoisyTypist`, ``nextword eval --typo-rate``) misses keys: each
letter of the layout is, independently, tapped right, replaced by a neighbouring key (a
2-D Gaussian around the key's centre, :func:`nextword.keyboard.sample_miss`), left out,
followed by an extra tap, or swapped with the next letter, at the stated rates. The taps
of every word are drawn once per message from a generator seeded by the typist's seed and
the message text, so every k, model and tolerance setting sees the same slips. The user
still accepts the intended word as soon as it is offered; otherwise they type on: a wrong
tap costs its keystroke and stays (no backspace), so a word never offered ends up
misspelt in the text and is the context of the next word. Every tap counts as a
keystroke (an extra tap too, a left-out letter saves one).

The *ceiling* is a perfect predictor under the same rules: one tap per word, and the
space after it free. Because the typed text never depends on k (accepting a
word produces exactly the message's text), one query with the largest k answers every
smaller k too (the ranking is a total order, so the top k is the first k of the top
k_max), and each cursor position is asked about at most once.
"""

from __future__ import annotations

import gzip
import hashlib
import math
import os
import time
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from .corpus import Source, iter_records
from .errors import InvalidArgumentError
from .keyboard import DEFAULT_SIGMA, Channel, Layout, load_layout, sample_extra, sample_miss
from .store import atomic_write
from .mix import Predictor
from .model import Suggestion
from .text import fold, normalize, word_spans

__all__ = [
    "KStats",
    "LogStats",
    "NoisyTypist",
    "simulate_message",
    "simulate_noisy",
    "evaluate",
    "word_spans",
    "ceiling_keystrokes",
    "is_held_out",
    "split_messages",
]


def ceiling_keystrokes(message: str) -> int:
    """Keystrokes of a perfect predictor: one tap per word, a following single space free."""
    message = normalize(message)
    spans = word_spans(message)
    letters = sum(e - s for s, e in spans)
    free = sum(1 for _, e in spans if message[e : e + 1] == " ")
    return len(message) - letters + len(spans) - free


@dataclass
class KStats:
    """Totals for one k over a set of messages."""

    k: int
    keystrokes: int = 0
    characters: int = 0
    ceiling_keystrokes: int = 0
    words: int = 0
    accepted: int = 0
    hits_before_typing: int = 0
    letters_before_accept: int = 0
    #: words whose typed letters were no longer a prefix of the word when it was accepted or
    #: typed out (noisy typist only), and those of them never offered ("lost to slips")
    slipped: int = 0
    lost: int = 0

    @property
    def ksr(self) -> float:
        return 1.0 - self.keystrokes / self.characters if self.characters else 0.0

    @property
    def ceiling_ksr(self) -> float:
        return 1.0 - self.ceiling_keystrokes / self.characters if self.characters else 0.0

    @property
    def ksr_of_ceiling(self) -> float:
        return self.ksr / self.ceiling_ksr if self.ceiling_ksr > 0 else 0.0

    @property
    def hit_rate(self) -> float:
        """Share of words offered before any of their letters was typed (hit@k)."""
        return self.hits_before_typing / self.words if self.words else 0.0

    @property
    def not_completed_rate(self) -> float:
        """Share of words never offered: typed out in full, as typed."""
        return (self.words - self.accepted) / self.words if self.words else 0.0

    @property
    def lost_rate(self) -> float:
        """Share of words that a slip left misspelt and never offered (noisy typist)."""
        return self.lost / self.words if self.words else 0.0

    @property
    def mean_letters_before_accept(self) -> float:
        return self.letters_before_accept / self.accepted if self.accepted else 0.0

    def add(self, other: KStats) -> None:
        for name in ("keystrokes", "characters", "ceiling_keystrokes", "words", "accepted",
                     "hits_before_typing", "letters_before_accept", "slipped", "lost"):
            setattr(self, name, getattr(self, name) + getattr(other, name))

    def as_dict(self) -> dict[str, Any]:
        return {
            "k": self.k,
            "ksr": self.ksr,
            "ceiling_ksr": self.ceiling_ksr,
            "ksr_of_ceiling": self.ksr_of_ceiling,
            "hit_rate": self.hit_rate,
            "mean_letters_before_accept": self.mean_letters_before_accept,
            "keystrokes": self.keystrokes,
            "characters": self.characters,
            "ceiling_keystrokes": self.ceiling_keystrokes,
            "words": self.words,
            "accepted_words": self.accepted,
            "not_completed_rate": self.not_completed_rate,
            "lost_rate": self.lost_rate,
            "slipped_words": self.slipped,
            "lost_words": self.lost,
        }


@dataclass
class LogStats:
    """Everything measured on one log (or, merged, on all of them)."""

    name: str
    ks: tuple[int, ...]
    per_k: dict[int, KStats] = field(default_factory=dict)
    messages: int = 0
    latencies: list[float] = field(default_factory=list)
    seconds: float = 0.0
    log_likelihood: float = 0.0
    events: int = 0
    word_tokens: int = 0
    oov_tokens: int = 0

    def __post_init__(self) -> None:
        if not self.per_k:
            self.per_k = {k: KStats(k) for k in self.ks}

    @property
    def perplexity(self) -> float:
        """Per-token perplexity (``</s>`` and ``<unk>`` tokens included)."""
        return math.exp(-self.log_likelihood / self.events) if self.events else math.nan

    @property
    def oov_rate(self) -> float:
        return self.oov_tokens / self.word_tokens if self.word_tokens else 0.0

    def latency_summary(self) -> dict[str, float]:
        if not self.latencies:
            return {"calls": 0}
        a = np.asarray(self.latencies) * 1e6
        return {
            "calls": len(a),
            "p50_us": float(np.percentile(a, 50)),
            "p95_us": float(np.percentile(a, 95)),
            "p99_us": float(np.percentile(a, 99)),
            "max_us": float(a.max()),
            "engine_calls_per_second": float(len(a) / (a.sum() / 1e6)) if a.sum() > 0 else 0.0,
            "end_to_end_calls_per_second": len(a) / self.seconds if self.seconds > 0 else 0.0,
        }

    def as_dict(self) -> dict[str, Any]:
        return {
            "name": self.name,
            "messages": self.messages,
            "perplexity": self.perplexity,
            "oov_rate": self.oov_rate,
            "word_tokens": self.word_tokens,
            "per_k": [self.per_k[k].as_dict() for k in self.ks],
            "latency": self.latency_summary(),
            "seconds": self.seconds,
        }


SuggestFn = Callable[[str, int], Sequence[Suggestion]]


def simulate_message(
    suggest: SuggestFn,
    message: str,
    ks: Sequence[int],
    *,
    latencies: list[float] | None = None,
) -> dict[int, KStats]:
    """Replay one message under the rules above; returns per-k totals.

    ``suggest(typed, k)`` is called with the largest k, at most once per
    cursor position, until the word is accepted for the smallest k. ``latencies``, if
    given, receives the duration of every call in seconds.
    """
    message = normalize(message)
    kmax = max(ks)
    spans = word_spans(message)
    out = {k: KStats(k, characters=len(message), words=len(spans)) for k in ks}
    ceiling = ceiling_keystrokes(message)
    letters = 0
    free_spaces = {k: 0 for k in ks}
    taps = {k: 0 for k in ks}
    typed_letters = {k: 0 for k in ks}
    clock = time.perf_counter
    for start, end in spans:
        word = message[start:end]
        letters += end - start
        accepted_at: dict[int, int] = {}
        for j in range(end - start):
            t0 = clock()
            sugg = suggest(message[: start + j], kmax)
            if latencies is not None:
                latencies.append(clock() - t0)
            for rank, s in enumerate(sugg):
                if s.word == word:
                    for k in ks:
                        if k > rank and k not in accepted_at:
                            accepted_at[k] = j
                    break
            if len(accepted_at) == len(ks):
                break
        follows_space = message[end : end + 1] == " "
        for k in ks:
            st = out[k]
            if k in accepted_at:
                j = accepted_at[k]
                taps[k] += 1
                typed_letters[k] += j
                st.accepted += 1
                st.letters_before_accept += j
                st.hits_before_typing += j == 0
                free_spaces[k] += follows_space
            else:
                typed_letters[k] += end - start
    for k in ks:
        st = out[k]
        st.keystrokes = len(message) - letters + typed_letters[k] + taps[k] - free_spaces[k]
        st.ceiling_keystrokes = ceiling
    return out


def _check_rate(name: str, v: float) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not 0.0 <= v <= 0.5:
        raise InvalidArgumentError(f"{name} must be a number in [0, 0.5], got {v!r}")
    return float(v)


@dataclass(frozen=True)
class NoisyTypist:
    """A typist who misses keys (see the module docstring): rates per letter tap, seeded.

    ``substitution`` is the share of letter taps that land on another key (drawn by the
    Gaussian touch model with spread ``sigma`` key pitches around the intended key);
    ``omission``, ``insertion`` (an extra tap after the letter, Gaussian around it: often
    a double tap) and ``transposition`` (the letter swapped with the next one) are the
    optional other slips. Letters the layout lacks, digits and punctuation are typed right.
    """

    substitution: float = 0.0
    omission: float = 0.0
    insertion: float = 0.0
    transposition: float = 0.0
    seed: int = 0
    layout: Layout | None = None
    sigma: float = DEFAULT_SIGMA

    def __post_init__(self) -> None:
        total = sum(_check_rate(n, getattr(self, n)) for n in ("substitution", "omission", "insertion", "transposition"))
        if total > 0.5:
            raise InvalidArgumentError(f"the slip rates must sum to at most 0.5, got {total!r}")
        if isinstance(self.seed, bool) or not isinstance(self.seed, int) or self.seed < 0:
            raise InvalidArgumentError(f"seed must be an integer >= 0, got {self.seed!r}")
        if isinstance(self.sigma, bool) or not isinstance(self.sigma, (int, float)) or not 0.05 <= self.sigma <= 10:
            raise InvalidArgumentError(f"sigma must be a number in [0.05, 10] key pitches, got {self.sigma!r}")
        if self.layout is None:
            object.__setattr__(self, "layout", load_layout("qwerty"))
        elif not isinstance(self.layout, Layout):
            raise InvalidArgumentError(f"layout must be a Layout, got {type(self.layout).__name__}")

    def rng(self, message: str) -> np.random.Generator:
        """The generator of one message's slips: from the seed and the message text only."""
        digest = hashlib.sha1(message.encode("utf-8")).digest()
        return np.random.default_rng([self.seed, int.from_bytes(digest[:8], "big")])

    def taps(self, word: str, rng: np.random.Generator) -> str:
        """What the typist taps for ``word`` (its letters, with slips drawn from ``rng``)."""
        lay = self.layout
        assert lay is not None
        s, o, n, t = self.substitution, self.omission, self.insertion, self.transposition
        out: list[str] = []
        i = 0
        while i < len(word):
            ch = word[i]
            low = ch.lower()
            if low not in lay.centres:
                out.append(ch)
                i += 1
                continue
            u = rng.random()
            if u < s:
                hit = sample_miss(lay, low, rng, sigma=self.sigma)
                out.append(hit.upper() if ch != low and len(hit.upper()) == 1 else hit)
            elif u < s + o:
                pass
            elif u < s + o + n:
                extra = sample_extra(lay, low, rng, sigma=self.sigma)
                out.append(ch)
                out.append(extra.upper() if ch != low and len(extra.upper()) == 1 else extra)
            elif u < s + o + n + t and i + 1 < len(word) and word[i + 1].lower() in lay.centres and word[i + 1] != ch:
                out.append(word[i + 1])
                out.append(ch)
                i += 1
            else:
                out.append(ch)
            i += 1
        return "".join(out)

    def describe(self) -> dict[str, Any]:
        """The settings as plain data (for reports)."""
        assert self.layout is not None
        return {"substitution": self.substitution, "omission": self.omission, "insertion": self.insertion,
                "transposition": self.transposition, "seed": self.seed, "layout": self.layout.name, "sigma": self.sigma}


def simulate_noisy(
    suggest: SuggestFn,
    message: str,
    ks: Sequence[int],
    typist: NoisyTypist,
    *,
    latencies: list[float] | None = None,
) -> dict[int, KStats]:
    """Replay one message typed by ``typist`` (module docstring); returns per-k totals.

    The text typed depends on k here (a word not offered stays misspelt), so each k is
    replayed on its own; identical typed texts are asked once (largest k) and the answer
    reused. ``latencies`` receives the duration of every call actually made.
    """
    message = normalize(message)
    kmax = max(ks)
    spans = word_spans(message)
    rng = typist.rng(message)
    noisy = [typist.taps(message[s:e], rng) for s, e in spans]
    ceiling = ceiling_keystrokes(message)
    answers: dict[str, list[str]] = {}
    clock = time.perf_counter
    out: dict[int, KStats] = {}
    for k in ks:
        st = KStats(k, characters=len(message), words=len(spans), ceiling_keystrokes=ceiling)
        text: list[str] = []
        keys = 0
        pos = 0
        free = False
        for (start, end), taps in zip(spans, noisy):
            gap = message[pos:start]
            keys += len(gap) - (free and gap[:1] == " ")
            text.append(gap)
            word = message[start:end]
            before = "".join(text)
            accepted_at = -1
            for j in range(max(len(taps), 1)):
                typed = before + taps[:j]
                shown = answers.get(typed)
                if shown is None:
                    t0 = clock()
                    sugg = suggest(typed, kmax)
                    if latencies is not None:
                        latencies.append(clock() - t0)
                    shown = answers[typed] = [x.word for x in sugg]
                if word in shown[:k]:
                    accepted_at = j
                    break
            if accepted_at >= 0:
                j = accepted_at
                keys += j + 1
                text.append(word)
                st.accepted += 1
                st.letters_before_accept += j
                st.hits_before_typing += j == 0
                st.slipped += not word.startswith(taps[:j])
                free = True
            else:
                keys += len(taps)
                text.append(taps)
                slipped = taps != word
                st.slipped += slipped
                st.lost += slipped
                free = False
            pos = end
        tail = message[pos:]
        keys += len(tail) - (free and tail[:1] == " ")
        st.keystrokes = keys
        out[k] = st
    return out


def evaluate(
    model: Predictor,
    logs: Iterable[tuple[str, Iterable[str]]],
    ks: Sequence[int] = (1, 3, 5),
    *,
    lam: float | None = None,
    progress: Callable[[int], None] | None = None,
    typist: NoisyTypist | None = None,
    typo: Channel | None = None,
) -> tuple[LogStats, list[LogStats]]:
    """Simulate typing every message of every log; returns (overall, per log).

    ``typist`` replaces the perfect typist by a noisy one; ``typo`` makes the model's
    suggestions typo-tolerant (:meth:`Model.suggest`), so the two can be measured apart.

    ``logs`` yields (name, messages) pairs; each message iterable is consumed once
    (perplexity and the out-of-vocabulary rate are computed on the same pass).
    ``progress(n)`` is called after each simulated (non-blank) message with the number
    done so far, over all logs.
    """
    ks = tuple(sorted(set(ks)))
    if not ks or any(isinstance(k, bool) or not isinstance(k, int) or k < 1 for k in ks):
        raise InvalidArgumentError(f"k values must be integers >= 1, got {list(ks)!r}")

    if typist is not None and not isinstance(typist, NoisyTypist):
        raise InvalidArgumentError(f"typist must be a NoisyTypist or None, got {type(typist).__name__}")

    def suggest(text: str, k: int) -> list[Suggestion]:
        return model.suggest(text, k, lam=lam, typo=typo)

    overall = LogStats("all", ks)
    per_log: list[LogStats] = []
    done = 0
    for name, messages in logs:
        st = LogStats(name, ks)
        kept: list[str] = []
        t0 = time.perf_counter()
        for message in messages:
            if not message.strip():
                continue
            kept.append(message)
            if typist is None:
                per_k = simulate_message(suggest, message, ks, latencies=st.latencies)
            else:
                per_k = simulate_noisy(suggest, message, ks, typist, latencies=st.latencies)
            for k, ks_stats in per_k.items():
                st.per_k[k].add(ks_stats)
            st.messages += 1
            done += 1
            if progress is not None:  # every message: the progress line throttles its own redraws
                progress(done)
        st.seconds = time.perf_counter() - t0
        if kept:
            st.log_likelihood, st.events = model.log_likelihood(kept, lam=lam)
            for message in kept:
                for s, e in word_spans(normalize(message)):
                    st.word_tokens += 1
                    st.oov_tokens += fold(message[s:e]) not in model
        _merge(overall, st)
        per_log.append(st)
    return overall, per_log


def _merge(into: LogStats, st: LogStats) -> None:
    for k in into.ks:
        into.per_k[k].add(st.per_k[k])
    into.messages += st.messages
    into.latencies.extend(st.latencies)
    into.seconds += st.seconds
    into.word_tokens += st.word_tokens
    into.oov_tokens += st.oov_tokens
    into.log_likelihood += st.log_likelihood
    into.events += st.events


def is_held_out(message: str, test_percent: int, *, salt: str = "") -> bool:
    """Deterministic split by the message's own text (SHA-1 of salt + UTF-8), never by file order.

    Different salts give independent splits: ``nextword tune --test-percent`` uses its own
    salt, so splitting an already held-out file again does not put everything on one side.
    """
    digest = hashlib.sha1((salt + message).encode("utf-8")).digest()
    return int.from_bytes(digest[:8], "big") % 100 < test_percent


TUNE_SALT = "split-tune:"
"""Prefix of the salt that carves the tune part out of what the test part leaves (see :func:`split_messages`)."""


def _hash64(message: str, salt: str) -> int:
    return int.from_bytes(hashlib.sha1((salt + message).encode("utf-8")).digest()[:8], "big")


def split_messages(
    sources: list[Source],
    train_out: str | os.PathLike[str],
    test_out: str | os.PathLike[str],
    *,
    test_percent: int = 10,
    salt: str = "",
    tune_out: str | os.PathLike[str] | None = None,
    tune_percent: int = 0,
    progress: Callable[[int, int], None] | None = None,
) -> dict[str, int]:
    """Copy each input line to ``train_out``, ``test_out`` or ``tune_out`` by a hash of its message.

    The test part is exactly the messages ``is_held_out(message, test_percent, salt=salt)``
    selects — with the default empty salt, the same rule every benchmark uses, so a
    held-out file made here agrees with theirs. The tune part (only with ``tune_out``)
    is carved from the rest by an independent hash (salt ``TUNE_SALT + salt``): a
    message not held out goes to tune when that hash modulo ``100 - test_percent`` is
    below ``tune_percent``, i.e. with probability ``tune_percent / (100 - test_percent)``,
    so the tune part is ``tune_percent`` % of the whole. Everything else is training.

    Splitting a file that was itself held out by the same rule puts every message on
    one side (they all hash below the first cut); a different ``salt`` gives an
    independent split. Blank messages are dropped; lines keep their original bytes
    (JSON Lines keep their other fields); an output whose name ends in ``.gz`` is
    gzip-compressed. Outputs must differ from each other and from the inputs, and
    are written atomically. ``progress(bytes_read, total_bytes)`` is called as the
    inputs are read. Returns the number of messages in each part
    (``{"train": ..., "tune": ..., "test": ...}``; ``tune`` is 0 without ``tune_out``).
    """
    from .paths import check_outputs

    if isinstance(test_percent, bool) or not isinstance(test_percent, int) or not 1 <= test_percent <= 99:
        raise InvalidArgumentError(f"test_percent must be an integer in [1, 99], got {test_percent!r}")
    if isinstance(tune_percent, bool) or not isinstance(tune_percent, int) or not 0 <= tune_percent <= 98:
        raise InvalidArgumentError(f"tune_percent must be an integer in [0, 98], got {tune_percent!r}")
    if not isinstance(salt, str):
        raise InvalidArgumentError(f"salt must be text, got {salt!r}")
    if tune_out is None and tune_percent:
        raise InvalidArgumentError(f"tune_percent={tune_percent} needs tune_out (where the tune part goes)")
    if tune_out is not None and not tune_percent:
        raise InvalidArgumentError("tune_out needs tune_percent >= 1 (the tune part's share)")
    if test_percent + tune_percent > 99:
        raise InvalidArgumentError(
            f"test_percent + tune_percent must leave some training text, got {test_percent} + {tune_percent}"
        )
    outputs: list[tuple[str, str | os.PathLike[str]]] = [("training part", train_out), ("test part", test_out)]
    if tune_out is not None:
        outputs.append(("tune part", tune_out))
    check_outputs([("input", s.name) for s in sources], outputs)
    rest = 100 - test_percent
    tune_salt = TUNE_SALT + salt
    parts: dict[str, list[bytes]] = {"train": [], "tune": [], "test": []}
    for text, line in iter_records(sources, progress=progress):
        if not text.strip():
            continue
        if not line.endswith(b"\n"):
            line += b"\n"
        if is_held_out(text, test_percent, salt=salt):
            part = "test"
        elif tune_percent and _hash64(text, tune_salt) % rest < tune_percent:
            part = "tune"
        else:
            part = "train"
        parts[part].append(line)
    named = {"train": train_out, "test": test_out, "tune": tune_out}
    for name in ("train", "tune", "test"):
        path = named[name]
        if path is None:
            continue
        data = b"".join(parts[name])
        if os.fspath(path).endswith(".gz"):
            data = gzip.compress(data, mtime=0)
        atomic_write(path, [data])
    return {"train": len(parts["train"]), "tune": len(parts["tune"]), "test": len(parts["test"])}
