"""Commands over Kneser-Ney and order-3 model files: each works, or refuses in one line.

Tools that read a model's stored values as plain pair counts (pruning) must not silently mis-read a Kneser-Ney or trigram file (its stored
values are continuation counts and trigram rows); eval must run on every kind. Corpus:
CPython's ``pydoc_data.topics`` (real English shipped with Python).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

import nextword

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


def _cli(*args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=ENV)


@pytest.fixture(scope="module")
def files(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:30] for ln in topics[k].splitlines() if ln.strip()]
    tmp = tmp_path_factory.mktemp("kinds")
    (tmp / "held.txt").write_text("\n".join(lines[::10]) + "\n", encoding="utf-8")
    nextword.train_texts([ln for i, ln in enumerate(lines) if i % 10], tmp / "kn3.nwm", order=3, smoothing="kn", min_count=1)
    return tmp / "kn3.nwm", tmp / "held.txt"


# (export and prune read every kind: tests/test_export_models.py, tests/test_prune_ngram.py)


def test_eval_runs_on_a_kneser_ney_trigram_with_baselines(files: tuple[Path, Path]) -> None:
    model, held = files
    r = _cli("eval", str(model), str(held), "-k", "3", "--json")
    assert r.returncode == 0, r.stderr
    data = json.loads(r.stdout)
    # the same keystroke savings as the library's simulation of the same log
    from nextword.evaluate import evaluate

    msgs = [m for m in held.read_text(encoding="utf-8").splitlines() if m.strip()]
    overall, _ = evaluate(nextword.load(model), [("held", msgs)], (3,))
    assert data["overall"]["per_k"][0]["ksr"] == overall.per_k[3].ksr
    assert "lambda" not in data["baselines"]  # λ baselines exist only for Jelinek-Mercer


def test_train_reports_the_trigrams_it_stored(files: tuple[Path, Path], tmp_path: Path) -> None:
    # the report counts what the file stores (its header), also after pruning to a budget
    _, held = files
    for extra in ([], ["--max-size", "40KB"]):
        out = tmp_path / f"t{len(extra)}.nwm"
        r = _cli("train", str(held), "-o", str(out), "--order", "3", "--smoothing", "kn", "--json", *extra)
        assert r.returncode == 0, r.stderr
        data = json.loads(r.stdout)
        with nextword.load(out) as m:
            head = m.header()
        assert data["trigrams"] == head["trigrams"] > 0
        assert data["bytes_per_ngram"] == data["file_bytes"] / (data["bigrams"] + data["trigrams"])
        text = _cli("train", str(held), "-o", str(tmp_path / "again.nwm"), "--order", "3", "--smoothing", "kn", *extra)
        assert f"{head['trigrams']:,} trigrams" in text.stdout and "bytes/n-gram" in text.stdout
