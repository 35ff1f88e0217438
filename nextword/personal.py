"""A personal layer over an immutable base model: learns a user's words and word pairs.

The combined distribution after a context (…, u, v) — u, v the last two tokens of the
sentence so far — is a mixture

    P(w | u v) = (1 − μ) · P_base(w | context) + μ · P_user(w | v)

    P_user(w | v) = λ · c(v, w) / c(v) + (1 − λ) · c(w) / N_user     (c(v) > 0)
    P_user(w | v) = c(w) / N_user                                     (v new to the user)

P_base is the base model's own probability with the context *it* reads: the last word
for a bigram base, the last two words for a trigram base (Jelinek-Mercer or Kneser-Ney
alike; :meth:`nextword.Model.prob_after`). P_user is a Jelinek-Mercer bigram of the
user's own (decayed) counts, λ = ``lam``. The personal counts keep the one-word context
on purpose: a user's log is thousands of words, not millions, so word *triples* would
almost all be seen once and add little over the pairs (the base already brings the
two-word context); and storing triples would keep much more of each message's word order
in the layer file, which by design holds only counts of pairs. μ = max_weight · N_user /
(N_user + strength) grows with the amount of personal data N_user (predicted tokens
learned, after decay): 0 with no data, half of ``max_weight`` after ``strength`` tokens.
Both parts are distributions over the same outcomes — the base vocabulary, the user's
words, ``</s>`` and ``<unk>`` (a user's word the base lacks gets 0 from the base part,
whose ``<unk>`` mass stays on ``<unk>``) — so the mixture sums to 1 after every context.

Ranking is exact: :meth:`PersonalLayer.suggest` returns the first k of every suggestible
word matching the typed prefix ordered by (mixture probability descending, base
probability descending, key) — equal mixture floats go to the word the base prefers, so
with no personal data the layer returns the base's own ranking. It never scores every
word: the candidates are the base's own exact top list and the user's words, and a bound
rules out the rest (:meth:`PersonalLayer._rank`).

A word the base model lacks becomes *suggestible* once the user has used it
``min_uses`` times (it has probability before that, it is just not offered); blocked
words are never offered. Only counts are kept — never message text or message order —
and decay (a half-life in messages) makes old habits fade.

Memory is capped (``max_entries`` counts, about 64 bytes each in memory and far less on
disk): past the cap the least useful entries — the pairs, then the words, with the
smallest decayed counts — are evicted.

Files, and several processes on one layer
-----------------------------------------
A layer opened with :meth:`PersonalLayer.open` lives in three files beside each other
(byte layouts in ``docs/FORMAT.md``), all mode 0600 — they describe one person:

* ``me.nwp`` — the *snapshot*: every count, written atomically (temp file, fsync, rename).
* ``me.nwp.journal`` — an append-only list of *changes* since that snapshot. A change is
  stored as the counts it bumps, never as text: a learned message becomes its sorted
  (history, word, times) pairs and spellings, so neither the words' order nor the
  message survives. ``forget``/``block``/``unblock``/``clear`` name one word or nothing.
* ``me.nwp.lock`` — never replaced; ``fcntl.flock`` on it serialises the processes.

Every change, in every process: take the exclusive lock; *sync* (replay the records
other processes appended since this one last looked, or reload everything if the
snapshot was rewritten); append its own record and fsync it; only then apply it in
memory (so memory is never ahead of the disk, and a record that cannot be written
changes nothing); release. Each process therefore applies the same records in the same
order, and applying is deterministic — a learn's record carries the ``when`` used for
decay, eviction sorts by (count, key) — so all processes reach the same counts: a
service and a desktop app sharing one user's file lose no update, and a word forgotten
in one never comes back from the other. A learn costs one small append instead of a
rewrite of the whole file.

*Compaction*: when the journal outgrows max(256 KiB, the snapshot) — checked at the
start of a change, so a failure refuses that change cleanly — the snapshot is rewritten
under the lock with a new random ``snapshot_id`` and a new journal carrying that id is
started; the compacting process then re-installs the state from the payload it wrote,
exactly as the others will when they notice the new files. A journal whose id differs
from the snapshot's is stale (a crash between the two renames) and is ignored, then
replaced at the next change.

*Reading*: :meth:`suggest` and :meth:`rank_keys` first compare the journal's inode and
size with what this process last applied (one ``stat``); only when another process has
written do they take the lock and sync. Other readers (``prob``, ``count``, ``entries``
…) use the state as of the last sync; :meth:`refresh` syncs on demand.

*Crashes*: a process killed mid-append leaves a torn last record; records are
length-prefixed and CRC'd, so replay stops before it, and the next writer (under the
lock) truncates it — at most the change in flight is lost, and the files always load.
Temporary files left by a killed compaction are removed by the next :meth:`open`, under
the lock, when no writer can be using them.

One ``threading.RLock`` per object serialises its threads, so a thread asking for
suggestions while another learns never sees a half-applied message. Files are untrusted
input: every field of the snapshot and of each journal record is checked (types, ranges,
well-formed keys, spellings, settings, the entry cap, bounded sizes) before it is used,
and anything else raises :class:`~nextword.ModelFormatError`.
"""

from __future__ import annotations

import bisect
import fcntl
import heapq
import math
import os
import re
import secrets
import struct
import threading
import time
import zlib
from collections.abc import Iterable, Sequence
from typing import Any

import msgpack

from .errors import InvalidArgumentError, LayerNotFoundError, ModelFormatError
from .keyboard import Channel
from .estimators.jm import jm_step
from .mix import MixedModel, Predictor
from .model import Model, Suggestion, check_k
from .store import atomic_write
from .text import BOS, EOS, UNK, fold, parse_typed, recase, sentences

__all__ = [
    "PersonalLayer",
    "PERSONAL_MAGIC",
    "JOURNAL_MAGIC",
    "JOURNAL_SUFFIX",
    "LOCK_SUFFIX",
    "MAX_ENTRIES_LIMIT",
    "MAX_BLOCKED",
    "MAX_WORD_CHARS",
]

PERSONAL_MAGIC = b"\x89NWP\r\n\x1a\n"
JOURNAL_MAGIC = b"\x89NWJ\r\n\x1a\n"
#: The journal and the lock file are named after the snapshot: ``me.nwp.journal``, ``me.nwp.lock``.
JOURNAL_SUFFIX = ".journal"
LOCK_SUFFIX = ".lock"
#: The largest ``max_entries`` a layer accepts (a full layer stays well inside ``_MAX_PAYLOAD``).
MAX_ENTRIES_LIMIT = 1 << 18
#: The most words a blocklist holds.
MAX_BLOCKED = 65_536
#: Longer words (or spellings) are counted as unknown: nobody needs them offered, and
#: the bound keeps every string a file may hold small.
MAX_WORD_CHARS = 256

_HEADER = struct.Struct("<8sHHQI")  # magic, major, minor, payload length, payload crc
_JHEADER = struct.Struct("<8sHHQI")  # magic, major, minor, snapshot id, crc of the first 20 bytes
_RECORD = struct.Struct("<II")  # payload length, payload crc
_SNAPSHOT_MINOR = 1  # 1.1 adds snapshot_id (1.0 files read as id 0)
_MAX_PAYLOAD = 16 << 20
_MAX_STR_BYTES = 4 * MAX_WORD_CHARS
_MAX_RECORD = 1 << 20
_MAX_JOURNAL = 16 << 20
_COMPACT_MIN = 256 << 10
_COMPACT_MAX = 8 << 20
_FILE_MODE = 0o600
_MAX_COUNT = 1e300  # stored counts are renormalised long before this
_MAX_TIMES = 1 << 31  # one record's repeat count of one pair
_SPACE = re.compile(r"\s")
# the ranking's walk over the user's words: steps allowed against the base's first list and
# its deeper lists (the last list has no limit), and how deep those lists go
_WALK_BUDGETS = (24, 96)
_DEEPER = (64, 512)
_DEEPER_MAX_HISTORY = 4096  # c(v) of the base's last context word up to which deeper lists are asked for
_SETTINGS_KEYS = ("min_uses", "strength", "max_weight", "lam", "half_life_messages", "half_life_days", "max_entries")
_OPS = ("learn", "forget", "block", "unblock", "clear")

Record = dict[str, Any]
_datasync = getattr(os, "fdatasync", os.fsync)  # data + size reach the disk; macOS has only fsync


def _valid_text(value: object, what: str) -> str:
    """``value`` if it is a str that encodes as UTF-8 (no lone surrogates), else InvalidArgumentError."""
    if not isinstance(value, str):
        raise InvalidArgumentError(f"{what} must be str, got {type(value).__name__}")
    try:
        value.encode("utf-8")
    except UnicodeEncodeError:
        raise InvalidArgumentError(
            f"{what} {ascii(value)} is not valid Unicode text (it contains a lone surrogate, e.g. undecodable bytes)"
        ) from None
    return value


