"""The build layer: corpus → counts of order n → estimator fit → optional prune → model file.

Everything that *writes* a model lives here, apart from the read-only query layer
(:mod:`nextword.model`), which never imports this module: a keyboard process that only
answers queries loads neither the counting nor the pruning code. ``train`` reads files
(:mod:`nextword.corpus`), counts them (:mod:`nextword.counts`, in worker processes for
large inputs), fits the chosen estimator, prunes to a size budget if asked
(:mod:`nextword.prune`) and writes the file atomically (:mod:`nextword.store`).
"""

from __future__ import annotations

import os
import time
from dataclasses import dataclass
from typing import Iterable

import numpy as np

from ._progress import DEFAULT_TICK, Progress
from .corpus import Format, iter_messages, open_sources
from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, CountBuilder, CountTables, auto_workers, count_in_processes
from .errors import InputDataError, InvalidArgumentError
from .model import Model, check_lam, load
from .ngrams import NgramCounts
from .prune import DEFAULT_RULE
from .store import DEFAULT_SKYBAND_K, DEFAULT_SKYBAND_MIN, MAX_LAMBDA, write_model

__all__ = ["TrainReport", "train", "train_texts", "write_same_smoothing_bigram", "tables_like", "DEFAULT_LAMBDA", "SMOOTHINGS", "TRAIN_ORDERS"]

#: Weight of the bigram estimate; a value near 0.9 is the usual starting point (common practice).
DEFAULT_LAMBDA = 0.9


@dataclass(frozen=True, slots=True)
class TrainReport:
    """What :func:`train` did: sizes, corpus statistics and timings."""

    path: str
    n_words: int
    n_bigrams: int
    word_tokens: int
    messages: int
    file_bytes: int
    count_seconds: float
    build_seconds: float
    n_trigrams: int = 0  # stored trigrams (order-3 models)

    @property
    def words_per_second(self) -> float:
        total = self.count_seconds + self.build_seconds
        return self.word_tokens / total if total > 0 else 0.0


#: smoothing methods ``train`` offers: Jelinek-Mercer interpolation, interpolated modified Kneser-Ney
SMOOTHINGS = ("jm", "kn")
#: n-gram orders ``train`` offers (2 = one-word context, 3 = two-word context)
TRAIN_ORDERS = (2, 3)


def _check_kind(order: int, smoothing: str, lam: float | None, max_bytes: int | None) -> None:
    if isinstance(order, bool) or order not in TRAIN_ORDERS:
        raise InvalidArgumentError(f"order must be one of {', '.join(map(str, TRAIN_ORDERS))}, got {order!r}")
    if smoothing not in SMOOTHINGS:
        raise InvalidArgumentError(f"smoothing must be one of {', '.join(SMOOTHINGS)}, got {smoothing!r}")
    if smoothing == "kn" and lam is not None:
        raise InvalidArgumentError(f"lam={lam!r} given with Kneser-Ney smoothing, which has no λ (its discounts are fitted)")


def _check_quantize(quantize: int | None) -> None:
    from .codecs import QUANT_BITS

    if quantize is not None and (isinstance(quantize, bool) or quantize not in QUANT_BITS):
        raise InvalidArgumentError(f"quantize must be one of {', '.join(map(str, QUANT_BITS))} bits (or None), got {quantize!r}")


def _finish(
    builder: CountBuilder,
    output_path: str | os.PathLike[str],
    *,
    lam: float,
    min_count: int,
    max_vocab: int,
    skyband_k: int,
    skyband_min: int,
    t0: float,
    max_bytes: int | None = None,
    prune_rule: str = DEFAULT_RULE,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
    quantize: int | None = None,
    compact: bool = False,
) -> TrainReport:
    from .codecs import codec_for_bits

    codec = codec_for_bits(quantize, ones=compact)  # a compact file elides the ones too (quant version 2)
    t1 = time.perf_counter()
    general = order != 2 or smoothing != "jm" or quantize is not None or compact
    if general:
        tables, counts = builder.ngram_counts(min_count=min_count, max_vocab=max_vocab)
    else:
        tables = builder.tables(min_count=min_count, max_vocab=max_vocab)
    if tables.stats["word_tokens"] == 0:
        raise InputDataError("the input holds no words")
    if general:
        from .estimators import JelinekMercer, KneserNey
        from .store import build

        estimator = KneserNey() if smoothing == "kn" else JelinekMercer((lam, lam3))
        if max_bytes is None:
            build(counts, tables, estimator, output_path, skyband_k=skyband_k, skyband_min=skyband_min, codec=codec,
                  compact=compact)
            n_bigrams = len(tables.pair_count)
        else:  # every estimator and order: nextword.prune chooses the n-grams (and words) that fit
            from .prune import write_to_size

            tables, n_bigrams = write_to_size(counts, tables, estimator, max_bytes, output_path, rule=prune_rule,  # type: ignore[arg-type]
                                              skyband_k=skyband_k, skyband_min=skyband_min, quantize=quantize,
                                              compact=compact)
    elif max_bytes is None:
        write_model(tables, output_path, lam=lam, skyband_k=skyband_k, skyband_min=skyband_min)
    else:
        from .prune import prune_to_size
        from .store import atomic_write

        tables, chunks, _ = prune_to_size(
            tables, max_bytes, rule=prune_rule, lam=lam, skyband_k=skyband_k, skyband_min=skyband_min  # type: ignore[arg-type]
        )
        atomic_write(output_path, chunks)
    t2 = time.perf_counter()
    n_trigrams = 0
    if order == 3:  # what the file stores (pruning may have dropped some): its header says
        with load(output_path) as written:
            n_trigrams = int(written.header().get("trigrams", 0))
    return TrainReport(
        path=os.fspath(output_path),
        n_words=tables.n_words,
        n_bigrams=n_bigrams if general else len(tables.pair_count),
        word_tokens=tables.stats["word_tokens"],
        messages=tables.stats["messages"],
        file_bytes=os.path.getsize(output_path),
        count_seconds=t1 - t0,
        build_seconds=t2 - t1,
        n_trigrams=n_trigrams,
    )


