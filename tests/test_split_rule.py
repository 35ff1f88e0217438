"""Every benchmark figure is measured on messages none of its models was trained on.

The benchmark corpus (bench/prepare_corpus.py) and the fortunes benchmarks (bench_eval,
bench_tune) are split separately; they once used two different hash rules, so the
fortunes held out by one were mostly training text of the other's 5M-word model. Here the
real preparation code runs on a small synthetic multi-source input laid out like Debian's
packages (gzip dictionaries, a fortunes folder with ``%`` separators) — no Debian package
needed — and the check is a plain set intersection by message (common practice for a
train/test leak check), for every figure each script lists in ``figure_files()``.
"""

from __future__ import annotations

import gzip
import os
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT / "bench"))

import bench_core  # noqa: E402
import bench_eval  # noqa: E402
import bench_mix  # noqa: E402
import bench_models  # noqa: E402
import bench_tune  # noqa: E402
import prepare_corpus  # noqa: E402

WORDS = "gear chain spoke rim hub pedal brake cable saddle valve tyre lever crank bolt".split()


def _message(source: str, i: int) -> str:
    # distinct, deterministic, at least four words (prepare_corpus drops shorter paragraphs)
    return f"{source} note {i} " + " ".join(WORDS[(i * 7 + j * 3) % len(WORDS)] for j in range(5))


@pytest.fixture(scope="module")
def sources(tmp_path_factory: pytest.TempPathFactory) -> tuple[dict[str, Path], Path, list[str]]:
    """Two gzip "dictionaries" and a fortunes folder; some messages occur in several sources."""
    root = tmp_path_factory.mktemp("sources")
    shared = [_message("shared", i) for i in range(300)]  # in a dictionary *and* in fortunes
    dicts = {}
    for name, n in (("alpha", 1500), ("beta", 700)):
        paras = [_message(name, i) for i in range(n)] + (shared if name == "alpha" else [])
        path = root / f"{name}.dict.dz"
        with gzip.open(path, "wt", encoding="utf-8") as f:
            f.write("\n\n".join(paras) + "\n")
        dicts[name] = path
    fortunes = root / "fortunes"
    fortunes.mkdir()
    items = [_message("fortune", i) for i in range(1200)] + shared
    for j, part in enumerate((items[::2], items[1::2])):
        (fortunes / f"set{j}").write_text("\n%\n".join(part) + "\n%\n", encoding="utf-8")
    (fortunes / "set0.dat").write_bytes(b"\0index, skipped")
    every = list(dict.fromkeys(m for _, m in prepare_corpus.messages(dicts=dicts, fortunes=fortunes)))
    return dicts, fortunes, every


@pytest.fixture(scope="module")
def prepared(sources: tuple[dict[str, Path], Path, list[str]], tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    dicts, fortunes, _ = sources
    root = tmp_path_factory.mktemp("bench")
    data, out = root / "data", root / "out" / "eval"
    prepare_corpus.prepare(data, dicts=dicts, fortunes=fortunes)
    bench_eval.split_fortunes(out, fortunes=fortunes)
    bench_mix.prepare(root / "out" / "mix", dicts=dicts, fortunes=fortunes)
    return data, out


def _lines(paths: list[Path]) -> set[str]:
    return {line for p in paths for line in p.read_text(encoding="utf-8").splitlines() if line}


def test_synthetic_input_is_read_from_every_source(sources: tuple[dict[str, Path], Path, list[str]]) -> None:
    dicts, fortunes, every = sources
    seen = {src for src, _ in prepare_corpus.messages(dicts=dicts, fortunes=fortunes)}
    assert seen == {"alpha", "beta", "fortunes"}
    assert len(every) == 1500 + 700 + 1200 + 300


def test_no_held_out_message_of_any_figure_is_training_text(prepared: tuple[Path, Path]) -> None:
    data, out = prepared
    figures = {**bench_core.figure_files(data), **bench_eval.figure_files(data, out), **bench_tune.figure_files(out),
               **bench_models.figure_files(data, out), **bench_mix.figure_files(out.parent / "mix")}
    assert len(figures) == 7
    for name, (train, held_out) in figures.items():
        train_msgs, held = _lines(train), _lines(held_out)
        assert train_msgs and held, name
        leaked = held & train_msgs
        assert not leaked, f"{name}: {len(leaked)} of {len(held)} held-out messages are training text, e.g. {sorted(leaked)[:2]}"


def test_the_5m_word_row_is_measured_on_unseen_fortunes(prepared: tuple[Path, Path]) -> None:
    # the figure that was contaminated: the fortunes held out by bench_eval, against the
    # 5M-word model's training text; with one rule at one share they are a subset of
    # prepare_corpus's held-out part
    data, out = prepared
    fortunes_test = _lines([out / "test.txt"])
    assert fortunes_test <= _lines([data / "test.txt"])
    assert not fortunes_test & _lines([data / "train.txt"])


def test_tune_halves_partition_the_held_out_part(prepared: tuple[Path, Path]) -> None:
    _, out = prepared
    held = sorted(_lines([out / "test.txt"]))
    tune, final = bench_tune.halves(held)
    assert tune and final and not set(tune) & set(final)
    assert sorted(tune + final) == held


def test_prepare_corpus_splits_exactly_like_nextword_split(
    sources: tuple[dict[str, Path], Path, list[str]], prepared: tuple[Path, Path], tmp_path: Path
) -> None:
    _, _, every = sources
    data, _ = prepared
    corpus = tmp_path / "all.txt"
    corpus.write_text("\n".join(every) + "\n", encoding="utf-8")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run(
        [sys.executable, "-m", "nextword", "split", str(corpus), "--train-out", str(tmp_path / "train.txt"),
         "--test-out", str(tmp_path / "test.txt"), "--test-percent", str(prepare_corpus.TEST_PERCENT)],
        env=env, capture_output=True, text=True,
    )
    assert proc.returncode == 0, proc.stderr
    for part in ("train", "test"):
        ours = (data / f"{part}.txt").read_text(encoding="utf-8").splitlines()
        cli = (tmp_path / f"{part}.txt").read_text(encoding="utf-8").splitlines()
        assert ours == cli, part
    assert 0 < len(ours) < len(every)


def test_the_5m_word_row_is_left_out_for_a_model_of_another_split(prepared: tuple[Path, Path], tmp_path: Path) -> None:
    import nextword

    data, out = prepared
    split = prepare_corpus.split_of(data)
    assert split == {"test_percent": prepare_corpus.TEST_PERCENT,
                     "train_messages": len((data / "train.txt").read_text(encoding="utf-8").splitlines())}
    core = tmp_path / "core.nwm"
    nextword.train(data / "train.txt", core, min_count=1)
    assert bench_eval.core_matches_split(core, data, prepare_corpus.TEST_PERCENT)
    assert not bench_eval.core_matches_split(core, data, 10)  # the fortunes split at another share
    other = tmp_path / "other.nwm"
    nextword.train(out / "train.txt", other, min_count=1)  # not the prepared training text
    assert not bench_eval.core_matches_split(other, data, prepare_corpus.TEST_PERCENT)
