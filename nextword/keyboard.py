"""Keyboard geometry and the touch model: where keys are, and how a finger misses them.

Typing on a touch screen is noisy: a tap meant for one key sometimes lands on a
neighbour. Two parts of nextword need the same picture of that noise:

* the noisy typist of the keystroke simulation (:mod:`nextword.evaluate`) *draws* taps
  from it: a tap that misses lands where a 2-D Gaussian around the intended key's centre
  puts it (the touch model of Goodman et al., "Language modeling for soft keyboards",
  AAAI 2002), on the key whose centre is nearest;
* typo-tolerant completion (:class:`nextword.candidates.NearMiss`) *scores* readings of a
  typed prefix with it: :class:`Channel` gives P(typed | intended) up to a common factor.

Geometry is data: a layout is a small JSON file (``nextword/layouts/*.json``, format
below), so another layout needs no code. Units are key pitches: neighbouring keys of a row
are 1.0 apart, rows are 1.0 apart, and each row starts ``x`` pitches to the right of the
left edge (QWERTY's usual stagger: 0, 0.25, 0.75 — common practice).

Layout file (``"format": "nextword-layout"``, ``"version": 1``)::

    {"format": "nextword-layout", "version": 1, "name": "qwerty",
     "description": "free text",
     "rows": [{"keys": "qwertyuiop", "x": 0.0, "y": 0.0}, ...]}

``keys`` is the row's letters left to right (each one character, already in folded
lower case, each at most once in the file); key ``i`` of a row has its centre at
(x + i, y). Only these letters are subject to touch errors; every other character
(digits, apostrophes, hyphens, letters the layout lacks) is typed exactly.
"""

from __future__ import annotations

import json
import math
import os
from dataclasses import dataclass, field
from importlib import resources
from typing import Any

import numpy as np

from .errors import InputDataError, InvalidArgumentError
from .text import fold

__all__ = [
    "LAYOUTS",
    "DEFAULT_SIGMA",
    "DEFAULT_TYPO_RATE",
    "DEFAULT_FLOOR",
    "Layout",
    "Channel",
    "load_layout",
    "parse_layout",
    "sample_miss",
    "sample_extra",
]

#: the layouts shipped in ``nextword/layouts`` (load them by name)
LAYOUTS: tuple[str, ...] = ("qwerty", "azerty", "qwertz")

#: standard deviation of a tap around the key centre, in key pitches. Half a key is the
#: order of magnitude of the touch spreads reported for phone keyboards (from memory);
#: it only shapes *which* neighbour a miss hits, the miss rate is set separately.
DEFAULT_SIGMA = 0.5

#: the substitution rate the typing channel assumes unless told (:meth:`Channel.from_rate`;
#: omissions, insertions and swaps at a tenth of it). Deliberately far below the slip
#: rates a typist really has: it is the weight of the typed letters against the language
#: model, chosen on a tune split of the fortunes held out from both the model and the
#: benchmark's test part (bench/bench_typo.py --tune): at 0.002 the error-free typist loses
#: about 0.1 point of KSR@3 and a typist with 5% slips gets back over 60% of what the slips
#: cost; larger values recover no more and cost more at 0% (docs in bench/RESULTS.md).
DEFAULT_TYPO_RATE = 0.002

#: the lowest relative weight a reading may have (see :class:`Channel`)
DEFAULT_FLOOR = 1e-6

_FORMAT = "nextword-layout"
_VERSION = 1


@dataclass(frozen=True)
class Layout:
    """Letter key centres of one keyboard layout (key pitches, y grows downwards)."""

    name: str
    centres: dict[str, tuple[float, float]]
    letters: str = field(init=False)
    _xy: np.ndarray = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "letters", "".join(self.centres))
        object.__setattr__(self, "_xy", np.array([self.centres[c] for c in self.letters], dtype=np.float64))

    def __hash__(self) -> int:
        return hash((self.name, tuple(self.centres.items())))

    def distance(self, a: str, b: str) -> float:
        """Euclidean distance between the centres of keys ``a`` and ``b`` (key pitches)."""
        for c in (a, b):
            if c not in self.centres:
                raise InvalidArgumentError(f"key {c!r} is not on layout {self.name!r}")
        (ax, ay), (bx, by) = self.centres[a], self.centres[b]
        return math.hypot(ax - bx, ay - by)

    def nearest(self, x: float, y: float) -> str:
        """The key whose centre is nearest to the point (x, y) (ties: the earlier key in the file)."""
        d = (self._xy[:, 0] - x) ** 2 + (self._xy[:, 1] - y) ** 2
        return self.letters[int(np.argmin(d))]

    def centre_array(self) -> np.ndarray:
        """The centres as an (n, 2) array in the order of :attr:`letters` (a copy)."""
        return self._xy.copy()