def _check_build_args(lam: float, skyband_k: int, skyband_min: int) -> float:
    lam = check_lam(lam)
    if lam > MAX_LAMBDA:
        raise InvalidArgumentError(
            f"a stored λ must be at most {MAX_LAMBDA} (λ = 1 gives every unseen pair probability 0), got {lam!r}; "
            "queries may still pass lam=1.0"
        )
    if isinstance(skyband_k, bool) or not isinstance(skyband_k, int) or not 1 <= skyband_k <= 4096:
        raise InvalidArgumentError(f"skyband_k must be an integer in [1, 4096], got {skyband_k!r}")
    if isinstance(skyband_min, bool) or not isinstance(skyband_min, int) or skyband_min < 0:
        raise InvalidArgumentError(f"skyband_min must be an integer >= 0, got {skyband_min!r}")
    return lam


def train(
    inputs: str | os.PathLike[str] | Iterable[str | os.PathLike[str]],
    output_path: str | os.PathLike[str],
    *,
    lam: float | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    max_vocab: int = DEFAULT_MAX_VOCAB,
    fmt: Format = "auto",
    field: str = "text",
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    progress: bool | None = None,
    max_bytes: int | None = None,
    prune_rule: str = DEFAULT_RULE,
    workers: int | None = None,
    memory_cap: int | None = None,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
    quantize: int | None = None,
    compact: bool = False,
) -> TrainReport:
    """Count the messages in ``inputs`` and write a model file to ``output_path``.

    ``inputs`` is a path or a list of paths (``"-"`` = standard input): plain text with
    one message per line, or JSON Lines with a ``field`` holding the message, optionally
    gzip-compressed. Each input is read exactly once. The file is written atomically.
    ``max_bytes`` prunes n-grams (``prune_rule`` "entropy" or "count"; every estimator and
    order) until the file fits, and whole words where they are worth less per byte (a
    dropped word becomes ``<unk>``; no count is lost, see :mod:`nextword.prune`). ``workers`` > 1 counts
    chunks of messages in that many processes (0 = one per core) and merges the partial
    counts; the file is byte for byte the one a single process writes. The default
    (``None``) picks the fastest: one per core for inputs of at least
    :data:`~nextword.counts.PARALLEL_MIN_BYTES`, else one (:func:`~nextword.counts.auto_workers`). ``memory_cap``
    (bytes) bounds the pair counts held in memory by spilling sorted runs to a temporary
    directory (see :class:`~nextword.counts.CountBuilder`).
    ``skyband_k`` and ``skyband_min`` trade file size for query speed (see
    docs/FORMAT.md); the defaults suit keyboards.
    ``order`` 3 conditions on the last two words of the sentence; ``smoothing`` "kn"
    (interpolated modified Kneser-Ney, discounts fitted, no λ) replaces Jelinek-Mercer
    ("jm", λ = ``lam`` for the bigram level, default 0.9, and ``lam3`` for the trigram
    level). Both are counted in the same streaming pass (:class:`~nextword.counts.CountBuilder` of that order).
    ``quantize`` (bits: 2, 4 or 8) stores the n-gram values as codes into a codebook fitted
    per level (:class:`~nextword.codecs.QuantCodec`, format 1.5): a smaller file whose
    probabilities are the quantised model's own, still summing to 1 per context, and
    whose top k is still exact for them (docs/SEAMS.md). ``None`` keeps the exact values.
    ``compact`` codes the successor lists by chunked Elias-Fano (format 1.6,
    docs/FORMAT.md §7.18): the same model and answers in about a third fewer bytes, each
    successor read costing a chunk decode instead of an array read.
    """
    _check_kind(order, smoothing, lam, max_bytes)
    _check_quantize(quantize)
    lam = _check_build_args(DEFAULT_LAMBDA if lam is None else lam, skyband_k, skyband_min)
    lam3 = _check_build_args(lam3, skyband_k, skyband_min)
    sources = open_sources(inputs, fmt=fmt, field=field)
    from .paths import check_outputs

    check_outputs([("corpus", s.name) for s in sources if s.name != "-"], [("model", output_path)])
    t0 = time.perf_counter()
    if workers is None:
        workers = auto_workers(s.name for s in sources)
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 0:
        raise InvalidArgumentError(f"workers must be an integer >= 0, got {workers!r}")
    workers = workers or (os.cpu_count() or 1)
    # no ticker thread when worker processes are forked (a thread at fork time risks a deadlock)
    bar = Progress("train", stages=2, enabled=progress, tick=None if workers > 1 else DEFAULT_TICK)
    try:
        bar.stage("counting", unit="B")  # total: the input files' sizes (compressed bytes for gzip)
        messages = iter_messages(sources, progress=bar.update)
        if workers == 1:
            builder = CountBuilder(memory_cap=memory_cap, order=order)
            builder.add_texts(messages)
        else:
            builder = count_in_processes(messages, workers, memory_cap=memory_cap, order=order)
        bar.stage("building the model file" if max_bytes is None else f"building and pruning to {max_bytes:,} bytes")
        return _finish(
            builder, output_path, lam=lam, min_count=min_count, max_vocab=max_vocab,
            skyband_k=skyband_k, skyband_min=skyband_min, t0=t0, max_bytes=max_bytes, prune_rule=prune_rule,
            order=order, smoothing=smoothing, lam3=lam3, quantize=quantize, compact=compact,
        )
    finally:
        bar.done()  # also on errors: the error message then starts on a clean line


