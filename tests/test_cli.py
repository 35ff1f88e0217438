"""The command line: results, JSON output, input formats, and one-line errors with exit codes."""

from __future__ import annotations

import gzip
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

import nextword

ROOT = Path(__file__).resolve().parent.parent
MSGS = ["See you at the workshop.", "See you at the ride!", "Thanks for fixing the brakes", "see you soon"]


def run(*args: str, stdin: str | None = None, cwd: Path | None = None) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run(
        [sys.executable, "-m", "nextword", *args], input=stdin, capture_output=True, text=True, env=env, cwd=cwd
    )


@pytest.fixture()
def corpus(tmp_path: Path) -> Path:
    p = tmp_path / "msgs.txt"
    p.write_text("\n".join(MSGS) + "\n", encoding="utf-8")
    return p


def test_train_suggest_info_round_trip(tmp_path: Path, corpus: Path) -> None:
    model = tmp_path / "m.nwm"
    r = run("train", str(corpus), "-o", str(model), "--min-count", "1", "--json")
    assert r.returncode == 0, r.stderr
    report = json.loads(r.stdout)
    assert report["vocabulary"] == 11 and report["messages"] == 4  # see you at the workshop ride thanks for fixing brakes soon
    r = run("suggest", str(model), "see you at the ", "-k", "2", "--json")
    data = json.loads(r.stdout)
    # after "the": workshop 1, ride 1, brakes 1 -> tie on bigram; unigram c = 1 each -> by key
    assert [s["word"] for s in data["results"][0]["suggestions"]] == ["brakes", "ride"]
    r = run("info", str(model), "--json", "--verify")
    info = json.loads(r.stdout)
    assert info["vocabulary"] == 11 and info["verified"] is True and info["lambda"] == 0.9


def test_suggest_reads_texts_from_stdin(tmp_path: Path, corpus: Path) -> None:
    model = tmp_path / "m.nwm"
    nextword.train(corpus, model, min_count=1)
    r = run("suggest", str(model), "-k", "1", stdin="see you at the work\nThanks for f\n")
    assert r.returncode == 0
    lines = r.stdout.splitlines()
    assert "workshop" in lines[0] and "fixing" in lines[1]


def test_jsonl_gzip_and_stdin_inputs_give_the_same_model(tmp_path: Path, corpus: Path) -> None:
    plain = tmp_path / "plain.nwm"
    assert run("train", str(corpus), "-o", str(plain), "--min-count", "1").returncode == 0
    jl = tmp_path / "log.jsonl.gz"
    with gzip.open(jl, "wt", encoding="utf-8") as f:
        for m in MSGS:
            f.write(json.dumps({"text": m, "user": "u1", "ts": 1}) + "\n")
    from_jsonl = tmp_path / "jsonl.nwm"
    assert run("train", str(jl), "-o", str(from_jsonl), "--min-count", "1").returncode == 0
    from_stdin = tmp_path / "stdin.nwm"
    r = run("train", "-", "-o", str(from_stdin), "--min-count", "1", stdin="\n".join(MSGS) + "\n")
    assert r.returncode == 0, r.stderr
    assert plain.read_bytes() == from_jsonl.read_bytes() == from_stdin.read_bytes()


@pytest.mark.parametrize(
    ("args", "code", "needle"),
    [
        (["suggest", "MODEL", "x", "-k", "0"], 2, "-k: expected a whole number >= 1, got 0"),
        (["suggest", "MODEL", "x", "--lam", "1.5"], 2, "--lam: λ must be in [0, 1], got 1.5"),
        (["train", "CORPUS", "-o", "OUT", "--lam", "abc"], 2, "'abc'"),
        (["frobnicate"], 2, "invalid choice: 'frobnicate'"),
        (["train", "CORPUS"], 2, "-o/--output"),
        (["suggest", "missing.nwm", "x"], 1, "missing.nwm: cannot open model"),
        (["train", "nope.txt", "-o", "OUT"], 1, "nope.txt: no such file"),
        (["info", "CORPUS"], 1, "not a nextword model"),
        (["train", "BADJSON", "-o", "OUT"], 1, "bad.jsonl:2: not valid JSON"),
        (["train", "CORPUS", "-o", "OUT", "--min-count", "50"], 2, "vocabulary is empty"),
        (["live", "MODEL"], 2, "live needs a terminal"),
    ],
)
def test_errors_are_one_line_with_exit_status(tmp_path: Path, corpus: Path, args: list[str], code: int, needle: str) -> None:
    model = tmp_path / "m.nwm"
    nextword.train(corpus, model, min_count=1)
    bad = tmp_path / "bad.jsonl"
    bad.write_text('{"text": "fine"}\n{"text": oops}\n')
    subst = {"MODEL": str(model), "CORPUS": str(corpus), "OUT": str(tmp_path / "o.nwm"), "BADJSON": str(bad)}
    r = run(*[subst.get(a, a) for a in args], cwd=tmp_path, stdin="")
    assert r.returncode == code, (r.stdout, r.stderr)
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nextword: error: "), r.stderr
    assert needle in lines[0]
    assert "Traceback" not in r.stderr
    assert not (tmp_path / "o.nwm").exists()  # nothing half-written


def test_failed_training_leaves_existing_model_untouched(tmp_path: Path, corpus: Path) -> None:
    model = tmp_path / "m.nwm"
    nextword.train(corpus, model, min_count=1)
    before = model.read_bytes()
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"fine line\n\xff\xfe not utf-8\n")
    r = run("train", str(bad), "-o", str(model))
    assert r.returncode == 1 and "bad.txt:2: not UTF-8" in r.stderr
    assert model.read_bytes() == before
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".m.nwm")] == []


def test_suggest_time_reports_microseconds(tmp_path: Path, corpus: Path) -> None:
    model = tmp_path / "m.nwm"
    nextword.train(corpus, model, min_count=1)
    r = run("suggest", str(model), "see ", "--time", "--json")
    data = json.loads(r.stdout)
    assert data["results"][0]["microseconds"] > 0 and data["load_milliseconds"] > 0


def test_progress_shows_only_on_a_terminal(tmp_path: Path, corpus: Path) -> None:
    import io

    from nextword._progress import Progress

    class Tty(io.StringIO):
        def isatty(self) -> bool:
            return True

    tty, pipe = Tty(), io.StringIO()
    for stream in (tty, pipe):
        bar = Progress("counting", stream=stream)
        bar.update(50, 100)
        bar.done("done")
    assert "counting: 50/100  50.0%" in tty.getvalue()
    assert pipe.getvalue() == ""
    # the CLI's stderr is a pipe here: no progress noise, only the result on stdout
    r = run("train", str(corpus), "-o", str(tmp_path / "m.nwm"), "--min-count", "1")
    assert r.returncode == 0 and r.stderr == ""