def parse_layout(data: Any, *, where: str = "layout") -> Layout:
    """A :class:`Layout` from decoded JSON; :class:`InputDataError` naming the bad field otherwise."""
    if not isinstance(data, dict):
        raise InputDataError(f"{where}: a layout is a JSON object, got {type(data).__name__}")
    if data.get("format") != _FORMAT:
        raise InputDataError(f"{where}: format must be {_FORMAT!r}, got {data.get('format')!r}")
    if data.get("version") != _VERSION:
        raise InputDataError(f"{where}: unsupported layout version {data.get('version')!r} (this reader knows {_VERSION})")
    name = data.get("name")
    if not isinstance(name, str) or not name:
        raise InputDataError(f"{where}: name must be a non-empty string, got {name!r}")
    rows = data.get("rows")
    if not isinstance(rows, list) or not rows:
        raise InputDataError(f"{where}: rows must be a non-empty list, got {rows!r}")
    centres: dict[str, tuple[float, float]] = {}
    for i, row in enumerate(rows):
        if not isinstance(row, dict):
            raise InputDataError(f"{where}: rows[{i}] must be an object, got {row!r}")
        keys, x, y = row.get("keys"), row.get("x"), row.get("y")
        if not isinstance(keys, str) or not keys:
            raise InputDataError(f"{where}: rows[{i}].keys must be a non-empty string, got {keys!r}")
        for nm, v in (("x", x), ("y", y)):
            if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or abs(v) > 1000:
                raise InputDataError(f"{where}: rows[{i}].{nm} must be a finite number, got {v!r}")
        for j, c in enumerate(keys):
            if fold(c) != c or not c.isalpha():
                raise InputDataError(f"{where}: rows[{i}].keys holds {c!r}, not a folded lower-case letter")
            if c in centres:
                raise InputDataError(f"{where}: key {c!r} appears twice")
            centres[c] = (float(x) + j, float(y))  # type: ignore[arg-type]
    return Layout(name, centres)


def load_layout(layout: str | os.PathLike[str]) -> Layout:
    """A shipped layout by name (one of :data:`LAYOUTS`) or a layout JSON file by path."""
    if isinstance(layout, str) and layout in LAYOUTS:
        text = resources.files("nextword").joinpath("layouts").joinpath(f"{layout}.json").read_text(encoding="utf-8")
        return parse_layout(json.loads(text), where=f"layout {layout!r}")
    if not isinstance(layout, (str, os.PathLike)):
        raise InvalidArgumentError(f"layout must be a name or a path, got {type(layout).__name__}")
    path = os.fspath(layout)
    if not os.path.exists(path):
        raise InvalidArgumentError(f"layout {path!r} is neither a shipped layout {LAYOUTS} nor an existing file")
    try:
        with open(path, encoding="utf-8") as f:
            data = json.load(f)
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as e:
        raise InputDataError(f"{path}: cannot read layout: {e}") from None
    return parse_layout(data, where=path)


def sample_miss(layout: Layout, letter: str, rng: np.random.Generator, *, sigma: float = DEFAULT_SIGMA) -> str:
    """A tap meant for ``letter`` that missed: a point from a 2-D Gaussian around the key's
    centre, read as the nearest key, drawn again until it is another key.

    After 64 draws that all land on the intended key (a tiny ``sigma``) the nearest other
    key is taken, so the call always ends.
    """
    cx, cy = layout.centres[letter]
    for _ in range(64):
        dx, dy = rng.normal(0.0, sigma, 2)
        hit = layout.nearest(cx + dx, cy + dy)
        if hit != letter:
            return hit
    others = [(layout.distance(letter, c), c) for c in layout.letters if c != letter]
    return min(others)[1]


def sample_extra(layout: Layout, letter: str, rng: np.random.Generator, *, sigma: float = DEFAULT_SIGMA) -> str:
    """A spurious extra tap after ``letter``: the nearest key to a Gaussian point around it
    (the same key again counts: a double tap)."""
    cx, cy = layout.centres[letter]
    dx, dy = rng.normal(0.0, sigma, 2)
    return layout.nearest(cx + dx, cy + dy)


def _rate(name: str, v: float) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not math.isfinite(v) or not 0.0 <= v < 0.5:
        raise InvalidArgumentError(f"{name} must be a number in [0, 0.5), got {v!r}")
    return float(v)