def train_texts(
    texts: Iterable[str],
    output_path: str | os.PathLike[str],
    *,
    lam: float | None = None,
    min_count: int = DEFAULT_MIN_COUNT,
    max_vocab: int = DEFAULT_MAX_VOCAB,
    skyband_k: int = DEFAULT_SKYBAND_K,
    skyband_min: int = DEFAULT_SKYBAND_MIN,
    order: int = 2,
    smoothing: str = "jm",
    lam3: float = DEFAULT_LAMBDA,
    quantize: int | None = None,
    compact: bool = False,
) -> TrainReport:
    """Like :func:`train`, but from messages already in memory (consumed once)."""
    _check_kind(order, smoothing, lam, None)
    _check_quantize(quantize)
    lam = _check_build_args(DEFAULT_LAMBDA if lam is None else lam, skyband_k, skyband_min)
    lam3 = _check_build_args(lam3, skyband_k, skyband_min)
    if isinstance(texts, str):
        raise InvalidArgumentError("train_texts() takes an iterable of messages, not one string")
    t0 = time.perf_counter()
    builder = CountBuilder(order=order)
    builder.add_texts(texts)
    return _finish(
        builder, output_path, lam=lam, min_count=min_count, max_vocab=max_vocab,
        skyband_k=skyband_k, skyband_min=skyband_min, t0=t0,
        order=order, smoothing=smoothing, lam3=lam3, quantize=quantize, compact=compact,
    )


def write_same_smoothing_bigram(model: Model, path: str | os.PathLike[str]) -> str:
    """Write the bigram model of ``model``'s smoothing on the same counts; returns how it was made.

    For a Jelinek-Mercer trigram: the Jelinek-Mercer bigram with the λ the trigram's queries
    use for the bigram level (λ2, or a load-time override). For a Kneser-Ney trigram: the
    Kneser-Ney bigram of the raw counts (:func:`raw_bigram_counts`), its discounts fitted
    from their count-of-counts as ``train --order 2 --smoothing kn`` does. Same words, same
    ids' keys and spellings, same skyband settings. Refuses a bigram file (it is its own
    bigram) and its own path.
    """
    from .baselines import raw_bigram_counts
    from .estimators import JelinekMercer, KneserNey
    from .paths import check_new_output
    from .store import build

    check_new_output(model.path, path, "bigram baseline model")
    counts = raw_bigram_counts(model)
    tables = tables_like(model, counts)
    head = model.header()
    if model.estimator == "kn":
        estimator: JelinekMercer | KneserNey = KneserNey()
        how = "Kneser-Ney bigram of the same counts (raw bigram counts summed from the trigrams; discounts fitted)"
    else:
        lam2 = model.query_lambdas()[0]
        estimator = JelinekMercer([lam2])
        how = f"Jelinek-Mercer bigram of the same counts with the model's λ2 = {lam2:g}"
    build(counts, tables, estimator, path, skyband_k=head["skyband_k"], skyband_min=head["skyband_min"])
    return how


def tables_like(model: Model, counts: NgramCounts) -> CountTables:
    """The vocabulary of ``model`` (keys, spellings, statistics) with the unigram and bigram counts of ``counts``.

    What rebuilding a file from counts recovered out of it needs (the same words in the same
    ids, so the rebuilt file's word order and spellings are the model's).
    """
    n = model.n_words
    uni = np.zeros(n + 2, dtype=np.int64)
    uni[counts.grams[0][:, 0]] = counts.counts[0]
    g2 = counts.grams[1]
    return CountTables(
        keys=model.word_keys(), displays=[model.display(i) for i in range(n)], unigram=uni,
        pair_left=g2[:, 0].copy(), pair_right=g2[:, 1].copy(), pair_count=counts.counts[1].copy(), stats=dict(model.stats),
    )
