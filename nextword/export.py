"""Export to the ARPA back-off format, the n-gram trade's standard text format.

An interpolated bigram model is exactly a back-off model with these entries:

* every seen pair (v, w): log10 P(w | v) = log10(λ·c(v,w)/c(v) + (1−λ)·c(w)/N);
* every unigram w (words, ``</s>``, ``<unk>``): log10 c(w)/N, with back-off weight
  log10(1 − λ) when w is a history, so that an unseen pair gets (1 − λ)·P(w);
* ``<s>`` is never predicted: probability −99 (the format's convention for log 0),
  back-off weight log10(1 − λ).

With λ by history count, each history's back-off weight uses its own λ. Words are
written as their case-folded keys (unique, never containing spaces). Probabilities are
written with 10 decimals, so they read back within about 1e-10 relative.
"""

from __future__ import annotations

import gzip
import math
import os
from typing import Iterator

import numpy as np

from .model import Model
from .store import atomic_write
from .text import BOS, EOS, UNK

__all__ = ["write_arpa", "arpa_lines"]


def _log10(p: float) -> str:
    return f"{math.log10(p):.10f}" if p > 0 else "-99"


def arpa_lines(model: Model, *, lam: float | None = None) -> Iterator[str]:
    """The ARPA text of ``model``, line by line (``lam`` overrides the stored λ)."""
    n = model.n_words
    total = model.total
    keys = [model._key(i) for i in range(n)] + [EOS, UNK, BOS]
    rows = np.asarray(model._src.arrays["ROWS"], dtype=np.int64)
    unig = np.asarray(model._unig, dtype=np.int64)
    n_bigrams = int(rows[-1])
    yield "\\data\\"
    yield f"ngram 1={n + 3}"
    yield f"ngram 2={n_bigrams}"
    yield ""
    yield "\\1-grams:"
    for i in range(n + 3):
        if i == n + 2:
            prob = "-99"
        else:
            prob = _log10(unig[i] / total)
        cv = model._hist(i)
        if i == n:  # </s> is never a history
            yield f"{prob}\t{keys[i]}"
            continue
        lam_v = model._lam_of(i, lam)
        bow = _log10(1.0 - lam_v) if cv > 0 else "0"
        yield f"{prob}\t{keys[i]}\t{bow}"
    yield ""
    yield "\\2-grams:"
    for v in range(n + 3):
        s, e = int(rows[v]), int(rows[v + 1])
        if s == e:
            continue
        cv = model._hist(v)
        lam_v = model._lam_of(v, lam)
        ids = np.asarray(model._alph, dtype=np.int64)[np.asarray(model._succ[s:e], dtype=np.int64)]
        counts = model._counts(np.arange(s, e))
        probs = lam_v * (counts / cv) + (1.0 - lam_v) * (unig[ids] / total)
        hv = keys[v]
        for w, p in zip(ids.tolist(), probs.tolist()):
            yield f"{_log10(p)}\t{hv} {keys[w]}"
    yield ""
    yield "\\end\\"


def write_arpa(model: Model, path: str | os.PathLike[str], *, lam: float | None = None) -> None:
    """Write the ARPA file atomically; a name ending in ``.gz`` is gzip-compressed."""
    data = ("\n".join(arpa_lines(model, lam=lam)) + "\n").encode("utf-8")
    if os.fspath(path).endswith(".gz"):
        data = gzip.compress(data, mtime=0)
    atomic_write(path, [data])