def _history(history: object) -> tuple[str | None, ...]:
    """Context tokens (oldest first; None or '<s>' = sentence start) checked at the boundary; empty = sentence start."""
    if isinstance(history, str) or not isinstance(history, Sequence):
        raise InvalidArgumentError(f"history must be a sequence of tokens, got {type(history).__name__}")
    for t in history:
        if t is not None:
            _valid_text(t, "history token")
    return tuple(history) if history else (BOS,)


def _word_key(word: object, what: str = "word") -> str:
    """The counting key of one word given to forget/block/unblock, checked at the boundary."""
    w = _valid_text(word, what)
    key = fold(w)
    if not key or _SPACE.search(key) or "<" in key or ">" in key or len(key) > MAX_WORD_CHARS:
        raise InvalidArgumentError(
            f"{what} must be one word (no spaces, no '<' or '>', at most {MAX_WORD_CHARS} characters), got {ascii(word)}"
        )
    return key


def _is_word_key(key: object) -> bool:
    """A well-formed stored word key: a non-empty folded str without spaces or angle brackets."""
    return (
        isinstance(key, str)
        and 0 < len(key) <= MAX_WORD_CHARS
        and "<" not in key
        and ">" not in key
        and _SPACE.search(key) is None
        and fold(key) == key
    )


def _is_count(value: object) -> bool:
    return (
        not isinstance(value, bool)
        and isinstance(value, (int, float))
        and math.isfinite(value)
        and 0 <= value <= _MAX_COUNT
    )


def _check_settings(
    *,
    min_uses: object,
    strength: object,
    max_weight: object,
    lam: object,
    half_life_messages: object,
    half_life_days: object,
    max_entries: object,
) -> dict[str, Any]:
    """The constructor's ranges, shared with the file reader (one source for both)."""
    if isinstance(min_uses, bool) or not isinstance(min_uses, int) or not 1 <= min_uses <= _MAX_TIMES:
        raise InvalidArgumentError(f"min_uses must be an integer in [1, {_MAX_TIMES}], got {min_uses!r}")
    out: dict[str, Any] = {"min_uses": min_uses}
    for name, value, lo, hi in (("strength", strength, 1e-9, 1e300), ("max_weight", max_weight, 0.0, 1.0), ("lam", lam, 0.0, 1.0)):
        if isinstance(value, bool) or not isinstance(value, (int, float)) or not lo <= value <= hi:
            raise InvalidArgumentError(f"{name} must be a number in [{lo}, {hi}], got {value!r}")
        out[name] = float(value)
    for name, value in (("half_life_messages", half_life_messages), ("half_life_days", half_life_days)):
        if value is not None and (
            isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value <= 1e300
        ):
            raise InvalidArgumentError(f"{name} must be a finite number > 0 or None, got {value!r}")
        out[name] = value
    if isinstance(max_entries, bool) or not isinstance(max_entries, int) or not 16 <= max_entries <= MAX_ENTRIES_LIMIT:
        raise InvalidArgumentError(f"max_entries must be an integer in [16, {MAX_ENTRIES_LIMIT}], got {max_entries!r}")
    out["max_entries"] = max_entries
    return out


