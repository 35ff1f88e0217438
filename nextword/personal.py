"""A personal layer over an immutable base model: learns a user's words and word pairs.

The combined distribution after history v is a mixture

    P(w | v) = (1 − μ) · P_base(w | v) + μ · P_user(w | v)

where P_user is the same interpolated bigram estimate as the base model's, computed from
the user's own (decayed) counts, and μ = max_weight · N_user / (N_user + strength) grows
with the amount of personal data N_user (predicted tokens learned, after decay): 0 with
no data, half of ``max_weight`` after ``strength`` tokens. Both parts are distributions
over the same outcomes — the base vocabulary, the user's words, ``</s>`` and ``<unk>``
(a user's word the base lacks gets 0 from the base part, whose ``<unk>`` mass stays on
``<unk>``) — so the mixture sums to 1 after every history.

A word the base model lacks becomes *suggestible* once the user has used it
``min_uses`` times (it has probability before that, it is just not offered); blocked
words are never offered. Only counts are kept — never message text or message order —
and decay (a half-life in messages) makes old habits fade.

Memory is capped (``max_entries`` counts, about 64 bytes each in memory and far less on
disk): past the cap the least useful entries — the pairs, then the words, with the
smallest decayed counts — are evicted. With a ``path``, every change is saved at once
(temporary file, fsync, rename), so a process killed at any instant loses at most the
message being learned and the file always loads; no journal is needed, and the file
never holds text or message order. One lock serialises writers and readers, so a thread
asking for suggestions while another learns never sees a half-applied message.
"""

from __future__ import annotations

import bisect
import heapq
import math
import os
import struct
import threading
import time
import zlib
from collections.abc import Iterable
from typing import Any

import msgpack

from .errors import InvalidArgumentError, LayerNotFoundError, ModelFormatError
from .model import Model, Suggestion, _check_k, _recase
from .store import atomic_write
from .text import BOS, EOS, UNK, fold, parse_typed, sentences

__all__ = ["PersonalLayer", "PERSONAL_MAGIC"]

PERSONAL_MAGIC = b"\x89NWP\r\n\x1a\n"
_HEADER = struct.Struct("<8sHHQI")  # magic, major, minor, payload length, payload crc
_MAX_PAYLOAD = 64 << 20


