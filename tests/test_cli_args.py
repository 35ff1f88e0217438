"""Command-line arguments: sizes, empty logs, and options anywhere among the positionals.

Expected outcomes are the documented CLI contract (one line ``nextword: error: ...``,
exit 2 for usage and 1 for data, never a traceback) and argparse's own meaning of each
argument list (common practice: options may be given in any order).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

import nextword
from nextword.cli import main

ROOT = Path(__file__).resolve().parent.parent
# invented demo data (Harbor Lane Bike Workshop)
MSGS = [
    "See you at the workshop on Saturday",
    "Can someone bring the truing stand",
    "Thanks for fixing the brakes",
    "see you at the ride",
] * 3


@pytest.fixture()
def work(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    (tmp_path / "msgs.txt").write_text("\n".join(MSGS) + "\n", encoding="utf-8")
    nextword.train_texts(MSGS, tmp_path / "m.nwm", min_count=1)
    monkeypatch.chdir(tmp_path)
    return tmp_path


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=env, cwd=cwd)


NINES = "9" * 400


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["train", "msgs.txt", "-o", "x.nwm", "--max-size", NINES], "argument --max-size: size '999"),
        (["train", "msgs.txt", "-o", "x.nwm", "--memory-cap", NINES + "GB"], "argument --memory-cap: size '999"),
        (["prune", "m.nwm", "-o", "x.nwm", "--max-size", NINES], "argument --max-size: size '999"),
        (["prune", "m.nwm", "-o", "x.nwm", "--max-size", "2000000GB"], "is too large (at most 1,125,899,906,842,624 bytes"),
        (["prune", "m.nwm", "-o", "x.nwm", "--max-size", "0.1"], "size '0.1' is less than one byte"),
        (["prune", "m.nwm", "-o", "x.nwm", "--max-size", "0"], "size '0' is less than one byte"),
        (["prune", "m.nwm", "-o", "x.nwm", "--max-size", "4 parsecs"], "cannot read a size from '4 parsecs'"),
    ],
)
def test_absurd_sizes_are_one_line_usage_errors(work: Path, argv: list[str], needle: str) -> None:
    r = run(*argv, cwd=work)
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nextword: error: ") and needle in lines[0], r.stderr
    assert len(lines[0]) < 200  # the 400 digits are not echoed back in full
    assert not (work / "x.nwm").exists()


def test_a_sane_size_still_prunes(work: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["prune", "m.nwm", "-o", "small.nwm", "--max-size", "1MB", "--json"]) == 0
    info = json.loads(capsys.readouterr().out)
    assert info["output"] == "small.nwm" and info["bytes"] == (work / "small.nwm").stat().st_size <= 1_000_000


@pytest.mark.parametrize("content", ["", "\n\n  \n"])
def test_eval_on_an_empty_log_is_a_data_error_naming_the_file(work: Path, content: str) -> None:
    (work / "empty.txt").write_text(content)
    for logs in (["empty.txt"], ["msgs.txt", "empty.txt"]):
        r = run("eval", "m.nwm", *logs, "--no-baselines", "--json", cwd=work)
        assert r.returncode == 1, (r.stdout, r.stderr)
        assert r.stdout == ""
        assert r.stderr == "nextword: error: empty.txt: no messages to evaluate (the log is empty or blank)\n"


def test_eval_on_a_real_log_still_measures(work: Path, capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["eval", "m.nwm", "msgs.txt", "--no-baselines", "--json", "-k", "1"]) == 0
    data = json.loads(capsys.readouterr().out)
    assert data["overall"]["messages"] == len(MSGS) and data["overall"]["perplexity"] > 1


def suggestions(argv: list[str], capsys: pytest.CaptureFixture[str]) -> list[list[str]]:
    assert main(argv) == 0, capsys.readouterr().err
    return [[s["word"] for s in r["suggestions"]] for r in json.loads(capsys.readouterr().out)["results"]]


def test_options_may_come_between_and_after_positionals(work: Path, capsys: pytest.CaptureFixture[str]) -> None:
    first = suggestions(["suggest", "-k", "4", "--json", "m.nwm", "see you at the ", "Thanks for "], capsys)
    assert len(first[0]) == 4
    assert suggestions(["suggest", "m.nwm", "-k", "4", "see you at the ", "--json", "Thanks for "], capsys) == first
    assert suggestions(["suggest", "m.nwm", "see you at the ", "Thanks for ", "-k", "4", "--json"], capsys) == first
    assert suggestions(["suggest", "m.nwm", "--json", "-k", "4", "--", "see you at the ", "Thanks for "], capsys) == first
    # the same for commands with several positionals or files
    assert main(["train", "msgs.txt", "--min-count", "1", "-o", "a.nwm", "msgs.txt", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["messages"] == 2 * len(MSGS)
    assert main(["split", "msgs.txt", "--test-percent", "50", "msgs.txt", "--train-out", "tr.txt", "--json", "--test-out", "te.txt"]) == 0
    assert json.loads(capsys.readouterr().out)["messages"] == 2 * len(MSGS)
    assert main(["eval", "m.nwm", "--no-baselines", "msgs.txt", "-k", "1", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["overall"]["messages"] == len(MSGS)
    assert main(["personal", "me.nwp", "learn", "--model", "m.nwm", "Meet at Harbor Lane", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["learned"] == 1
    assert main(["export", "--arpa", "m.arpa", "m.nwm", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["output"] == "m.arpa"


def test_suggest_k_after_the_model_from_a_shell(work: Path) -> None:
    """The reported case, as typed in a shell: ``nextword suggest MODEL -k 5 "the "``."""
    r = run("suggest", "m.nwm", "-k", "5", "the ", cwd=work)
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith('"the "') and "->" in r.stdout
