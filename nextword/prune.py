"""Fitting a size budget by dropping the least valuable word pairs.

Unigrams are never removed, only pairs. After pruning, a history's count c(v) becomes the
sum of its kept pairs (stored in the optional HIST section, format 1.2), so
P(w | v) = λ·c(v,w)/c(v) + (1−λ)·c(w)/N still sums to 1 over the vocabulary: the mass of
the dropped pairs flows back to the kept ones and to the unigram part.

Two rules decide which pairs go first:

* ``count`` — the simple cutoff: the pairs seen least often;
* ``entropy`` — the pairs whose removal changes the model least, by the relative-entropy
  criterion of Stolcke ("Entropy-based pruning of backoff language models", 1998):
  P(v) · D(P(·|v) ‖ P'(·|v)), P(v) = c(v)/N, where P' is this model with the pair
  removed — computed exactly, including the renormalisation of the history's other
  pairs over the smaller c(v) (see :func:`_entropy_scores`). As in the paper, each pair
  is scored alone and the lowest scores are removed together.

Measured figures: bench/RESULTS.md, "Size budget".
"""

from __future__ import annotations

import re
from typing import Literal

import numpy as np

from .counts import CountTables
from .errors import InvalidArgumentError
from .model import Model
from .store import build_sections, encode_sections, history_counts

__all__ = ["RULES", "parse_size", "tables_from_model", "prune_tables", "pair_scores", "prune_to_size", "vocabulary_bytes"]

RULES = ("entropy", "count")
Rule = Literal["entropy", "count"]
_UNITS = {"": 1, "b": 1, "kb": 1000, "k": 1000, "mb": 10**6, "m": 10**6, "gb": 10**9, "g": 10**9,
          "kib": 1024, "mib": 1024**2, "gib": 1024**3}


def parse_size(text: str) -> int:
    """'4MB' → 4,000,000; '1.5MiB' → 1,572,864; a plain number is bytes."""
    m = re.fullmatch(r"\s*([0-9]*\.?[0-9]+)\s*([a-zA-Z]*)\s*", text)
    if not m or m.group(2).lower() not in _UNITS:
        raise InvalidArgumentError(f"cannot read a size from {text!r} (examples: 4MB, 1.5MiB, 250000)")
    return int(float(m.group(1)) * _UNITS[m.group(2).lower()])


def tables_from_model(model: Model) -> CountTables:
    """The counts a model file holds, as :class:`CountTables` (to prune an existing model)."""
    a = model._src.arrays
    n = model.n_words
    rows = np.asarray(a["ROWS"], dtype=np.int64)
    left = np.repeat(np.arange(n + 3), np.diff(rows))
    right = np.asarray(a["ALPH"], dtype=np.int64)[np.asarray(a["SUCC"], dtype=np.int64)]
    counts = model._counts(np.arange(int(rows[-1])))
    order = np.lexsort((right, left))
    return CountTables(
        keys=[model._key(i) for i in range(n)],
        displays=[model.display(i) for i in range(n)],
        unigram=np.asarray(a["UNIG"], dtype=np.int64),
        pair_left=left[order],
        pair_right=right[order],
        pair_count=counts[order],
        stats=dict(model.stats),
        history=None if "HIST" not in a else np.asarray(a["HIST"], dtype=np.int64),
    )


def _history(tables: CountTables) -> np.ndarray:
    if tables.history is not None:
        return tables.history
    return history_counts(tables.unigram, tables.n_words)


def pair_scores(tables: CountTables, rule: Rule, lam: float) -> np.ndarray:
    """Value of every pair; the smallest go first."""
    if rule == "count":
        return tables.pair_count.astype(np.float64)
    if rule != "entropy":
        raise InvalidArgumentError(f"unknown pruning rule {rule!r}; expected one of {RULES}")
    return _entropy_scores(tables, float(lam))


#: bound on the (pair × distinct count) expansion held at once by the entropy scores
_EXPANSION = 1 << 22