class PersonalLayer:
    """Personal counts mixed with a base :class:`~nextword.Model`. Not yet thread-safe for writers."""

    def __init__(
        self,
        base: Model,
        *,
        min_uses: int = 2,
        strength: float = 2000.0,
        max_weight: float = 0.5,
        lam: float = 0.9,
        half_life_messages: float | None = None,
        half_life_days: float | None = None,
        blocklist: Iterable[str] = (),
        max_entries: int = 65_536,
        path: str | os.PathLike[str] | None = None,
    ) -> None:
        if isinstance(min_uses, bool) or not isinstance(min_uses, int) or min_uses < 1:
            raise InvalidArgumentError(f"min_uses must be an integer >= 1, got {min_uses!r}")
        for name, value, lo, hi in (("strength", strength, 1e-9, math.inf), ("max_weight", max_weight, 0.0, 1.0), ("lam", lam, 0.0, 1.0)):
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not lo <= value <= hi:
                raise InvalidArgumentError(f"{name} must be a number in [{lo}, {hi}], got {value!r}")
        if half_life_messages is not None and not half_life_messages > 0:
            raise InvalidArgumentError(f"half_life_messages must be > 0, got {half_life_messages!r}")
        if half_life_days is not None and not half_life_days > 0:
            raise InvalidArgumentError(f"half_life_days must be > 0, got {half_life_days!r}")
        self.half_life_days = half_life_days
        self.base = base
        self.min_uses = min_uses
        self.strength = float(strength)
        self.max_weight = float(max_weight)
        self.lam = float(lam)
        self.half_life_messages = half_life_messages
        if isinstance(max_entries, bool) or not isinstance(max_entries, int) or max_entries < 16:
            raise InvalidArgumentError(f"max_entries must be an integer >= 16, got {max_entries!r}")
        self.max_entries = max_entries
        self.blocklist: set[str] = {fold(w) for w in blocklist}
        self.path = None if path is None else os.fspath(path)
        self._lock = threading.RLock()
        self._closed = False
        self._base_cache: dict[tuple[str | None, str, int], list[tuple[str, float]]] = {}
        self._reset()

    @classmethod
    def open(
        cls, base: Model, path: str | os.PathLike[str], *, create: bool = False, **settings: Any
    ) -> PersonalLayer:
        """The layer saved at ``path``, saving every change there until :meth:`close`.

        A missing file raises :class:`~nextword.LayerNotFoundError` unless ``create`` is
        true (then a new empty layer with ``settings`` is written): a wrong path never
        silently starts an empty layer. A file that exists but is damaged raises
        :class:`~nextword.ModelFormatError`; it is never replaced by an empty layer.
        ``settings`` apply to a new layer only; an existing file keeps its own.
        """
        name = os.fspath(path)
        if os.path.exists(name):
            layer = cls.load(base, name)
            layer.path = name
            return layer
        if not create:
            raise LayerNotFoundError(f"{name}: no personal layer file there (create it explicitly)")
        layer = cls(base, path=name, **settings)
        layer._changed()
        return layer

    def close(self) -> None:
        """Persist anything pending and detach from the file; later changes raise.

        Idempotent. Reading (suggest, prob, counts) still works on the in-memory state.
        """
        with self._lock:
            if self._closed:
                return
            self._closed = True

    @property
    def closed(self) -> bool:
        """True after :meth:`close`: changes are refused."""
        return self._closed

    def __enter__(self) -> PersonalLayer:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def _check_open(self) -> None:
        if self._closed:
            raise InvalidArgumentError(f"personal layer {self.path or '(in memory)'} is closed: it cannot change any more")

    def _changed(self) -> None:
        if self.path is not None:
            self.save(self.path)

    @property
    def entries(self) -> int:
        """Stored counts: words plus pairs (the unit of ``max_entries``)."""
        return len(self._uni) + sum(len(r) for r in self._big.values())

    # -- state -------------------------------------------------------------------------------

    def clear(self) -> None:
        """Forget everything learned (the blocklist stays)."""
        with self._lock:
            self._check_open()
            self._reset()
            self._changed()

    def _reset(self) -> None:
        # counts are stored divided by the current decay factor: effective = stored * scale
        self._uni: dict[str, float] = {}
        self._big: dict[str, dict[str, float]] = {}
        self._hist: dict[str, float] = {}
        self._total = 0.0
        self._scale = 1.0
        self._spelling: dict[str, str] = {}
        self.messages = 0
        self._last_time: float | None = None
        # indexes for ranking, kept in step with the counts: the user's words sorted by key
        # and by (−stored count, key), and each history's successors by count (cached)
        self._sorted_keys: list[str] = []
        self._by_count: list[tuple[float, str]] = []
        self._by_initial: dict[str, list[tuple[float, str]]] = {}
        self._row_sorted: dict[tuple[str, str], list[tuple[float, str]]] = {}

    def _decay_step(self, when: float | None) -> None:
        """Age every count: by one message, and by the days since the last message."""
        if self.half_life_messages is not None:
            self._scale *= 0.5 ** (1.0 / self.half_life_messages)
        if self.half_life_days is not None and when is not None:
            if self._last_time is not None and when > self._last_time:
                self._scale *= 0.5 ** ((when - self._last_time) / 86400.0 / self.half_life_days)
            self._last_time = when if self._last_time is None else max(when, self._last_time)
        if self._scale < 1e-150:  # renormalise before the stored numbers overflow
            s = self._scale
            self._uni = {k: v * s for k, v in self._uni.items()}
            self._big = {h: {k: v * s for k, v in row.items()} for h, row in self._big.items()}
            self._hist = {k: v * s for k, v in self._hist.items()}
            self._total *= s
            self._scale = 1.0
            self._reindex()

    def _reindex(self) -> None:
        words = [w for w in self._uni if w not in (EOS, UNK)]
        self._sorted_keys = sorted(words)
        self._by_count = sorted((-self._uni[w], w) for w in words)
        self._by_initial = {}
        for c, w in self._by_count:
            self._by_initial.setdefault(w[:1], []).append((c, w))
        self._row_sorted = {}

    def _bump(self, key: str, inc: float) -> None:
        old = self._uni.get(key)
        new = (old or 0.0) + inc
        self._uni[key] = new
        if key in (EOS, UNK):
            return
        initial = self._by_initial.setdefault(key[:1], [])
        if old is None:
            bisect.insort(self._sorted_keys, key)
        else:
            del self._by_count[bisect.bisect_left(self._by_count, (-old, key))]
            del initial[bisect.bisect_left(initial, (-old, key))]
        bisect.insort(self._by_count, (-new, key))
        bisect.insort(initial, (-new, key))

    def count(self, word: str) -> float:
        """The user's (decayed) count of ``word`` as a predicted token."""
        key = word if word in (EOS, UNK) else fold(word)
        return self._uni.get(key, 0.0) * self._scale

    def pair_count(self, previous_word: str | None, word: str) -> float:
        v = self._hkey(previous_word)
        w = word if word in (EOS, UNK) else fold(word)
        return self._big.get(v, {}).get(w, 0.0) * self._scale

    @property
    def tokens(self) -> float:
        """N_user: predicted tokens learned, after decay."""
        return self._total * self._scale

    @property
    def weight(self) -> float:
        """μ, the weight of the personal part: max_weight · N / (N + strength)."""
        n = self.tokens
        return self.max_weight * n / (n + self.strength) if n > 0 else 0.0

    # -- learning ------------------------------------------------------------------------------

    def learn(self, message: str, *, when: float | None = None) -> None:
        """Count one committed message (O(words)); its text is not kept.

        ``when`` (seconds since the epoch, default now) drives the decay in days; only the
        time of the latest message is kept.
        """
        if not isinstance(message, str):
            raise InvalidArgumentError(f"message must be str, got {type(message).__name__}")
        if when is None and self.half_life_days is not None:
            when = time.time()
        with self._lock:
            self._check_open()
            self._learn(message, when)
            if self.entries > self.max_entries:
                self._evict()
            self._changed()

    def _learn(self, message: str, when: float | None) -> None:
        self._decay_step(when)
        inc = 1.0 / self._scale
        for sent in sentences(message):
            prev = BOS
            for i, tok in enumerate([*sent, EOS]):
                if tok is None:
                    key = UNK
                elif tok == EOS:  # no word contains "<": this is the end marker
                    key = EOS
                else:
                    key = fold(tok)
                    if i > 0:
                        self._spelling[key] = tok
                    else:
                        self._spelling.setdefault(key, tok)
                self._bump(key, inc)
                self._row_sorted.pop((prev, ""), None)
                self._row_sorted.pop((prev, key[:1]), None)
                row = self._big.setdefault(prev, {})
                row[key] = row.get(key, 0.0) + inc
                self._hist[prev] = self._hist.get(prev, 0.0) + inc
                self._total += inc
                prev = key
        self.messages += 1

    def forget(self, word: str) -> None:
        """Remove ``word`` and every pair containing it, at once (and from the file)."""
        with self._lock:
            self._check_open()
            self._forget(fold(word))
            self._changed()

    def _forget(self, key: str) -> None:
        old = self._uni.get(key)
        if old is not None and key not in (EOS, UNK):
            del self._by_count[bisect.bisect_left(self._by_count, (-old, key))]
            del self._sorted_keys[bisect.bisect_left(self._sorted_keys, key)]
            initial = self._by_initial[key[:1]]
            del initial[bisect.bisect_left(initial, (-old, key))]
        self._row_sorted = {}
        removed = self._uni.pop(key, 0.0)
        self._total -= removed
        self._spelling.pop(key, None)
        row = self._big.pop(key, None)
        if row is not None:
            self._hist.pop(key, None)
        for h, r in list(self._big.items()):
            c = r.pop(key, None)
            if c is not None:
                self._hist[h] -= c
                if not r:
                    del self._big[h]
                    self._hist.pop(h, None)
        # tokens that followed the forgotten word lose their history but stay counted
        if not any(k not in (EOS, UNK) for k in self._uni):
            self._reset()  # no words left: the layer must add nothing

    def _evict(self) -> None:
        """Drop the least useful entries until 90% of the cap: smallest pairs, then smallest words."""
        target = int(self.max_entries * 0.9)
        pairs = sorted((c, h, w) for h, row in self._big.items() for w, c in row.items())
        excess = self.entries - target
        for c, h, w in pairs[: max(0, min(excess, len(pairs) // 2))]:
            self._row_sorted.pop((h, ""), None)
            self._row_sorted.pop((h, w[:1]), None)
            row = self._big[h]
            del row[w]
            self._hist[h] -= c
            if not row:
                del self._big[h]
                del self._hist[h]
        if self.entries > target:
            words = sorted((c, k) for k, c in self._uni.items() if k not in (EOS, UNK))
            for _, k in words:
                if self.entries <= target:
                    break
                self._forget(k)

    def block(self, word: str) -> None:
        """Never suggest ``word`` (it keeps its probability)."""
        with self._lock:
            self._check_open()
            self.blocklist.add(fold(word))
            self._changed()

    def unblock(self, word: str) -> None:
        with self._lock:
            self._check_open()
            self.blocklist.discard(fold(word))
            self._changed()

    # -- probabilities ----------------------------------------------------------------------------

    def _hkey(self, previous_word: str | None) -> str:
        if previous_word is None or previous_word == BOS:
            return BOS
        if previous_word == UNK:
            return UNK
        return fold(previous_word)

    def _p_user(self, v: str, w: str) -> float:
        total = self._total
        if total <= 0:
            return 0.0
        u = self._uni.get(w, 0.0) / total
        cv = self._hist.get(v, 0.0)
        if cv <= 0:
            return u
        return self.lam * (self._big[v].get(w, 0.0) / cv) + (1.0 - self.lam) * u

    def _p_base(self, v: str, w: str) -> float:
        base = self.base
        prev = None if v == BOS else (v if v == UNK or v in base else UNK)
        if w in (EOS, UNK):
            return base.prob(w, prev)
        if w not in base:
            return 0.0
        return base.prob(w, prev)

    def prob(self, word: str, previous_word: str | None = None) -> float:
        """P(word | previous_word) under the mixture (``None`` = sentence start)."""
        v = self._hkey(previous_word)
        w = word if word in (EOS, UNK) else fold(word)
        with self._lock:
            if w not in (EOS, UNK) and w not in self.base and w not in self._uni:
                w = UNK
            mu = self.weight
            return (1.0 - mu) * self._p_base(v, w) + mu * self._p_user(v, w)

    def vocabulary(self) -> list[str]:
        """Every outcome with its own probability: base words, the user's words, </s>, <unk>."""
        words = {w for w, _ in self.base.words()}
        keys = {fold(w) for w in words} | {k for k in self._uni if k not in (EOS, UNK)}
        return sorted(keys) + [EOS, UNK]

    def perplexity(self, lines: Iterable[str]) -> float:
        with self._lock:
            return self._perplexity(lines)

    def _perplexity(self, lines: Iterable[str]) -> float:
        log_sum, events = 0.0, 0
        for line in lines:
            for sent in sentences(line):
                prev: str | None = None
                for tok in [*sent, EOS]:
                    w = UNK if tok is None else tok
                    p = self.prob(w, prev)
                    log_sum += math.log(p) if p > 0 else -math.inf
                    events += 1
                    prev = UNK if tok is None else tok
        if events == 0:
            raise InvalidArgumentError("no words to score: the text is empty")
        return math.exp(-log_sum / events)

    # -- suggestions -------------------------------------------------------------------------------

    def _suggestible(self, key: str) -> bool:
        if key in self.blocklist or key in (EOS, UNK, BOS):
            return False
        return key in self.base or self._uni.get(key, 0.0) * self._scale >= self.min_uses - 1e-9

    def rank_keys(self, previous_word: str | None, prefix: str, k: int) -> list[tuple[str, float]]:
        """Top k (key, P) under the mixture among suggestible words starting with ``prefix``.

        Exact: a word the user never used scores (1 − μ)·P_base, so among those only the
        first k of the base ranking (blocked ones skipped) can qualify; every user word
        matching the prefix is scored in full.
        """
        k = _check_k(k)
        with self._lock:
            return self._rank_keys(self._hkey(previous_word), prefix, k)

    def _user_words_by_count(self, p: str) -> list[tuple[float, str]]:
        """The user's words by (−stored count, key): those starting with ``p`` when few, else all."""
        if p:
            keys = self._sorted_keys
            lo = bisect.bisect_left(keys, p)
            hi = bisect.bisect_left(keys, p + "\U0010ffff", lo)
            if hi - lo <= 64:
                return sorted((-self._uni[w], w) for w in keys[lo:hi])
            return self._by_initial.get(p[:1], [])
        return self._by_count

    def _base_ranking(self, prev: str | None, p: str, want: int) -> list[tuple[str, float]]:
        """The base model's top ``want`` (cached: the base never changes, its rankings repeat)."""
        key = (prev, p, want)
        hit = self._base_cache.get(key)
        if hit is None:
            hit = self.base.rank_ids(prev, p, want)
            if len(self._base_cache) >= 20_000:
                self._base_cache.clear()
            self._base_cache[key] = hit
        return hit

    def _successors_by_count(self, v: str, p: str) -> list[tuple[float, str]]:
        """v's successors by count: those with the prefix's first character, or all."""
        key = (v, p[:1])
        cached = self._row_sorted.get(key)
        if cached is None:
            cached = sorted(
                (-c, w) for w, c in self._big.get(v, {}).items() if w not in (EOS, UNK) and w.startswith(p[:1])
            )
            self._row_sorted[key] = cached
        return cached

    def _rank_keys(self, v: str, prefix: str, k: int) -> list[tuple[str, float]]:
        """Threshold algorithm over three lists, each sorted by one part of the score.

        score(w) = (1 − μ)·P_base(w | v) + μ·(λ_u·c(v,w)/c(v) + (1 − λ_u)·c(w)/N_user) (the user
        part is c(w)/N_user when v is new to the user). The base ranking, the user's
        successors of v by count and the user's words by count are walked in parallel;
        a word not yet met in any list scores at most the same formula applied to the
        next value of each list, so once the k-th best candidate beats that bound no
        other word can enter the top k.
        """
        p = fold(prefix)
        mu = self.weight
        bprev = None if v == BOS else (v if v == UNK or v in self.base else UNK)
        blocked = self.blocklist
        cands: dict[str, float] = {}
        seen: set[str] = set()
        total = self._total
        cv_user = self._hist.get(v, 0.0) if mu > 0 else 0.0
        succ = self._successors_by_count(v, p) if cv_user > 0 else []
        words = self._user_words_by_count(p) if mu > 0 else []
        lam_u = self.lam if cv_user > 0 else 0.0

        kth = [-1.0]

        def consider(w: str, pb: float | None = None) -> None:
            if w in seen:
                return
            seen.add(w)
            if w.startswith(p) and w not in blocked and self._suggestible(w):
                base_p = self._p_base(v, w) if pb is None else pb
                cands[w] = (1.0 - mu) * base_p + mu * self._p_user(v, w)
                if len(cands) >= k:
                    kth[0] = heapq.nlargest(k, cands.values())[-1]

        base_list: list[tuple[str, float]] = []
        want, bi, si, ui, base_done = k, 0, 0, 0, False
        while True:
            if bi >= len(base_list) and not base_done:
                base_list = self._base_ranking(bprev, p, want)
                base_done = len(base_list) < want
                want *= 2
            nb = base_list[bi] if bi < len(base_list) else None
            ns = succ[si] if si < len(succ) else None
            nu = words[ui] if ui < len(words) else None
            if nb is None and ns is None and nu is None:
                break
            # each list's share of the bound on any word not met yet
            cb = (1.0 - mu) * nb[1] if nb else -1.0
            cs = mu * lam_u * (-ns[0] / cv_user) if ns else -1.0
            cu = mu * (1.0 - lam_u) * (-nu[0] / total) if nu else -1.0
            if kth[0] > max(cb, 0.0) + max(cs, 0.0) + max(cu, 0.0):
                break
            # advance the list that contributes most to the bound (adaptive sorted access)
            if cb >= cs and cb >= cu and nb is not None:
                consider(nb[0], nb[1])
                bi += 1
            elif cs >= cu and ns is not None:
                consider(ns[1])
                si += 1
            elif nu is not None:
                consider(nu[1])
                ui += 1
            else:  # only zero-share lists are left
                if nb is not None:
                    consider(nb[0], nb[1])
                    bi += 1
                if ns is not None:
                    consider(ns[1])
                    si += 1
        best = heapq.nsmallest(k, ((-s, w) for w, s in cands.items()))
        return [(w, -s) for s, w in best]

    def suggest(self, typed: str, k: int = 3) -> list[Suggestion]:
        """Like :meth:`nextword.Model.suggest`, over the mixture of base and personal counts."""
        ctx = parse_typed(typed)
        prev = None if ctx.previous == BOS else ctx.previous
        at_start = ctx.previous == BOS
        out = []
        with self._lock:
            for key, p in self.rank_keys(prev, ctx.prefix, k):
                if key in self.base:
                    shown = self.base.display(self.base._word_id(key))  # type: ignore[arg-type]
                else:
                    shown = self._spelling.get(key, key)
                out.append(Suggestion(_recase(shown, ctx.prefix, at_start), p))
        return out

    # -- persistence -----------------------------------------------------------------------------

    def _payload(self) -> dict[str, Any]:
        s = self._scale
        return {
            "settings": {
                "min_uses": self.min_uses,
                "strength": self.strength,
                "max_weight": self.max_weight,
                "lam": self.lam,
                "half_life_messages": self.half_life_messages,
                "half_life_days": self.half_life_days,
                "max_entries": self.max_entries,
            },
            "last_time": self._last_time,
            "messages": self.messages,
            "unigram": {k: v * s for k, v in self._uni.items()},
            "bigram": {h: {k: v * s for k, v in row.items()} for h, row in self._big.items()},
            "spelling": self._spelling,
            "blocklist": sorted(self.blocklist),
        }

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the counts (never text) to ``path`` atomically: temp file, fsync, rename."""
        with self._lock:
            body = msgpack.packb(self._payload(), use_bin_type=True)
        atomic_write(path, [_HEADER.pack(PERSONAL_MAGIC, 1, 0, len(body), zlib.crc32(body)), body])

    @classmethod
    def load(cls, base: Model, path: str | os.PathLike[str]) -> PersonalLayer:
        """Read a layer saved by :meth:`save`; a damaged file raises, it is never replaced."""
        name = os.fspath(path)
        try:
            with open(name, "rb") as f:
                head = f.read(_HEADER.size)
                if len(head) < _HEADER.size:
                    raise ModelFormatError(f"{name}: not a personal layer file (only {len(head)} bytes)")
                magic, major, minor, length, crc = _HEADER.unpack(head)
                if magic != PERSONAL_MAGIC:
                    raise ModelFormatError(f"{name}: not a personal layer file (bad magic bytes)")
                if major != 1:
                    raise ModelFormatError(f"{name}: unsupported personal layer version {major}.{minor}")
                if length > _MAX_PAYLOAD:
                    raise ModelFormatError(f"{name}: personal layer of {length} bytes is too large")
                body = f.read(length + 1)
        except OSError as e:
            raise ModelFormatError(f"{name}: cannot open personal layer: {e.strerror}") from None
        if len(body) != length:
            raise ModelFormatError(f"{name}: personal layer is truncated or has trailing bytes")
        if zlib.crc32(body) != crc:
            raise ModelFormatError(f"{name}: personal layer checksum mismatch (damaged file)")
        try:
            data = msgpack.unpackb(body, raw=False, strict_map_key=True)
            st = data["settings"]
            layer = cls(
                base,
                min_uses=st["min_uses"],
                strength=st["strength"],
                max_weight=st["max_weight"],
                lam=st["lam"],
                half_life_messages=st["half_life_messages"],
                half_life_days=st.get("half_life_days"),
                blocklist=data["blocklist"],
                max_entries=st.get("max_entries", 65_536),
            )
            layer.messages = int(data["messages"])
            last = data.get("last_time")
            layer._last_time = None if last is None else float(last)
            for key, value in data["unigram"].items():
                layer._uni[str(key)] = float(value)
            for h, row in data["bigram"].items():
                r = {str(k): float(v) for k, v in row.items()}
                layer._big[str(h)] = r
                layer._hist[str(h)] = math.fsum(r.values())
            layer._spelling = {str(k): str(v) for k, v in data["spelling"].items()}
            layer._total = math.fsum(layer._uni.values())
            layer._reindex()
        except (KeyError, TypeError, ValueError, AttributeError, msgpack.UnpackException, InvalidArgumentError) as e:
            raise ModelFormatError(f"{name}: damaged personal layer: {e}") from None
        return layer