class Channel:
    """The typing channel P(typed | intended), up to a common factor, for ranking readings.

    Per intended letter the typist taps it correctly (probability c), taps another key
    instead (``substitution``, spread over the other keys ∝ exp(−d²/2σ²) of the key distance
    d), leaves it out (``omission``), taps an extra key after it (``insertion``, spread the
    same way over all keys, itself included: a double tap; a spurious first tap is spread
    evenly) or swaps it with the next letter (``transposition``); c = 1 − the four rates.
    Only layout letters take part in substitutions and insertions.

    The score of reading typed ``q`` as intended ``p`` is the best alignment's product of
    *relative* operation weights (each operation's probability divided by c per typed
    letter it consumes: a match 1, a substitution s·w/c, an omission o, an insertion n·w/c,
    a swap t/c²), i.e. P(q | p) / P(q | q) for the best alignment (the Viterbi reading, not
    the sum over alignments). The exact reading scores exactly 1.0, so with no likely typo
    the ranking is the plain one. Readings use at most ``max_edits`` operations other than
    matches and must score at least ``floor``: that bounds the search.

    The rates are the tunable weight of the channel against the language model: higher
    rates trust the typed letters less. :meth:`from_rate` sets them from one number.
    """

    def __init__(
        self,
        layout: Layout | None = None,
        *,
        substitution: float = DEFAULT_TYPO_RATE,
        omission: float = DEFAULT_TYPO_RATE / 10,
        insertion: float = DEFAULT_TYPO_RATE / 10,
        transposition: float = DEFAULT_TYPO_RATE / 10,
        sigma: float = DEFAULT_SIGMA,
        max_edits: int = 1,
        floor: float = DEFAULT_FLOOR,
    ) -> None:
        self.layout = load_layout("qwerty") if layout is None else layout
        if not isinstance(self.layout, Layout):
            raise InvalidArgumentError(f"layout must be a Layout, got {type(layout).__name__}")
        s, o = _rate("substitution", substitution), _rate("omission", omission)
        n, t = _rate("insertion", insertion), _rate("transposition", transposition)
        c = 1.0 - s - o - n - t
        if c <= 0.5:
            raise InvalidArgumentError(f"the error rates must sum to less than 0.5, got {1.0 - c!r}")
        if isinstance(sigma, bool) or not isinstance(sigma, (int, float)) or not 0.05 <= sigma <= 10:
            raise InvalidArgumentError(f"sigma must be a number in [0.05, 10] key pitches, got {sigma!r}")
        if isinstance(max_edits, bool) or not isinstance(max_edits, int) or not 0 <= max_edits <= 3:
            raise InvalidArgumentError(f"max_edits must be an integer in [0, 3], got {max_edits!r}")
        if isinstance(floor, bool) or not isinstance(floor, (int, float)) or not 0.0 < floor < 1.0:
            raise InvalidArgumentError(f"floor must be a number in (0, 1), got {floor!r}")
        self.rates = (s, o, n, t)
        self.sigma = float(sigma)
        self.max_edits = max_edits
        self.floor = float(floor)
        self.correct = c
        #: relative weights of an omission and a swap (the others depend on the keys)
        self.omit_weight = o
        self.swap_weight = t / (c * c)
        letters = self.layout.letters
        kernel = {
            (a, b): math.exp(-self.layout.distance(a, b) ** 2 / (2.0 * self.sigma**2)) for a in letters for b in letters
        }
        self._sub: dict[tuple[str, str], float] = {}
        self._ins: dict[tuple[str, str], float] = {}
        for a in letters:
            z_sub = sum(kernel[a, b] for b in letters if b != a)
            z_ins = sum(kernel[a, b] for b in letters)
            for b in letters:
                if b != a and z_sub > 0:
                    self._sub[a, b] = s * (kernel[a, b] / z_sub) / c
                self._ins[a, b] = n * (kernel[a, b] / z_ins) / c
        self._ins_first = n * (1.0 / len(letters)) / c
        #: for each typed letter, the intended letters that could have produced it by a
        #: substitution, best first: (intended, relative weight)
        self.sources: dict[str, tuple[tuple[str, float], ...]] = {
            b: tuple(sorted(((a, self._sub[a, b]) for a in letters if (a, b) in self._sub), key=lambda e: (-e[1], e[0])))
            for b in letters
        }
        if max(max(self._sub.values(), default=0.0), max(self._ins.values(), default=0.0), self.omit_weight,
               self.swap_weight, self._ins_first) >= 1.0:
            raise InvalidArgumentError("the error rates are too high: an edit would outweigh typing the letter right")
        self._key = (self.layout, self.rates, self.sigma, self.max_edits, self.floor)

    @classmethod
    def from_rate(cls, rate: float = DEFAULT_TYPO_RATE, layout: Layout | None = None, **knobs: Any) -> Channel:
        """A channel expecting letter substitutions at ``rate`` and the other slips at a tenth of it."""
        r = _rate("typo rate", rate)
        return cls(layout, substitution=r, omission=r / 10, insertion=r / 10, transposition=r / 10, **knobs)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, Channel) and self._key == other._key

    def __hash__(self) -> int:
        return hash(self._key)

    def __repr__(self) -> str:
        s, o, n, t = self.rates
        return (f"Channel({self.layout.name}, substitution={s}, omission={o}, insertion={n}, transposition={t}, "
                f"sigma={self.sigma}, max_edits={self.max_edits}, floor={self.floor})")

    def substitution_weight(self, intended: str, typed: str) -> float:
        """Relative weight of tapping ``typed`` for ``intended`` (0.0 off the layout or for the same key)."""
        return self._sub.get((intended, typed), 0.0)

    def insertion_weight(self, after: str | None, typed: str) -> float:
        """Relative weight of a spurious tap ``typed`` after intended letter ``after`` (None: at the start)."""
        if typed not in self.layout.centres:
            return 0.0
        if after is None or after not in self.layout.centres:
            return self._ins_first
        return self._ins[after, typed]

    def weight(self, typed: str, intended: str) -> float:
        """Score of reading folded ``typed`` as exactly the folded letters ``intended``.

        Dynamic programming over (typed letters used, intended letters used, edits used),
        keeping the best product per cell, the products formed left to right; 0.0 when no
        reading with at most ``max_edits`` edits scores ``floor`` or more. This is the
        reference the trie search of :class:`~nextword.candidates.NearMiss` is checked against.
        """
        m, L, E = len(typed), len(intended), self.max_edits
        best = [[[0.0] * (E + 1) for _ in range(L + 1)] for _ in range(m + 1)]
        best[0][0][0] = 1.0
        for a in range(m + 1):
            for b in range(L + 1):
                for e in range(E + 1):
                    w = best[a][b][e]
                    if w < self.floor:
                        continue
                    self._steps(typed, intended, a, b, e, w, best)
        top = max(best[m][L])
        return top if top >= self.floor else 0.0

    def _steps(self, q: str, p: str, a: int, b: int, e: int, w: float, best: list[list[list[float]]]) -> None:
        m, L = len(q), len(p)

        def put(a2: int, b2: int, e2: int, v: float) -> None:
            if v > best[a2][b2][e2]:
                best[a2][b2][e2] = v

        if a < m and b < L and q[a] == p[b]:
            put(a + 1, b + 1, e, w)
        if e == self.max_edits:
            return
        if a < m and b < L and q[a] != p[b]:
            r = self.substitution_weight(p[b], q[a])
            if r > 0:
                put(a + 1, b + 1, e + 1, w * r)
        if a < m:
            r = self.insertion_weight(p[b - 1] if b else None, q[a])
            if r > 0:
                put(a + 1, b, e + 1, w * r)
        if b < L and self.omit_weight > 0:
            put(a, b + 1, e + 1, w * self.omit_weight)
        if a + 1 < m and b + 1 < L and q[a] == p[b + 1] and q[a + 1] == p[b] and p[b] != p[b + 1] and self.swap_weight > 0:
            put(a + 2, b + 2, e + 1, w * self.swap_weight)

    def edit_count(self, typed: str, intended: str, *, transpositions: bool = True) -> int:
        """Fewest operations (substitution, omission, insertion, swap) turning ``intended`` into ``typed``.

        The same moves as :meth:`weight`, each costing 1 and allowed between any two
        characters, with no edit limit: the optimal string alignment distance (Levenshtein
        without swaps), which tests compare with general-purpose implementations.
        """
        m, L = len(typed), len(intended)
        INF = m + L + 1
        d = [[INF] * (L + 1) for _ in range(m + 1)]
        d[0][0] = 0
        for a in range(m + 1):
            for b in range(L + 1):
                v = d[a][b]
                if a < m and b < L:
                    d[a + 1][b + 1] = min(d[a + 1][b + 1], v + (typed[a] != intended[b]))
                if a < m:
                    d[a + 1][b] = min(d[a + 1][b], v + 1)
                if b < L:
                    d[a][b + 1] = min(d[a][b + 1], v + 1)
                if (transpositions and a + 1 < m and b + 1 < L and typed[a] == intended[b + 1] and typed[a + 1] == intended[b]
                        and intended[b] != intended[b + 1]):
                    d[a + 2][b + 2] = min(d[a + 2][b + 2], v + 1)
        return d[m][L]