class PersonalLayer:
    """Personal counts mixed with a base :class:`~nextword.Model`; safe across threads and processes.

    ``PersonalLayer(base, ...)`` lives in memory; :meth:`open` ties one to a file (shared
    safely with other processes), :meth:`load` reads a detached copy. The constructor's
    ``path`` creates a new layer file from the given settings and refuses an existing one
    (use :meth:`open` for that: it never overwrites a user's counts).
    """

    def __init__(
        self,
        base: Predictor,
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
        if not isinstance(base, (Model, MixedModel)):
            raise InvalidArgumentError(f"base must be a nextword.Model or MixedModel, got {type(base).__name__}")
        self._apply_settings(
            _check_settings(
                min_uses=min_uses,
                strength=strength,
                max_weight=max_weight,
                lam=lam,
                half_life_messages=half_life_messages,
                half_life_days=half_life_days,
                max_entries=max_entries,
            )
        )
        self.base = base
        self.blocklist: set[str] = {_word_key(w, "blocked word") for w in blocklist}
        if len(self.blocklist) > MAX_BLOCKED:
            raise InvalidArgumentError(f"a blocklist holds at most {MAX_BLOCKED} words, got {len(self.blocklist)}")
        self._lock = threading.RLock()
        self._closed = False
        self._blocked_sorted: list[str] | None = None  # the blocklist sorted, for prefix counts (None: stale)
        # pure functions of the immutable base, cached: its top lists and its word set
        self._base_cache: dict[tuple[tuple[str | None, ...], str, int], tuple[tuple[str, float], ...]] = {}
        self._base_words: dict[str, str | None] = {}
        self._base_probs: dict[tuple[tuple[str | None, ...], str], float] = {}  # the base's P(w | context)
        depth = base.header().get("skyband_k", 8)
        self._cheap_depth: int = depth if isinstance(depth, int) and 1 <= depth <= 64 else 8
        self._path: str | None = None
        self._lock_fd: int | None = None
        self._snap_fd: int | None = None  # held so the snapshot's inode stays unique while we use it
        self._journal_fd: int | None = None
        self._journal_ino = -1
        self._journal_end = 0  # bytes of the journal applied to this object's state
        self._snapshot_id = 0
        self._snapshot_bytes = 0
        self._reset()
        if path is not None:
            self._attach(os.fspath(path), create=True, keep_state=True)

    def _apply_settings(self, st: dict[str, Any]) -> None:
        self.min_uses: int = st["min_uses"]
        self.strength: float = st["strength"]
        self.max_weight: float = st["max_weight"]
        self.lam: float = st["lam"]
        self.half_life_messages: float | None = st["half_life_messages"]
        self.half_life_days: float | None = st["half_life_days"]
        self.max_entries: int = st["max_entries"]

    def _settings(self) -> dict[str, Any]:
        return {name: getattr(self, name) for name in _SETTINGS_KEYS}

    @property
    def path(self) -> str | None:
        """The snapshot file this layer saves every change to, or None (in memory only)."""
        return self._path

    @classmethod
    def open(
        cls, base: Predictor, path: str | os.PathLike[str], *, create: bool = False, **settings: Any
    ) -> PersonalLayer:
        """The layer saved at ``path``, saving every change there until :meth:`close`.

        A missing file raises :class:`~nextword.LayerNotFoundError` unless ``create`` is
        true (then a new empty layer with ``settings`` is written): a wrong path never
        silently starts an empty layer. A file that exists but is damaged raises
        :class:`~nextword.ModelFormatError`; it is never replaced by an empty layer.
        ``settings`` apply to a new layer only; an existing file keeps its own. Other
        processes may open the same file at the same time (see the module docstring).
        """
        name = os.fspath(path)
        if not create and not os.path.exists(name):
            raise LayerNotFoundError(f"{name}: no personal layer file there (create it explicitly)")
        layer = cls(base, **settings)
        layer._attach(name, create=create, keep_state=False)
        return layer

    def close(self) -> None:
        """Persist anything pending and release the files; later changes raise.

        Every change is already on disk when its call returns, so nothing is pending;
        close releases the lock file and journal handles. Idempotent. Reading (suggest,
        prob, counts) still works on the in-memory state.
        """
        with self._lock:
            if self._closed:
                return
            self._closed = True
            self._release_files()

    def _release_files(self) -> None:
        for attr in ("_journal_fd", "_snap_fd", "_lock_fd"):
            fd = getattr(self, attr, None)
            if fd is not None:
                setattr(self, attr, None)
                try:
                    os.close(fd)
                except OSError:
                    pass

    def __del__(self) -> None:  # file handles only: every change is on disk already
        try:
            self._release_files()
        except Exception:  # noqa: BLE001 - interpreter shutdown may have torn down os
            pass

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
            raise InvalidArgumentError(f"personal layer {self._path or '(in memory)'} is closed: it cannot change any more")

    @property
    def entries(self) -> int:
        """Stored counts: words plus pairs (the unit of ``max_entries``)."""
        with self._lock:
            return self._entries()

    def _entries(self) -> int:
        return len(self._uni) + self._npairs

    # -- state -------------------------------------------------------------------------------

    def clear(self) -> None:
        """Forget everything learned (the blocklist stays)."""
        self._commit({"op": "clear"})

    def _reset(self) -> None:
        # counts are stored divided by the current decay factor: effective = stored * scale
        self._uni: dict[str, float] = {}
        self._big: dict[str, dict[str, float]] = {}
        self._npairs = 0  # sum of len(row) over self._big, kept in step
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
        self._prefix_words: dict[str, list[tuple[float, str]]] = {}  # cached by prefix until a count changes
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
        self._prefix_words = {}
        for c, w in self._by_count:
            self._by_initial.setdefault(w[:1], []).append((c, w))
        self._row_sorted = {}

    def _bump(self, key: str, inc: float) -> None:
        old = self._uni.get(key)
        new = (old or 0.0) + inc
        self._uni[key] = new
        if self._prefix_words:
            self._prefix_words = {}
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
        with self._lock:
            return self._uni.get(key, 0.0) * self._scale

    def pair_count(self, previous_word: str | None, word: str) -> float:
        v = self._hkey(previous_word)
        w = word if word in (EOS, UNK) else fold(word)
        with self._lock:
            return self._big.get(v, {}).get(w, 0.0) * self._scale

    @property
    def tokens(self) -> float:
        """N_user: predicted tokens learned, after decay."""
        with self._lock:
            return self._total * self._scale

    @property
    def weight(self) -> float:
        """μ, the weight of the personal part: max_weight · N / (N + strength)."""
        n = self.tokens
        return self.max_weight * n / (n + self.strength) if n > 0 else 0.0

    # -- changes: a record is built, written, then applied -------------------------------------

    def learn(self, message: str, *, when: float | None = None) -> None:
        """Count one committed message (O(words)); its text is not kept.

        ``when`` (seconds since the epoch, default now) drives the decay in days; only the
        time of the latest message is kept.
        """
        _valid_text(message, "message")
        if when is not None and (isinstance(when, bool) or not isinstance(when, (int, float)) or not math.isfinite(when)):
            raise InvalidArgumentError(f"when must be a finite number of seconds, got {when!r}")
        if when is None and self.half_life_days is not None:
            when = time.time()
        self._commit(_learn_record(message, None if when is None else float(when)))

    def forget(self, word: str) -> None:
        """Remove ``word`` and every pair containing it, at once (and from the file)."""
        key = _word_key(word)
        self._commit({"op": "forget", "key": key}, skip=lambda: key not in self._uni and key not in self._big)

    def block(self, word: str) -> None:
        """Never suggest ``word`` (it keeps its probability)."""
        key = _word_key(word)
        self._commit({"op": "block", "key": key}, skip=lambda: key in self.blocklist)

    def unblock(self, word: str) -> bool:
        """Offer ``word`` again; False (and nothing written) when it was not blocked."""
        key = _word_key(word)
        return self._commit({"op": "unblock", "key": key}, skip=lambda: key not in self.blocklist)

    def _commit(self, record: Record, skip: Any = None) -> bool:
        """Write ``record`` (to the journal, when there is a file), then apply it in memory.

        ``skip`` (checked after syncing with other processes) says the change would do
        nothing: then nothing is written and False is returned.
        """
        body: bytes = msgpack.packb(record, use_bin_type=True)
        if len(body) > _MAX_RECORD:
            raise InvalidArgumentError(f"one change of {len(body)} bytes is too large (at most {_MAX_RECORD}): split the message")
        _check_record(body, "a new change")  # never write what a reader would refuse
        with self._lock:
            self._check_open()
            if record["op"] == "block" and len(self.blocklist) >= MAX_BLOCKED:
                raise InvalidArgumentError(f"the blocklist is full ({MAX_BLOCKED} words)")
            if self._path is None:
                if skip is not None and skip():
                    return False
                self._apply(record)
                return True
            with self._flock():
                self._sync_locked()
                if skip is not None and skip():
                    return False
                if self._journal_end > self._compact_threshold():
                    self._compact_locked()
                self._append_locked(body)
                self._apply(record)
            return True

    def _apply(self, rec: Record) -> None:
        """Apply one validated record: the only way counts change (own changes and replay alike)."""
        op = rec["op"]
        if op == "learn":
            self._apply_learn(rec)
        elif op == "forget":
            self._forget(rec["key"])
        elif op == "block":
            self.blocklist.add(rec["key"])
            self._blocked_sorted = None
        elif op == "unblock":
            self.blocklist.discard(rec["key"])
            self._blocked_sorted = None
        else:
            self._reset()

    def _apply_learn(self, rec: Record) -> None:
        self._decay_step(rec["when"])
        inc = 1.0 / self._scale
        sorted_rows = self._row_sorted
        for h, w, n in rec["pairs"]:
            add = inc * n
            self._bump(w, add)
            row = self._big.setdefault(h, {})
            old = row.get(w)
            if old is None:
                self._npairs += 1
                row[w] = add
            else:
                row[w] = old + add
            if w not in (EOS, UNK):  # keep the cached sorted successor lists in step (no rebuild per message)
                for key in ((h, ""), (h, w[:1])):
                    lst = sorted_rows.get(key)
                    if lst is not None:
                        if old is not None:
                            del lst[bisect.bisect_left(lst, (-old, w))]
                        bisect.insort(lst, (-row[w], w))
            self._hist[h] = self._hist.get(h, 0.0) + add
            self._total += add
        for key, tok in rec["set"].items():
            self._spelling[key] = tok
        for key, tok in rec["default"].items():
            self._spelling.setdefault(key, tok)
        self.messages += 1
        if self._entries() > self.max_entries:
            self._evict()

    def _forget(self, key: str, preds: dict[str, list[str]] | None = None) -> int:
        """Remove ``key`` and its pairs; returns the entries removed. ``preds``: histories per word (eviction)."""
        old = self._uni.get(key)
        if old is not None and key not in (EOS, UNK):
            del self._by_count[bisect.bisect_left(self._by_count, (-old, key))]
            del self._sorted_keys[bisect.bisect_left(self._sorted_keys, key)]
            initial = self._by_initial[key[:1]]
            del initial[bisect.bisect_left(initial, (-old, key))]
        self._prefix_words = {}
        self._row_sorted = {}
        removed_entries = 0 if old is None else 1
        self._total -= self._uni.pop(key, 0.0)
        self._spelling.pop(key, None)
        row = self._big.pop(key, None)
        if row is not None:
            removed_entries += len(row)
            self._npairs -= len(row)
            self._hist.pop(key, None)
        histories = list(self._big) if preds is None else preds.get(key, ())
        for h in histories:
            r = self._big.get(h)
            if r is None:
                continue
            c = r.pop(key, None)
            if c is not None:
                removed_entries += 1
                self._npairs -= 1
                self._hist[h] -= c
                if not r:
                    del self._big[h]
                    self._hist.pop(h, None)
        # tokens that followed the forgotten word lose their history but stay counted
        if not self._by_count:
            removed_entries += self._entries()
            self._reset()  # no words left: the layer must add nothing
        return removed_entries

    def _evict(self) -> None:
        """Drop the least useful entries until 90% of the cap: smallest pairs, then smallest words.

        Deterministic (sorted by count, then key), so every process evicts the same entries.
        """
        target = int(self.max_entries * 0.9)
        pairs = sorted((c, h, w) for h, row in self._big.items() for w, c in row.items())
        excess = self._entries() - target
        for c, h, w in pairs[: max(0, min(excess, len(pairs) // 2))]:
            self._row_sorted.pop((h, ""), None)
            self._row_sorted.pop((h, w[:1]), None)
            row = self._big[h]
            del row[w]
            self._npairs -= 1
            self._hist[h] -= c
            if not row:
                del self._big[h]
                del self._hist[h]
        entries = self._entries()
        if entries > target:
            preds: dict[str, list[str]] = {}
            for h, row in self._big.items():
                for w in row:
                    preds.setdefault(w, []).append(h)
            words = sorted((c, k) for k, c in self._uni.items() if k not in (EOS, UNK))
            for _, k in words:
                if entries <= target:
                    break
                if k in self._uni:
                    entries -= self._forget(k, preds)

    # -- probabilities ----------------------------------------------------------------------------

    def _hkey(self, previous_word: str | None) -> str:
        """The user's history key of a context token, mapped exactly as :func:`_learn_record` counts it."""
        if previous_word is None or previous_word == BOS:
            return BOS
        if previous_word == UNK:
            return UNK
        key = fold(previous_word)
        if len(previous_word) > MAX_WORD_CHARS or not _is_word_key(key):
            return UNK
        return key

    def _p_user(self, v: str, w: str) -> float:
        total = self._total
        if total <= 0:
            return 0.0
        u = self._uni.get(w, 0.0) / total
        cv = self._hist.get(v, 0.0)
        if cv <= 0:
            return u
        return jm_step(self.lam, self._big[v].get(w, 0.0), cv, u)  # type: ignore[no-any-return]

    def _base_spelling(self, key: str) -> str | None:
        """The base's display spelling of word ``key``, None if it lacks the word (cached: the base never changes)."""
        try:
            return self._base_words[key]
        except KeyError:
            pass
        shown = self.base.spelling(key)
        if len(self._base_words) >= 200_000:
            self._base_words.clear()
        self._base_words[key] = shown
        return shown

    def _in_base(self, key: str) -> bool:
        return self._base_spelling(key) is not None

    def _p_base(self, history: tuple[str | None, ...], w: str) -> float:
        if w not in (EOS, UNK) and not self._in_base(w):
            return 0.0  # the base gives this word's mass to <unk>
        return self.base.prob_after(w, history)

    def prob_after(self, word: str, history: Sequence[str | None]) -> float:
        """P(word | history) under the mixture; ``history`` the context tokens oldest first.

        ``None`` or ``'<s>'`` marks a sentence start. The base part reads as many of the
        last tokens as its order uses (two for a trigram base), the personal part the last one.
        """
        hist = _history(history)
        v = self._hkey(hist[-1])
        _valid_text(word, "word")
        w = word if word in (EOS, UNK) else fold(word)
        with self._lock:
            if w not in (EOS, UNK) and w not in self._uni and not self._in_base(w):
                w = UNK
            mu = self.weight
            return (1.0 - mu) * self._p_base(hist, w) + mu * self._p_user(v, w)

    def prob(self, word: str, previous_word: str | None = None) -> float:
        """P(word | previous_word) under the mixture (``None`` = sentence start): :meth:`prob_after` of one token."""
        return self.prob_after(word, (previous_word,))

    def vocabulary(self) -> list[str]:
        """Every outcome with its own probability: base words, the user's words, </s>, <unk>."""
        words = {w for w, _ in self.base.words()}
        with self._lock:
            mine = [k for k in self._uni if k not in (EOS, UNK)]
        keys = {fold(w) for w in words} | set(mine)
        return sorted(keys) + [EOS, UNK]

    def perplexity(self, lines: Iterable[str]) -> float:
        with self._lock:
            return self._perplexity(lines)

    def _perplexity(self, lines: Iterable[str]) -> float:
        log_sum, events = 0.0, 0
        for line in lines:
            for sent in sentences(line):
                hist: list[str | None] = [BOS]
                for tok in [*sent, EOS]:
                    w = UNK if tok is None else tok
                    p = self.prob_after(w, hist[-2:])
                    log_sum += math.log(p) if p > 0 else -math.inf
                    events += 1
                    hist.append(w)
        if events == 0:
            raise InvalidArgumentError("no words to score: the text is empty")
        return math.exp(-log_sum / events)

    # -- suggestions -------------------------------------------------------------------------------

    def _suggestible(self, key: str) -> bool:
        if key in self.blocklist or key in (EOS, UNK, BOS):
            return False
        return self._uni.get(key, 0.0) * self._scale >= self.min_uses - 1e-9 or self._in_base(key)

    def rank_keys(self, previous_word: str | None, prefix: str, k: int) -> list[tuple[str, float]]:
        """Top k (key, P) under the mixture among suggestible words starting with ``prefix``.

        :meth:`rank_after` with the one-token context ``(previous_word,)``.
        """
        return self.rank_after((previous_word,), prefix, k)

    def rank_after(self, history: Sequence[str | None], prefix: str, k: int) -> list[tuple[str, float]]:
        """Top k (key, P) under the mixture after ``history`` among suggestible words starting with ``prefix``.

        Exact: equal to scoring every suggestible word that starts with ``prefix`` with
        :meth:`prob_after` and sorting by (probability descending, the base model's
        probability descending, the base's tie order :meth:`Model.tie_rank`, key) — see :meth:`_rank` for why it need not.
        """
        k = check_k(k)
        hist = _history(history)
        _valid_text(prefix, "prefix")
        with self._lock:
            self.refresh()
            return self._rank(hist, prefix, k)

    def _rank_typo(self, hist: tuple[str | None, ...], prefix: str, k: int, typo: Channel) -> list[tuple[str, float]]:
        """Typo-tolerant top k: the exact mixture top k (:meth:`_rank`) of each prefix the typed
        one may mean (:meth:`Model.typo_prefixes`), merged by channel weight × mixture
        probability, a word keeping its best. Every word of the overall top k is in the top
        k of the prefix giving its best score, so the merge is exact (ties: the base's tie
        order, then the key); a prefix whose weight is below the k-th score so far cannot
        contribute (a mixture probability is at most 1) and ends the walk. Words only the
        user has are reached through the exact prefix alone: the near-miss search walks the
        base model's vocabulary.
        """
        p = fold(prefix)
        readings = self.base.typo_prefixes(prefix, typo)
        if all(q != p for q, _ in readings):
            readings = [(p, 1.0), *readings]
        best: dict[str, float] = {}
        kth = -1.0
        for q, w in readings:
            if len(best) >= k and w < kth:
                break
            for key, s in self._rank(hist, q, k):
                sc = w * s
                if sc > best.get(key, -1.0):
                    best[key] = sc
            if len(best) >= k:
                kth = sorted(best.values(), reverse=True)[k - 1]
        order = self.base.tie_rank
        return sorted(best.items(), key=lambda e: (-e[1], order(e[0]), e[0]))[:k]

    def _blocked_with_prefix(self, p: str) -> int:
        """How many blocked words start with ``p`` (an estimate is enough: it sizes a request)."""
        if not self.blocklist:
            return 0
        keys = self._blocked_sorted
        if keys is None:
            keys = self._blocked_sorted = sorted(self.blocklist)
        if not p:
            return len(keys)
        lo = bisect.bisect_left(keys, p)
        return bisect.bisect_left(keys, p + "\U0010ffff", lo) - lo

    def _base_top(
        self, hist: tuple[str | None, ...], prefix: str, p: str, want: int, k: int
    ) -> tuple[tuple[tuple[str, float], ...], bool]:
        """The base model's exact top ``want`` (or deeper, until it holds k words not blocked) and whether it is the whole range.

        ``prefix`` as typed goes to the base (which folds it as its own ``suggest`` does);
        ``p`` is its folded form.

        Cached: the base never changes, and keyboards repeat contexts and prefixes.
        """
        blocked = self.blocklist
        nb = self._blocked_with_prefix(p) if blocked else 0
        ctx = hist[-(self.base.order - 1):]
        while True:
            key = (ctx, p, want)
            top = self._base_cache.get(key)
            if top is None:
                # a tuple of (str, float) tuples: the garbage collector stops tracking it, so a
                # full cache adds nothing to its pauses
                top = tuple(self.base.rank_after(ctx, prefix, want))
                if len(self._base_cache) >= 20_000:
                    self._base_cache.clear()
                self._base_cache[key] = top
            if len(top) < want:
                return top, True  # every word of the prefix range is in it
            if nb == 0 or sum(1 for w, _ in top if w not in blocked) >= k:
                return top, False
            want *= 2

    def _rank(self, hist: tuple[str | None, ...], prefix: str, k: int) -> list[tuple[str, float]]:
        """The mixture's exact top k from two candidate sources, without scoring every word.

        score(w) = (1 − μ)·B(w) + μ·U(w), B the base's P(w | its context), U the user's
        P(w | v) (v the last token); ties go to the larger B, then the base's tie order
        (:meth:`Model.tie_rank`: its ids, floor descending then key; words the base lacks
        last), then the key.

        1. *The base's own exact top list* T: its top k (plus the blocked words of the
           prefix; in fact as deep as its skybands reach, and deeper when step 2 walks
           long after a context with few successors) with B. Every word of T is scored in full. A word x outside T that the
           user never used has U(x) = 0 and comes after the last of T in the base's order
           (B smaller, or B equal and a larger base id); then every word y of T beats it in
           the mixture's order: (1 − μ)·B(y) + μ·U(y) ≥ (1 − μ)·B(x) (floating-point
           addition and multiplication by a constant ≥ 0 are monotone), and on equality
           B(y) ≥ B(x), and on equality again id(y) < id(x). T holds k words that are not blocked (or
           the whole prefix range), so no such x can enter the top k.
        2. *The user's words* outside T: B(w) ≤ B_T, the last probability of T (0 when T is
           the whole range), so score(w) ≤ (1 − μ)·B_T + μ·U(w). The user's successors of v
           (by pair count) and the user's words (by count) are walked together, threshold
           style: a word met in neither list has U at most the formula applied to both
           lists' next counts, so once the k-th best lower bound (exact scores of T, μ·U(w)
           of met words) beats that, no unmet word can enter. Met words are then given
           their exact B (one batched base lookup) in order of their upper bound, until
           the k-th exact score beats the next upper bound.
        All comparisons are strict on the same floating-point expressions the scores use,
        so the result equals scoring every word (tests/test_personal_models.py).
        """
        p = fold(prefix)
        mu = self.weight
        oml = 1.0 - mu
        v = self._hkey(hist[-1])
        blocked = self.blocklist
        # the base's list as deep as its stored skybands reach (as cheap as its top k, and
        # never less than k plus the blocked words of the prefix); when the user's words are
        # too many to rule out against its last probability (a context whose successors
        # nearly tie, e.g. a rare word seen before a dozen words once each), a deeper list,
        # whose last probability is much lower (a rare context has few successors: cheap)
        first = max(k + min(self._blocked_with_prefix(p), 64) if blocked else k, self._cheap_depth)
        uni = self._uni
        plan: tuple[tuple[int, int | None], ...] = ((first, None),)
        if mu > 0.0 and self.base.history_count(hist[-1]) <= _DEEPER_MAX_HISTORY:
            # deeper lists only after a context with few successors (cheap to rank deeper);
            # after a common word the walk simply goes on against the first list
            plan = ((first, _WALK_BUDGETS[0]), (max(first, _DEEPER[0]), _WALK_BUDGETS[1]), (max(first, _DEEPER[1]), None))
        for want, budget in plan:
            top, complete = self._base_top(hist, prefix, p, want, k)
            bt = 0.0 if complete or not top else top[-1][1]
            scored: dict[str, tuple[float, float]] = {}  # key -> (mixture, base) for exactly scored words
            for w, b in top:
                if w not in blocked:
                    # a word the user never used has U = 0.0 exactly (what _p_user returns for it)
                    scored[w] = (oml * b + mu * (self._p_user(v, w) if w in uni else 0.0), b)
            if mu <= 0.0 or self._total <= 0.0:
                break
            pending = self._user_candidates(v, p, k, bt, mu, scored, budget=None if complete else budget)
            if pending is None:
                continue  # over budget: a deeper list
            if pending:
                self._resolve(pending, hist, k, mu, scored)
            break
        best = sorted((-s, -b, w) for w, (s, b) in scored.items())
        if any(best[i][:2] == best[i + 1][:2] for i in range(min(k, len(best) - 1))):
            # equal mixture and base probability: the base's own tie order (its ids), then the key
            order = self.base.tie_rank
            best.sort(key=lambda t: (t[0], t[1], order(t[2]), t[2]))
        return [(w, -s) for s, _, w in best[:k]]

    def _user_candidates(
        self, v: str, p: str, k: int, bt: float, mu: float, scored: dict[str, tuple[float, float]], *, budget: int | None
    ) -> list[tuple[float, str, float]] | None:
        """The user's words that may beat the k-th best: (upper bound, key, U), by the threshold walk.

        None when the walk would take more than ``budget`` steps (the caller asks the base for a deeper list).
        """
        total = self._total
        cv = self._hist.get(v, 0.0)
        lam = self.lam
        succ = self._successors_by_count(v, p) if cv > 0 else []
        words = self._user_words_by_count(p)
        cb = (1.0 - mu) * bt
        blocked = self.blocklist
        # the k best lower bounds so far (a min-heap): exact scores, and μ·U of met words
        lows = sorted(s for s, _ in scored.values())[-k:]  # ascending: a min-heap
        kth = lows[0] if len(lows) >= k else -1.0
        met: set[str] = set()
        pending: list[tuple[float, str, float]] = []
        si = ui = 0
        scale, min_uses = self._scale, self.min_uses - 1e-9  # the rule of _suggestible, same expression
        while ui < len(words):  # the word list holds every user word with the prefix
            ns = succ[si] if si < len(succ) else None
            nu = words[ui]
            s_next = -ns[0] if ns is not None else 0.0
            u_next = -nu[0]
            if cv > 0:
                share_s = lam * (s_next / cv)
                share_u = (1.0 - lam) * (u_next / total)
                bound = cb + mu * (lam * (s_next / cv) + (1.0 - lam) * (u_next / total))
            else:
                share_s, share_u = -1.0, 0.0
                bound = cb + mu * (u_next / total)
            if kth > bound:
                break
            if budget is not None:
                budget -= 1
                if budget < 0:
                    return None
            if ns is not None and share_s >= share_u:
                w = ns[1]
                si += 1
            else:
                w = nu[1]
                ui += 1
            if w in met:
                continue
            met.add(w)
            if w in scored or w in blocked or not w.startswith(p):
                continue
            if self._uni.get(w, 0.0) * scale < min_uses and not self._in_base(w):
                continue  # a new word not used min_uses times yet: not offered
            u = self._p_user(v, w)
            pending.append((cb + mu * u, w, u))
            low = mu * u
            if len(lows) < k:
                heapq.heappush(lows, low)
            elif low > lows[0]:
                heapq.heapreplace(lows, low)
            if len(lows) >= k:
                kth = lows[0]
        return pending

    def _resolve(
        self,
        pending: list[tuple[float, str, float]],
        hist: tuple[str | None, ...],
        k: int,
        mu: float,
        scored: dict[str, tuple[float, float]],
    ) -> None:
        """Give pending user words their exact score, best upper bound first, while one may still enter."""
        pending.sort(key=lambda t: (-t[0], t[1]))
        exact = sorted(s for s, _ in scored.values())[-k:]  # ascending: a min-heap
        i = 0
        step = 4  # a few first, one by one; then every word still above the k-th score at once (the base's vector path)
        while i < len(pending):
            if len(exact) >= k and pending[i][0] < exact[0]:
                break  # every later word scores at most its bound, below the k-th exact score
            if step:
                chunk = pending[i : i + step]
                step = 0
            else:
                floor = exact[0] if len(exact) >= k else -1.0
                j = i
                while j < len(pending) and pending[j][0] >= floor:
                    j += 1
                chunk = pending[i:j]
            i += len(chunk)
            ctx = hist[-(self.base.order - 1):]
            cache = self._base_probs
            missing = [w for _, w, _ in chunk if (ctx, w) not in cache and self._in_base(w)]
            if missing:
                if len(cache) >= 100_000:
                    cache.clear()
                for w, b in zip(missing, self.base.probs_after(missing, ctx)):
                    cache[ctx, w] = b
            for _, w, u in chunk:
                b = cache.get((ctx, w), 0.0)  # 0.0: a word the base lacks
                s = (1.0 - mu) * b + mu * u
                scored[w] = (s, b)
                if len(exact) < k:
                    heapq.heappush(exact, s)
                elif s > exact[0]:
                    heapq.heapreplace(exact, s)

    def _user_words_by_count(self, p: str) -> list[tuple[float, str]]:
        """The user's words by (−stored count, key): those starting with ``p`` when few, else all."""
        if not p:
            return self._by_count
        if len(p) == 1:
            return self._by_initial.get(p, [])
        hit = self._prefix_words.get(p)
        if hit is None:
            keys = self._sorted_keys
            lo = bisect.bisect_left(keys, p)
            hi = bisect.bisect_left(keys, p + "\U0010ffff", lo)
            hit = sorted((-self._uni[w], w) for w in keys[lo:hi]) if hi - lo <= 256 else self._by_initial.get(p[:1], [])
            if len(self._prefix_words) >= 4096:
                self._prefix_words.clear()
            self._prefix_words[p] = hit
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

    def suggest(self, typed: str, k: int = 3, *, typo: Channel | None = None) -> list[Suggestion]:
        """Like :meth:`nextword.Model.suggest`, over the mixture of base and personal counts.

        The context is the one the base model reads (the last two words of the sentence
        for a trigram base); the personal counts use its last word. ``typo``: typo-tolerant
        completion as in :meth:`nextword.Model.suggest` (see :meth:`_rank_typo`).
        """
        if not isinstance(typed, str):
            raise InvalidArgumentError(f"typed must be str, got {type(typed).__name__}")
        k = check_k(k)
        ctx = parse_typed(typed)  # its tokens are valid text already
        at_start = ctx.previous == BOS
        out = []
        with self._lock:
            self.refresh()
            ranked = self._rank(ctx.history, ctx.prefix, k) if typo is None else self._rank_typo(
                ctx.history, ctx.prefix, k, typo)
            for key, p in ranked:
                shown = self._base_spelling(key) or self._spelling.get(key, key)
                out.append(Suggestion(recase(shown, ctx.prefix, at_start), p))
        return out

    # -- files ------------------------------------------------------------------------------------

    def _flock(self) -> _FileLock:
        assert self._lock_fd is not None
        return _FileLock(self._lock_fd)

    def _journal_path(self) -> str:
        assert self._path is not None
        return self._path + JOURNAL_SUFFIX

    def _compact_threshold(self) -> int:
        return min(max(_COMPACT_MIN, self._snapshot_bytes), _COMPACT_MAX)

    def _attach(self, name: str, *, create: bool, keep_state: bool) -> None:
        """Tie this object to the layer file ``name``: lock file, orphan clean-up, load or create."""
        directory = os.path.dirname(name) or "."
        if not create and not os.path.exists(name):
            raise LayerNotFoundError(f"{name}: no personal layer file there (create it explicitly)")
        try:
            self._lock_fd = os.open(name + LOCK_SUFFIX, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, _FILE_MODE)
        except OSError as e:
            raise type(e)(e.errno, f"cannot open the layer's lock file: {e.strerror}", name + LOCK_SUFFIX) from None
        self._path = name
        try:
            with self._flock():
                _remove_orphans(directory, os.path.basename(name))
                if os.path.exists(name):
                    if keep_state:
                        raise InvalidArgumentError(f"{name} already exists: open it with PersonalLayer.open")
                    self._reload_locked()
                elif not create:
                    raise LayerNotFoundError(f"{name}: no personal layer file there (create it explicitly)")
                else:
                    self._compact_locked()
        except BaseException:
            self._path = None
            self._release_files()
            raise

    def refresh(self) -> None:
        """Apply the changes other processes wrote since this one last looked (cheap when none)."""
        with self._lock:
            if self._path is None or self._closed or not self._others_wrote():
                return
            with self._flock():
                self._sync_locked()

    def _others_wrote(self) -> bool:
        try:
            st = os.stat(self._journal_path())
        except OSError:
            return True
        return st.st_ino != self._journal_ino or st.st_size != self._journal_end

    def _sync_locked(self) -> None:
        """Under the file lock: bring the state up to the files (replay, or reload after compaction)."""
        assert self._path is not None and self._snap_fd is not None and self._journal_fd is not None
        try:
            same_snapshot = _same_file(os.stat(self._path), os.fstat(self._snap_fd))
            same_journal = _same_file(os.stat(self._journal_path()), os.fstat(self._journal_fd))
        except FileNotFoundError:  # a file was removed under us: write ours back
            self._compact_locked()
            return
        if not (same_snapshot and same_journal):
            self._reload_locked()
            return
        self._replay_locked()

    def _replay_locked(self) -> None:
        """Apply the journal's records past ``_journal_end``; cut a torn or damaged tail."""
        assert self._journal_fd is not None
        fd = self._journal_fd
        size = os.fstat(fd).st_size
        if size == self._journal_end:
            return
        if size > _MAX_JOURNAL:
            raise ModelFormatError(f"{self._journal_path()}: journal of {size} bytes is too large")
        data = os.pread(fd, size - self._journal_end, self._journal_end)
        records, used = _parse_records(data, self._journal_path(), self._journal_end)
        for rec in records:
            self._apply(rec)
        self._journal_end += used
        if self._journal_end != size:  # torn or damaged tail: nobody is writing (we hold the lock)
            os.ftruncate(fd, self._journal_end)
            os.fsync(fd)
        self._journal_ino = os.fstat(fd).st_ino

    def _reload_locked(self) -> None:
        """Under the file lock: install the snapshot, then replay its journal (or start a fresh one)."""
        assert self._path is not None
        name = self._path
        fd, payload, size = _read_snapshot(name)
        try:
            self._install(payload, name)
        except BaseException:
            os.close(fd)
            raise
        for attr in ("_snap_fd", "_journal_fd"):
            old = getattr(self, attr)
            if old is not None:
                os.close(old)
                setattr(self, attr, None)
        self._snap_fd, self._snapshot_bytes = fd, size
        journal = self._journal_path()
        try:
            jfd = os.open(journal, os.O_RDWR | os.O_CLOEXEC)
        except FileNotFoundError:
            self._new_journal_locked()
            return
        head = os.pread(jfd, _JHEADER.size, 0)
        if _journal_id(head, journal) != self._snapshot_id:  # stale (crash between renames)
            os.close(jfd)
            self._new_journal_locked()
            return
        self._journal_fd, self._journal_end = jfd, _JHEADER.size
        self._journal_ino = os.fstat(jfd).st_ino
        self._replay_locked()

    def _new_journal_locked(self) -> None:
        """Start an empty journal for the current snapshot id."""
        journal = self._journal_path()
        atomic_write(journal, [_journal_header(self._snapshot_id)], mode=_FILE_MODE)
        if self._journal_fd is not None:
            os.close(self._journal_fd)
        self._journal_fd = os.open(journal, os.O_RDWR | os.O_CLOEXEC)
        self._journal_end = _JHEADER.size
        self._journal_ino = os.fstat(self._journal_fd).st_ino

    def _append_locked(self, body: bytes) -> None:
        assert self._journal_fd is not None
        fd, at = self._journal_fd, self._journal_end
        blob = _RECORD.pack(len(body), zlib.crc32(body)) + body
        try:
            written = os.pwrite(fd, blob, at)
            if written != len(blob):
                raise OSError(28, "short write (disk full?)")
            _datasync(fd)
        except OSError as e:
            try:
                os.ftruncate(fd, at)
            except OSError:
                pass
            raise type(e)(e.errno, f"cannot save the change: {e.strerror}", self._journal_path()) from None
        self._journal_end = at + len(blob)

    def _compact_locked(self) -> None:
        """Under the file lock: a new snapshot of the current state, then a new empty journal."""
        assert self._path is not None
        self._snapshot_id = secrets.randbits(63) or 1
        payload = self._payload()
        body = _packed_snapshot(payload)
        atomic_write(self._path, [_HEADER.pack(PERSONAL_MAGIC, 1, _SNAPSHOT_MINOR, len(body), zlib.crc32(body)), body], mode=_FILE_MODE)
        # the same state every other process will read from the file
        self._install(_decode_snapshot(body, self._path), self._path)
        if self._snap_fd is not None:
            os.close(self._snap_fd)
        self._snap_fd = os.open(self._path, os.O_RDONLY | os.O_CLOEXEC)
        self._snapshot_bytes = _HEADER.size + len(body)
        self._new_journal_locked()

    # -- persistence -----------------------------------------------------------------------------

    def _payload(self) -> dict[str, Any]:
        s = self._scale
        return {
            "settings": self._settings(),
            "snapshot_id": self._snapshot_id,
            "last_time": self._last_time,
            "messages": self.messages,
            "unigram": {k: v * s for k, v in self._uni.items()},
            "bigram": {h: {k: v * s for k, v in row.items()} for h, row in self._big.items()},
            "spelling": self._spelling,
            "blocklist": sorted(self.blocklist),
        }

    def save(self, path: str | os.PathLike[str]) -> None:
        """Write the counts (never text) to ``path`` atomically, mode 0600.

        Saving to the layer's own file compacts it (new snapshot, empty journal) under the
        lock; any other path gets a standalone copy with a fresh snapshot id.
        """
        name = os.fspath(path)
        with self._lock:
            own = self._path is not None and os.path.abspath(name) == os.path.abspath(self._path)
            if own and self._closed:  # a copy over the shared file would drop other processes' changes
                raise InvalidArgumentError(f"personal layer {name} is closed: open it again to save over it")
            if own:
                with self._flock():
                    self._sync_locked()
                    self._compact_locked()
                return
            payload = self._payload()
            payload["snapshot_id"] = secrets.randbits(63) or 1
            body = _packed_snapshot(payload)
        atomic_write(name, [_HEADER.pack(PERSONAL_MAGIC, 1, _SNAPSHOT_MINOR, len(body), zlib.crc32(body)), body], mode=_FILE_MODE)

    @classmethod
    def load(cls, base: Predictor, path: str | os.PathLike[str]) -> PersonalLayer:
        """A detached copy of the layer at ``path`` (snapshot plus journal); it saves nothing.

        Reads under a shared lock when the layer's lock file exists, so it never sees a
        half-written compaction. A missing file raises :class:`~nextword.LayerNotFoundError`,
        a damaged one :class:`~nextword.ModelFormatError`; neither is ever replaced.
        """
        name = os.fspath(path)
        if not os.path.exists(name):
            raise LayerNotFoundError(f"{name}: cannot open personal layer: no such file")
        layer = cls(base)
        try:
            lock_fd: int | None = os.open(name + LOCK_SUFFIX, os.O_RDONLY | os.O_CLOEXEC)
        except OSError:
            lock_fd = None
        try:
            if lock_fd is not None:
                fcntl.flock(lock_fd, fcntl.LOCK_SH)
            fd, payload, _ = _read_snapshot(name)
            os.close(fd)
            layer._install(payload, name)
            journal = name + JOURNAL_SUFFIX
            try:
                with open(journal, "rb") as f:
                    head = f.read(_JHEADER.size)
                    if _journal_id(head, journal) == layer._snapshot_id:
                        size = os.fstat(f.fileno()).st_size
                        if size > _MAX_JOURNAL:
                            raise ModelFormatError(f"{journal}: journal of {size} bytes is too large")
                        records, _ = _parse_records(f.read(), journal, _JHEADER.size)
                        for rec in records:
                            layer._apply(rec)
            except FileNotFoundError:
                pass
            except OSError as e:
                raise ModelFormatError(f"{journal}: cannot read the journal: {e.strerror}") from None
        finally:
            if lock_fd is not None:
                os.close(lock_fd)
        return layer

    def _install(self, data: Any, name: str) -> None:
        """Replace the whole state with a decoded snapshot payload, every field checked first."""
        snap = _check_snapshot(data, name)
        self._apply_settings(snap["settings"])
        self._reset()
        self._snapshot_id = snap["snapshot_id"]
        self.blocklist = set(snap["blocklist"])
        self._blocked_sorted = None
        self.messages = snap["messages"]
        self._last_time = snap["last_time"]
        self._uni = snap["unigram"]
        self._big = snap["bigram"]
        self._npairs = sum(len(r) for r in self._big.values())
        self._hist = {h: math.fsum(r.values()) for h, r in self._big.items()}
        self._spelling = snap["spelling"]
        self._total = math.fsum(self._uni.values())
        self._reindex()


class _FileLock:
    """``fcntl.flock`` exclusive on a held descriptor, as a context manager."""

    __slots__ = ("fd",)

    def __init__(self, fd: int) -> None:
        self.fd = fd

    def __enter__(self) -> None:
        fcntl.flock(self.fd, fcntl.LOCK_EX)

    def __exit__(self, *exc: object) -> None:
        fcntl.flock(self.fd, fcntl.LOCK_UN)


def _same_file(a: os.stat_result, b: os.stat_result) -> bool:
    return a.st_ino == b.st_ino and a.st_dev == b.st_dev


def _remove_orphans(directory: str, base_name: str) -> None:
    """Delete temp files a killed writer of this layer left (call only under the layer's lock).

    ``atomic_write`` names them ``.<target>.<8 random chars>.tmp``; every writer of the
    snapshot or journal holds the lock, so while we hold it none of them is in use.
    """
    names = [re.escape(base_name), re.escape(base_name + JOURNAL_SUFFIX)]
    pattern = re.compile(rf"\.(?:{'|'.join(names)})\.[A-Za-z0-9_]{{8}}\.tmp")
    try:
        entries = os.listdir(directory)
    except OSError:
        return
    for entry in entries:
        if pattern.fullmatch(entry):
            try:
                os.unlink(os.path.join(directory, entry))
            except OSError:
                pass


def _learn_record(message: str, when: float | None) -> Record:
    """A learn as the counts it bumps: sorted (history, word, times) and spellings, no text or order."""
    times: dict[tuple[str, str], int] = {}
    set_spelling: dict[str, str] = {}
    default_spelling: dict[str, str] = {}
    for sent in sentences(message):
        prev = BOS
        for i, tok in enumerate([*sent, EOS]):
            if tok is None:
                key = UNK
            elif tok == EOS:  # no word contains "<": this is the end marker
                key = EOS
            else:
                key = fold(tok)
                if len(tok) > MAX_WORD_CHARS or not _is_word_key(key):  # too long, or its folded form is unstable
                    key = UNK
                elif i > 0:
                    set_spelling[key] = tok  # the last mid-sentence spelling wins
                elif key not in default_spelling:
                    default_spelling[key] = tok  # a capitalised sentence start only fills a gap
            times[(prev, key)] = times.get((prev, key), 0) + 1
            prev = key
    for key in set_spelling:
        default_spelling.pop(key, None)
    return {
        "op": "learn",
        "when": when,
        "pairs": [[h, w, n] for (h, w), n in sorted(times.items())],
        "set": dict(sorted(set_spelling.items())),
        "default": dict(sorted(default_spelling.items())),
    }


def _packed_snapshot(payload: dict[str, Any]) -> bytes:
    body: bytes = msgpack.packb(payload, use_bin_type=True)
    if len(body) > _MAX_PAYLOAD:  # never write a file the reader would refuse
        raise InvalidArgumentError(f"the layer needs {len(body)} bytes, more than a layer file may hold ({_MAX_PAYLOAD}): lower max_entries")
    return body


def _journal_header(snapshot_id: int) -> bytes:
    head = struct.pack("<8sHHQ", JOURNAL_MAGIC, 1, 0, snapshot_id)
    return head + struct.pack("<I", zlib.crc32(head))


def _journal_id(head: bytes, name: str) -> int:
    """The snapshot id a journal extends (-1 when its header is missing or damaged: stale)."""
    if len(head) < _JHEADER.size:
        return -1
    magic, major, _minor, snapshot_id, crc = _JHEADER.unpack(head)
    if magic != JOURNAL_MAGIC or zlib.crc32(head[:20]) != crc:
        return -1
    if major != 1:
        raise ModelFormatError(f"{name}: unsupported journal version {major}")
    return int(snapshot_id)


def _parse_records(data: bytes, name: str, offset: int) -> tuple[list[Record], int]:
    """The complete, CRC-valid records at the start of ``data`` and the bytes they span.

    A record cut short or failing its CRC ends the list (a write torn by a crash); a
    record whose CRC matches but whose content is malformed raises ModelFormatError.
    """
    out: list[Record] = []
    at = 0
    while at + _RECORD.size <= len(data):
        length, crc = _RECORD.unpack_from(data, at)
        if length > _MAX_RECORD or at + _RECORD.size + length > len(data):
            break
        body = data[at + _RECORD.size : at + _RECORD.size + length]
        if zlib.crc32(body) != crc:
            break
        out.append(_check_record(body, f"{name} at byte {offset + at}"))
        at += _RECORD.size + length
    return out, at


def _check_record(body: bytes, where: str) -> Record:
    try:
        rec = msgpack.unpackb(body, raw=False, strict_map_key=True, use_list=True, **_UNPACK_LIMITS)
    except (ValueError, TypeError, msgpack.UnpackException) as e:
        raise ModelFormatError(f"{where}: damaged journal record: {e}") from None

    def bad(what: str) -> ModelFormatError:
        return ModelFormatError(f"{where}: damaged journal record: {what}")

    if not isinstance(rec, dict) or rec.get("op") not in _OPS:
        raise bad("not a change record")
    op = rec["op"]
    if op == "clear":
        if set(rec) != {"op"}:
            raise bad("unexpected fields")
        return rec
    if op in ("forget", "block", "unblock"):
        if set(rec) != {"op", "key"} or not _is_word_key(rec["key"]):
            raise bad(f"bad {op} record")
        return rec
    if set(rec) != {"op", "when", "pairs", "set", "default"}:
        raise bad("bad learn record fields")
    when = rec["when"]
    if when is not None and (isinstance(when, bool) or not isinstance(when, (int, float)) or not math.isfinite(when)):
        raise bad(f"bad time {when!r}")
    pairs = rec["pairs"]
    if not isinstance(pairs, list):
        raise bad("pairs is not a list")
    words: set[str] = set()
    for p in pairs:
        if not (isinstance(p, list) and len(p) == 3):
            raise bad("a pair is not [history, word, times]")
        h, w, n = p
        if not (h in (BOS, UNK) or _is_word_key(h)) or not (w in (EOS, UNK) or _is_word_key(w)):
            raise bad(f"bad pair keys {h!r}, {w!r}")
        if isinstance(n, bool) or not isinstance(n, int) or not 1 <= n <= _MAX_TIMES:
            raise bad(f"bad repeat count {n!r}")
        words.add(w)
    for field in ("set", "default"):
        sp = rec[field]
        if not isinstance(sp, dict):
            raise bad(f"{field} is not a map")
        for key, tok in sp.items():
            if key not in words or key in (EOS, UNK) or not isinstance(tok, str) or len(tok) > MAX_WORD_CHARS or fold(tok) != key:
                raise bad(f"bad spelling {key!r} -> {tok!r}")
    return rec


def _read_snapshot(name: str) -> tuple[int, Any, int]:
    """Open, check and decode the snapshot: (open descriptor, decoded payload, file size)."""
    try:
        fd = os.open(name, os.O_RDONLY | os.O_CLOEXEC)
    except FileNotFoundError:
        raise LayerNotFoundError(f"{name}: cannot open personal layer: no such file") from None
    except OSError as e:
        raise ModelFormatError(f"{name}: cannot open personal layer: {e.strerror}") from None
    try:
        size = os.fstat(fd).st_size
        head = os.pread(fd, _HEADER.size, 0)
        if len(head) < _HEADER.size:
            raise ModelFormatError(f"{name}: not a personal layer file (only {len(head)} bytes)")
        magic, major, minor, length, crc = _HEADER.unpack(head)
        if magic != PERSONAL_MAGIC:
            raise ModelFormatError(f"{name}: not a personal layer file (bad magic bytes)")
        if major != 1:
            raise ModelFormatError(f"{name}: unsupported personal layer version {major}.{minor}")
        if length > _MAX_PAYLOAD:
            raise ModelFormatError(f"{name}: personal layer of {length} bytes is too large (at most {_MAX_PAYLOAD})")
        if size != _HEADER.size + length:
            raise ModelFormatError(f"{name}: personal layer is truncated or has trailing bytes")
        body = os.pread(fd, length, _HEADER.size)
        if len(body) != length:
            raise ModelFormatError(f"{name}: personal layer is truncated or has trailing bytes")
        if zlib.crc32(body) != crc:
            raise ModelFormatError(f"{name}: personal layer checksum mismatch (damaged file)")
        payload = _decode_snapshot(body, name)
    except OSError as e:
        os.close(fd)
        raise ModelFormatError(f"{name}: cannot read personal layer: {e.strerror}") from None
    except BaseException:
        os.close(fd)
        raise
    return fd, payload, size


_UNPACK_LIMITS: dict[str, int] = {
    "max_str_len": _MAX_STR_BYTES,
    "max_bin_len": _MAX_STR_BYTES,
    "max_array_len": MAX_BLOCKED,
    "max_map_len": MAX_ENTRIES_LIMIT,
    "max_ext_len": 0,
}
_CONTAINER_BYTES = frozenset([*range(0x80, 0xA0), 0xDC, 0xDD, 0xDE, 0xDF])  # msgpack fixmap, fixarray, array16/32, map16/32
_SNAPSHOT_FIELDS = frozenset(("settings", "snapshot_id", "last_time", "messages", "unigram", "bigram", "spelling", "blocklist"))


def _decode_snapshot(body: bytes, name: str) -> dict[str, Any]:
    """Decode a snapshot payload, counting entries as their map headers arrive.

    The work stays bounded by the entry cap: a map announcing more entries than the
    layer's ``max_entries`` (or :data:`MAX_ENTRIES_LIMIT` before the settings are read)
    is refused before any of its entries is decoded.
    """

    def bad(what: str) -> ModelFormatError:
        return ModelFormatError(f"{name}: damaged personal layer: {what}")

    u = msgpack.Unpacker(raw=False, strict_map_key=True, max_buffer_size=max(len(body), 1), **_UNPACK_LIMITS)
    u.feed(body)
    out: dict[str, Any] = {}
    limit, used = MAX_ENTRIES_LIMIT, 0

    def entries(m: int) -> None:
        nonlocal used
        used += m
        if used > limit:
            raise bad(f"more than {limit} entries (its max_entries)")

    def scalar() -> Any:
        """The next object, refused unread if it is an array or a map (no nesting where none belongs)."""
        at = u.tell()
        if at < len(body) and body[at] in _CONTAINER_BYTES:
            raise bad(f"a list or map at byte {at} where a number or string belongs")
        return u.unpack()

    def flat_map(m: int) -> dict[Any, Any]:
        return {scalar(): scalar() for _ in range(m)}

    try:
        for _ in range(u.read_map_header()):
            key = scalar()
            if key not in _SNAPSHOT_FIELDS or key in out:
                raise bad(f"unexpected or repeated field {key!r}")
            if key in ("unigram", "spelling"):
                m = u.read_map_header()
                if key == "unigram":
                    entries(m)
                elif m > limit:
                    raise bad(f"{m} spellings, more than {limit}")
                out[key] = flat_map(m)
            elif key == "bigram":
                rows: dict[Any, Any] = {}
                for _ in range(u.read_map_header()):
                    h = scalar()
                    r = u.read_map_header()
                    entries(r)
                    rows[h] = flat_map(r)
                out[key] = rows
            elif key == "settings":
                m = u.read_map_header()
                if m > len(_SETTINGS_KEYS):
                    raise bad(f"{m} settings, expected at most {len(_SETTINGS_KEYS)}")
                value = flat_map(m)
                out[key] = value
                cap = value.get("max_entries")
                if isinstance(cap, int) and not isinstance(cap, bool) and 16 <= cap < limit:
                    limit = cap
                    entries(0)
            elif key == "blocklist":
                out[key] = [scalar() for _ in range(u.read_array_header())]
            else:
                out[key] = scalar()
        if u.tell() != len(body):
            raise bad("trailing bytes after the payload")
    except ModelFormatError:
        raise
    except (ValueError, TypeError, msgpack.UnpackException) as e:
        raise bad(f"{type(e).__name__}: {e}") from None
    return out


def _check_snapshot(data: Any, name: str) -> dict[str, Any]:
    """Every field of a decoded snapshot checked for type and range; the values to install."""

    def bad(what: str) -> ModelFormatError:
        return ModelFormatError(f"{name}: damaged personal layer: {what}")

    if not isinstance(data, dict):
        raise bad("the payload is not a map")
    for field in ("settings", "messages", "unigram", "bigram", "spelling", "blocklist"):
        if field not in data:
            raise bad(f"missing field {field!r}")
    st = data["settings"]
    if not isinstance(st, dict):
        raise bad("settings is not a map")
    known = {"half_life_days": None, "max_entries": 65_536}  # absent from the oldest files
    try:
        settings = _check_settings(**{k: st[k] if k in st else known[k] for k in _SETTINGS_KEYS})
    except KeyError as e:
        raise bad(f"missing setting {e}") from None
    except InvalidArgumentError as e:
        raise bad(f"setting out of range: {e}") from None
    snapshot_id = data.get("snapshot_id", 0)
    if isinstance(snapshot_id, bool) or not isinstance(snapshot_id, int) or not 0 <= snapshot_id < 1 << 63:
        raise bad(f"bad snapshot_id {snapshot_id!r}")
    messages = data["messages"]
    if isinstance(messages, bool) or not isinstance(messages, int) or not 0 <= messages < 1 << 63:
        raise bad(f"messages must be an integer >= 0, got {messages!r}")
    last = data.get("last_time")
    if last is not None and (isinstance(last, bool) or not isinstance(last, (int, float)) or not math.isfinite(last)):
        raise bad(f"last_time must be a finite number or nil, got {last!r}")
    uni_in, big_in, sp_in, bl_in = data["unigram"], data["bigram"], data["spelling"], data["blocklist"]
    if not isinstance(uni_in, dict) or not isinstance(big_in, dict) or not isinstance(sp_in, dict):
        raise bad("unigram, bigram and spelling must be maps")
    if not isinstance(bl_in, list) or len(bl_in) > MAX_BLOCKED:
        raise bad(f"blocklist must be a list of at most {MAX_BLOCKED} words")
    entries = len(uni_in) + sum(len(r) if isinstance(r, dict) else 0 for r in big_in.values())
    if entries > settings["max_entries"]:
        raise bad(f"{entries} entries, more than its max_entries {settings['max_entries']}")
    uni: dict[str, float] = {}
    for key, value in uni_in.items():
        if not (key in (EOS, UNK) or _is_word_key(key)):
            raise bad(f"bad word key {key!r}")
        if not _is_count(value):
            raise bad(f"count of {key!r} must be a finite number >= 0, got {value!r}")
        uni[key] = float(value)
    big: dict[str, dict[str, float]] = {}
    for h, row in big_in.items():
        if not (h == BOS or h in uni) or h == EOS:
            raise bad(f"bad history key {h!r}")
        if not isinstance(row, dict) or not row:
            raise bad(f"successors of {h!r} must be a non-empty map")
        r: dict[str, float] = {}
        for w, value in row.items():
            if w not in uni:
                raise bad(f"pair {h!r} {w!r} names a word without a count")
            if not _is_count(value):
                raise bad(f"count of pair {h!r} {w!r} must be a finite number >= 0, got {value!r}")
            r[w] = float(value)
        big[h] = r
    spelling: dict[str, str] = {}
    for key, tok in sp_in.items():
        if key not in uni or key in (EOS, UNK) or not isinstance(tok, str) or len(tok) > MAX_WORD_CHARS or fold(tok) != key:
            raise bad(f"bad spelling {key!r} -> {tok!r}")
        spelling[key] = tok
    blocked: list[str] = []
    for w in bl_in:
        if not _is_word_key(w):
            raise bad(f"bad blocked word {w!r}")
        blocked.append(w)
    return {
        "settings": settings,
        "snapshot_id": snapshot_id,
        "messages": messages,
        "last_time": None if last is None else float(last),
        "unigram": uni,
        "bigram": big,
        "spelling": spelling,
        "blocklist": blocked,
    }
