"""The default number of counting processes: the fastest setting, and the same file.

``workers=None`` (the library and CLI default) counts in one process per core when the
input is large enough to pay for the processes (``PARALLEL_MIN_BYTES``) and in one
process below it. Either way the model file must be byte for byte the single-process one
(the oracle: ``--workers 1``, the path every other test checks against brute force).
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pytest

import nextword
import nextword.counts
import nextword.build
from nextword.cli import main
from nextword.counts import PARALLEL_MIN_BYTES, auto_workers


@pytest.fixture()
def corpus(tmp_path: Path) -> Path:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines()]
    path = tmp_path / "c.txt"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


@pytest.fixture()
def spy(monkeypatch: pytest.MonkeyPatch) -> list[int]:
    """Records the worker count of every multi-process count."""
    calls: list[int] = []
    real = nextword.build.count_in_processes

    def wrapped(messages: Any, workers: int, **kwargs: Any) -> Any:
        calls.append(workers)
        return real(messages, workers, **kwargs)

    monkeypatch.setattr(nextword.build, "count_in_processes", wrapped)
    return calls


def test_auto_workers_by_input_size(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(os, "cpu_count", lambda: 4)
    small = tmp_path / "small.txt"
    small.write_bytes(b"x" * 1000)
    assert auto_workers([str(small)]) == 1
    big = tmp_path / "big.txt"
    with open(big, "wb") as f:
        f.truncate(PARALLEL_MIN_BYTES - 1000)  # sparse: size without writing
    assert auto_workers([str(big)]) == 1
    assert auto_workers([str(big), str(small)]) == 4  # the inputs together reach the threshold
    assert auto_workers(["-"]) == 4  # unknown size: a pipe is usually a large dump


def test_default_equals_one_process_byte_for_byte(
    corpus: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch, spy: list[int]
) -> None:
    monkeypatch.setattr(os, "cpu_count", lambda: 2)
    monkeypatch.setattr(nextword.counts, "PARALLEL_MIN_BYTES", corpus.stat().st_size)  # this corpus counts as large
    monkeypatch.setattr(nextword.counts, "_BATCH_CHARS", 5000)  # many batches per worker
    one, default = tmp_path / "one.nwm", tmp_path / "default.nwm"
    assert main(["train", str(corpus), "-o", str(one), "--min-count", "1", "--workers", "1"]) == 0
    assert spy == []
    assert main(["train", str(corpus), "-o", str(default), "--min-count", "1"]) == 0
    assert spy == [2]  # the default took the multi-process path
    assert default.read_bytes() == one.read_bytes()
    # the library default too, and with a size budget (pruning after counting)
    lib = tmp_path / "lib.nwm"
    nextword.train(corpus, lib, min_count=1)
    assert lib.read_bytes() == one.read_bytes()
    budget = (one.stat().st_size * 3) // 4
    p1, pd = tmp_path / "p1.nwm", tmp_path / "pd.nwm"
    assert main(["train", str(corpus), "-o", str(p1), "--min-count", "1", "--workers", "1", "--max-size", str(budget)]) == 0
    assert main(["train", str(corpus), "-o", str(pd), "--min-count", "1", "--max-size", str(budget)]) == 0
    assert spy == [2, 2, 2]
    assert pd.read_bytes() == p1.read_bytes() and p1.stat().st_size <= budget


def test_small_inputs_stay_in_one_process(corpus: Path, tmp_path: Path, spy: list[int]) -> None:
    assert corpus.stat().st_size < PARALLEL_MIN_BYTES
    out = tmp_path / "m.nwm"
    assert main(["train", str(corpus), "-o", str(out), "--min-count", "1"]) == 0
    assert spy == []
    assert nextword.load(out).info()["vocabulary"] > 1000
