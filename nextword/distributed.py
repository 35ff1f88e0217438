"""Counting on Dask: one task per input file, partial counts merged by a tree reduction.

The partial counts are the same mergeable :class:`~nextword.counts.CountBuilder` objects
the local worker processes produce, so a model counted on a cluster is byte for byte the
one a single process writes. Dask is an optional dependency (``pip install
'nextword[dask]'``); point ``client`` at a real cluster with
``distributed.Client("tcp://scheduler:8786")`` — every worker must be able to read the
input paths (a shared file system or object-store paths your workers mount).
"""

from __future__ import annotations

import os
from typing import Any, Sequence

from .corpus import Format, iter_messages, open_sources
from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, DEFAULT_ORDER, CountBuilder
from .errors import InvalidArgumentError
from .store import DEFAULT_SKYBAND_K, DEFAULT_SKYBAND_MIN, write_model

__all__ = ["count_on_dask", "train_on_dask"]


def _count_file(path: str, fmt: str, field: str, order: int = DEFAULT_ORDER) -> CountBuilder:
    builder = CountBuilder(order=order)
    builder.add_texts(iter_messages(open_sources(path, fmt=fmt, field=field)))  # type: ignore[arg-type]
    builder._flush()
    return builder


def _merge(a: CountBuilder, b: CountBuilder) -> CountBuilder:
    a.merge(b)
    return a


def count_on_dask(
    paths: Sequence[str | os.PathLike[str]],
    *,
    client: Any = None,
    fmt: Format = "auto",
    field: str = "text",
    order: int = DEFAULT_ORDER,
) -> CountBuilder:
    """Count every file as its own Dask task and merge the partial counts in file order.

    ``order`` as in :class:`~nextword.counts.CountBuilder` (3: word triples too, see
    :meth:`~nextword.counts.CountBuilder.ngram_counts`).
    """
    try:
        import dask
    except ImportError:
        raise InvalidArgumentError("counting on Dask needs dask: pip install 'nextword[dask]'") from None
    names = [os.fspath(p) for p in paths]
    if not names:
        raise InvalidArgumentError("no inputs given")
    CountBuilder(order=order)  # check the order before any work starts
    open_sources(names, fmt=fmt, field=field)  # report missing files before any work starts
    parts = [dask.delayed(_count_file)(name, fmt, field, order) for name in names]
    while len(parts) > 1:  # pairwise, keeping file order so the result is deterministic
        parts = [dask.delayed(_merge)(parts[i], parts[i + 1]) if i + 1 < len(parts) else parts[i]
                 for i in range(0, len(parts), 2)]
    if client is not None:
        return client.compute(parts[0]).result()  # type: ignore[no-any-return]
    return parts[0].compute()  # type: ignore[no-any-return]


def train_on_dask(
    paths: Sequence[str | os.PathLike[str]],
    output_path: str | os.PathLike[str],
    *,
    client: Any = None,
    lam: float = 0.9,
    min_count: int = DEFAULT_MIN_COUNT,
    max_vocab: int = DEFAULT_MAX_VOCAB,
    fmt: Format = "auto",
    field: str = "text",
) -> None:
    """:func:`nextword.train` with the counting done on Dask; writes the same file."""
    builder = count_on_dask(paths, client=client, fmt=fmt, field=field)
    tables = builder.tables(min_count=min_count, max_vocab=max_vocab)
    write_model(tables, output_path, lam=lam, skyband_k=DEFAULT_SKYBAND_K, skyband_min=DEFAULT_SKYBAND_MIN)
