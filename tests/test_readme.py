"""The README stays true: its examples run, its commands work, CI runs its test command."""

from __future__ import annotations

import os
import re
import shlex
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
README = (ROOT / "README.md").read_text(encoding="utf-8")


def _blocks(lang: str) -> list[str]:
    return re.findall(rf"```{lang}\n(.*?)```", README, flags=re.S)


def test_ci_runs_exactly_the_readme_test_command() -> None:
    test_cmd = next(b.strip() for b in _blocks("sh") if "'.[test]'" in b)
    ci = (ROOT / ".ci" / "run").read_text()
    assert test_cmd in ci.splitlines()


@pytest.fixture()
def in_tmp_with_examples(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    (tmp_path / "examples").symlink_to(ROOT / "examples")
    monkeypatch.chdir(tmp_path)
    return tmp_path


def test_python_examples_run(in_tmp_with_examples: Path, capsys: pytest.CaptureFixture[str]) -> None:
    blocks = _blocks("python")
    assert blocks
    for code in blocks:
        exec(compile(code, "README.md", "exec"), {"__name__": "__readme__"})
    out = capsys.readouterr().out
    assert "workshop" in out and "truing" in out


def _cli(args: list[str], cwd: Path) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "nextword", *args], cwd=cwd, env=env, capture_output=True, text=True)


def test_demo_command_prints_what_the_readme_shows(in_tmp_with_examples: Path) -> None:
    demo = next(b.strip() for b in _blocks("sh") if "nextword train" in b)
    steps = [s.strip() for s in demo.split("&&") if ".venv/bin/nextword" in s]
    outputs = []
    for step in steps:
        args = shlex.split(step)[1:]
        proc = _cli(args, in_tmp_with_examples)
        assert proc.returncode == 0, proc.stderr
        outputs.append(proc.stdout)
    shown = next(b for b in _blocks("text") if "wrote demo.nwm" in b)
    strip_timing = lambda s: re.sub(r"\s+\[\d+ µs\]|\d[\d,.]* (ms|s)\b.*", "", s).rstrip()  # noqa: E731
    want = [strip_timing(line) for line in shown.splitlines() if line.startswith('"')]
    got = [strip_timing(line) for line in outputs[-1].splitlines() if line.startswith('"')]
    assert [re.sub(r"\s+->", " ->", g) for g in got] == [re.sub(r"\s+->", " ->", w) for w in want]
    assert shown.splitlines()[0].split(";")[0] == outputs[0].splitlines()[0].split(";")[0]


def test_walkthrough_runs_end_to_end(in_tmp_with_examples: Path) -> None:
    # the "From corpus to shipped file" block, step by step, on the demo corpus
    block = next(b for b in _blocks("sh") if "nextword split" in b and "--tune-out" in b)
    steps = [shlex.split(line) for line in block.strip().splitlines()]
    assert [s[1] for s in steps] == ["split", "train", "eval", "tune", "prune", "prune", "eval", "info"]
    for args in steps:
        proc = _cli(args[1:], in_tmp_with_examples)
        assert proc.returncode == 0, (args, proc.stderr)
    for made in ("train.txt", "tune.txt", "test.txt", "demo.nwm", "tuned.nwm", "ship.nwm", "report/report.md", "tune-report/tune.md"):
        assert (in_tmp_with_examples / made).exists(), made
    assert (in_tmp_with_examples / "ship.nwm").stat().st_size <= 16_000


def test_trigram_tune_example_runs(in_tmp_with_examples: Path) -> None:
    # the "On the command line" block of "λ per order", after the walk-through's split
    split = next(b for b in _blocks("sh") if "nextword split" in b and "--tune-out" in b).strip().splitlines()[0]
    block = next(b for b in _blocks("sh") if "tri-tuned.nwm" in b)
    steps = [shlex.split(split)] + [shlex.split(line) for line in block.strip().splitlines()]
    assert [s[1] for s in steps] == ["split", "train", "tune", "eval", "export"]
    for args in steps:
        proc = _cli(args[1:], in_tmp_with_examples)
        assert proc.returncode == 0, (args, proc.stderr)
    import nextword

    tuned = nextword.load(in_tmp_with_examples / "tri-tuned.nwm")
    assert tuned.order == 3 and tuned.query_lambdas() != [0.9, 0.9]
    for made in ("tri-report/tune.md", "tri.arpa.gz"):
        assert (in_tmp_with_examples / made).exists(), made