def _entropy_scores(tables: CountTables, lam: float) -> np.ndarray:
    """P(v) · D(P(·|v) ‖ P'(·|v)) for every pair, where P' is the model without that pair.

    Removing (v, w_j) from a row with counts c_i and sum C sets c(v) to C' = C − c_j:
    w_j falls back to (1−λ)·u_j, every other kept successor rises by c_i·t with
    t = λ·c_j / (C·C'), and unseen words do not change (if the row empties, c(v) = 0
    and every outcome gets its unigram probability). So

        D = p_j·ln(p_j / p'_j) − Σ_{i≠j} p_i·ln(1 + c_i·t / p_i),

    and the sum depends on j only through t, i.e. through c_j: it is computed once per
    distinct count of each row (rows hold few distinct counts), which makes the exact
    relative entropy of Stolcke's criterion affordable without approximation.
    """
    n_hist = tables.n_words + 3
    left = np.asarray(tables.pair_left, dtype=np.int64)
    c = np.asarray(tables.pair_count, dtype=np.float64)
    if len(c) == 0:
        return np.zeros(0)
    total = float(tables.unigram.sum())
    row_sum = np.bincount(left, weights=c, minlength=n_hist)
    cv = row_sum[left]
    u = tables.unigram[np.asarray(tables.pair_right, dtype=np.int64)] / total
    p = lam * c / cv + (1.0 - lam) * u
    rows = np.concatenate([[0], np.cumsum(np.bincount(left, minlength=n_hist))])

    # one combination per (row, distinct count); pairs are sorted by row
    radix = int(c.max()) + 1
    combos, pair_combo = np.unique(left * radix + c.astype(np.int64), return_inverse=True)
    combo_row = combos // radix
    combo_c = (combos % radix).astype(np.float64)
    combo_cv = row_sum[combo_row]
    rest = combo_cv - combo_c
    with np.errstate(divide="ignore", invalid="ignore"):
        combo_t = np.where(rest > 0, lam * combo_c / (combo_cv * np.where(rest > 0, rest, 1.0)), 0.0)
    row_len = (rows[1:] - rows[:-1])[combo_row]
    combo_f = np.zeros(len(combos))
    reach = np.concatenate([[0], np.cumsum(row_len)])  # expansion before each combination
    start = 0
    while start < len(combos):  # F(t) = Σ_i p_i·ln(1 + c_i·t/p_i) over the whole row, in bounded chunks
        # the most combinations from start whose rows expand to at most _EXPANSION (at least one)
        stop = max(start + 1, int(np.searchsorted(reach, reach[start] + _EXPANSION, side="right")) - 1)
        lens = row_len[start:stop]
        ends = np.cumsum(lens)
        idx = np.arange(int(ends[-1])) + np.repeat(rows[combo_row[start:stop]] - (ends - lens), lens)
        t = np.repeat(combo_t[start:stop], lens)
        vals = p[idx] * np.log1p(c[idx] * t / p[idx])
        combo_f[start:stop] = np.add.reduceat(vals, np.concatenate([[0], ends[:-1]]))
        start = stop

    t = combo_t[pair_combo]
    emptied = (cv - c) <= 0
    with np.errstate(divide="ignore", invalid="ignore"):
        fallback = np.where(emptied, u, (1.0 - lam) * u)
        own = p * np.log(p / fallback)
        others = np.where(emptied, 0.0, -(combo_f[pair_combo] - p * np.log1p(c * t / p)))
        # an emptied row also moves every unseen word from (1−λ)·u to u
        unseen = (1.0 - lam) * np.log(1.0 - lam) * (1.0 - u) if lam < 1.0 else np.zeros_like(u)
        kl = own + others + np.where(emptied, unseen, 0.0)
    kl = np.where(np.isnan(kl), np.inf, kl)
    return (cv / total) * np.maximum(kl, 0.0)


def prune_tables(tables: CountTables, keep: np.ndarray) -> CountTables:
    """The same counts with only the pairs where ``keep`` is true; c(v) = kept row sums."""
    left = tables.pair_left[keep]
    counts = tables.pair_count[keep]
    hist = np.bincount(left, weights=counts, minlength=tables.n_words + 3).astype(np.int64)
    return CountTables(
        keys=tables.keys,
        displays=tables.displays,
        unigram=tables.unigram,
        pair_left=left,
        pair_right=tables.pair_right[keep],
        pair_count=counts,
        stats=dict(tables.stats),
        history=hist,
    )


def _size(tables: CountTables, lam: float, **build: int) -> tuple[int, list[bytes | memoryview]]:
    chunks = encode_sections(build_sections(tables, lam=lam, **build), minor=2)
    return sum(len(c) for c in chunks), chunks


def vocabulary_bytes(tables: CountTables, *, lam: float = 0.9, **build: int) -> int:
    """Size of the file with every pair pruned: the smallest budget these counts can meet."""
    return _size(prune_tables(tables, np.zeros(len(tables.pair_count), dtype=bool)), lam, **build)[0]


def prune_to_size(
    tables: CountTables, max_bytes: int, *, rule: Rule = "entropy", lam: float = 0.9, **build: int
) -> tuple[CountTables, list[bytes | memoryview], dict[str, float]]:
    """Keep the most valuable pairs that fit ``max_bytes``; returns (tables, file chunks, info).

    The file size is measured, not estimated: candidate sizes come from a linear fit of
    bytes against kept pairs, then the count is lowered until the encoded file fits.
    """
    order = np.argsort(-pair_scores(tables, rule, lam), kind="stable")  # most valuable first
    total_pairs = len(order)

    def build_with(k: int) -> tuple[CountTables, int, list[bytes | memoryview]]:
        keep = np.zeros(total_pairs, dtype=bool)
        keep[order[:k]] = True
        pruned = prune_tables(tables, keep)
        size, chunks = _size(pruned, lam, **build)
        return pruned, size, chunks

    empty, base_size, _ = build_with(0)
    if base_size > max_bytes:
        raise InvalidArgumentError(
            f"a budget of {max_bytes:,} bytes is below the vocabulary alone ({base_size:,} bytes); lower max_vocab"
        )
    full, full_size, chunks = build_with(total_pairs)
    if full_size <= max_bytes:
        return full, chunks, {"kept": total_pairs, "removed": 0, "bytes": full_size}
    per_pair = (full_size - base_size) / max(total_pairs, 1)
    k = int((max_bytes - base_size) / per_pair)
    for _ in range(60):
        pruned, size, chunks = build_with(k)
        if size <= max_bytes:
            return pruned, chunks, {"kept": k, "removed": total_pairs - k, "bytes": size}
        k = max(0, min(k - 1, int(k - (size - max_bytes) / per_pair * 1.02) - 1))
    raise InvalidArgumentError(f"could not fit {max_bytes:,} bytes")  # pragma: no cover - k reaches 0 first
