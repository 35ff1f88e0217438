"""The progress line: stage labels, done/total, rate and ETA on a terminal; silence elsewhere.

The class takes a clock, so these tests set the time instead of sleeping (no timing
assertions). Expected rates and ETAs are plain arithmetic, worked out beside each check.
"""

from __future__ import annotations

import io
import os
import re
import select
import subprocess
import sys
from pathlib import Path

import pytest

from nextword._progress import Progress, format_amount, format_duration

ROOT = Path(__file__).resolve().parents[1]


class Tty(io.StringIO):
    """A stream that says it is a terminal."""

    def isatty(self) -> bool:
        return True


class Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_terminal_line_has_stage_label_count_rate_and_eta() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("eval", stages=3, stream=out, clock=clock)
    bar.stage("simulating typing", total=5000, unit="messages")
    clock.now += 2.0
    bar.update(1000)
    text = out.getvalue()
    # 1000 messages in 2 s = 500/s; 4000 left / 500 per s = 8 s -> "0:08"
    assert "eval [1/3] simulating typing" in text
    assert "1,000/5,000 messages" in text and "20.0%" in text
    assert "500 messages/s" in text and "ETA 0:08" in text
    bar.stage("baseline unigram only", total=200, unit="messages")
    assert "eval [2/3] baseline unigram only" in out.getvalue()
    bar.done()
    assert out.getvalue().endswith("\r")  # the line is blanked, the cursor back at its start


def test_bytes_are_shown_in_decimal_units() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("train", stages=2, stream=out, clock=clock)
    bar.stage("counting", unit="B")
    clock.now += 4.0
    bar.update(25_000_000, 100_000_000)
    line = out.getvalue().rsplit("\r", 1)[-1]
    # 25 MB in 4 s = 6.25 MB/s -> "6.2 MB/s" (round half to even); 75 MB left / 6.25 MB/s = 12 s
    assert "train [1/2] counting: 25.0 MB/100.0 MB" in line
    assert "6.2 MB/s" in line and "ETA 0:12" in line


def test_a_stage_without_total_shows_elapsed_time() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("tune", stages=4, stream=out, clock=clock)
    bar.stage("held-out events")
    assert "tune [1/4] held-out events: 0:00 elapsed" in out.getvalue()
    clock.now += 75.0
    bar.update(0)
    assert "1:15 elapsed" in out.getvalue()  # 75 s = 1 min 15 s


def test_redraws_are_throttled_to_ten_a_second() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("eval", stream=out, clock=clock)
    bar.stage("simulating", total=10_000)
    for i in range(1, 1001):  # 1000 updates over 1 s of (fake) time
        clock.now += 0.001
        bar.update(i)
    # one draw at the stage start, then one per 0.1 s at most: ≤ 1 + 10
    assert 2 <= out.getvalue().count("\r") <= 11


def test_the_last_unit_is_always_drawn() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("eval", stream=out, clock=clock)
    bar.stage("simulating", total=3, unit="messages")
    for i in (1, 2, 3):  # no time passes: only the start and the completed stage are drawn
        bar.update(i)
    assert "3/3 messages" in out.getvalue() and "2/3" not in out.getvalue()


def test_nothing_is_written_when_the_stream_is_not_a_terminal() -> None:
    clock, out = Clock(), io.StringIO()
    bar = Progress("eval", stages=2, stream=out, clock=clock)
    bar.stage("simulating", total=10)
    clock.now += 1
    bar.update(5)
    bar.done("finished")
    assert out.getvalue() == ""


def test_a_shorter_line_blanks_the_rest_of_the_longer_one() -> None:
    clock, out = Clock(), Tty()
    bar = Progress("x", stream=out, clock=clock)
    bar.stage("a long label for the first stage")
    bar.stage("b")
    last = out.getvalue().rsplit("\r", 1)[-1]
    first = out.getvalue().split("\r")[1]
    assert len(last) >= len(first) and last.rstrip().endswith("0:00 elapsed")


@pytest.mark.parametrize(
    ("seconds", "text"),
    [(0, "0:00"), (59.4, "0:59"), (61, "1:01"), (3600 + 62, "1:01:02")],  # h:mm:ss by hand
)
def test_durations(seconds: float, text: str) -> None:
    assert format_duration(seconds) == text


def test_amounts() -> None:
    assert format_amount(999, "B") == "999 B"
    assert format_amount(1_500, "B") == "1.5 kB"
    assert format_amount(2_500_000_000, "B") == "2.5 GB"
    assert format_amount(12_345, "messages") == "12,345 messages"


def _read_pty(fd: int, proc: subprocess.Popen[bytes]) -> bytes:
    data = b""
    while True:
        ready, _, _ = select.select([fd], [], [], 60)
        if not ready:
            break
        try:
            chunk = os.read(fd, 65536)
        except OSError:  # EIO: the child closed its end
            break
        if not chunk:
            break
        data += chunk
    proc.wait(timeout=60)
    return data


@pytest.mark.skipif(sys.platform == "win32", reason="needs a pseudo-terminal")
def test_eval_shows_its_stages_on_a_terminal_stderr(tmp_path: Path) -> None:
    from pydoc_data.topics import topics  # real English shipped with CPython

    import nextword

    lines = [ln for k in sorted(topics)[:20] for ln in topics[k].splitlines() if ln.strip()]
    (tmp_path / "train.txt").write_text("\n".join(lines[::2]) + "\n", encoding="utf-8")
    (tmp_path / "test.txt").write_text("\n".join(lines[1::2][:300]) + "\n", encoding="utf-8")
    nextword.train(tmp_path / "train.txt", tmp_path / "m.nwm", progress=False)
    env = dict(os.environ, PYTHONPATH=str(ROOT), COLUMNS="200")
    master, slave = os.openpty()
    proc = subprocess.Popen(
        [sys.executable, "-m", "nextword", "eval", str(tmp_path / "m.nwm"), str(tmp_path / "test.txt"), "-k", "3"],
        stdout=subprocess.PIPE, stderr=slave, stdin=subprocess.DEVNULL, env=env,
    )
    os.close(slave)
    try:
        err = _read_pty(master, proc).decode("utf-8", "replace")
    finally:
        os.close(master)
    out = proc.stdout.read().decode() if proc.stdout else ""
    assert proc.returncode == 0, err
    assert "KSR" in out and "\r" not in out  # results on stdout, untouched by the progress line
    for label in ("eval [1/4] reading the logs", "eval [2/4] simulating typing", "eval [3/4] baseline unigram only",
                  "eval [4/4] baseline bigram only"):
        assert label in err, err
    assert re.search(r"\d+/300 messages", err), err  # 300 test messages, none blank
    assert "300/300 messages" in err  # each stage's last message is always drawn
    assert "messages/s" in err and "ETA " in err


def test_eval_writes_no_progress_into_a_pipe(tmp_path: Path) -> None:
    import nextword

    (tmp_path / "t.txt").write_text("see you at the workshop\nthanks for fixing the brakes\n" * 20, encoding="utf-8")
    nextword.train(tmp_path / "t.txt", tmp_path / "m.nwm", min_count=1, progress=False)
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    r = subprocess.run([sys.executable, "-m", "nextword", "eval", str(tmp_path / "m.nwm"), str(tmp_path / "t.txt")],
                       capture_output=True, text=True, env=env)
    assert r.returncode == 0 and r.stderr == ""


# ------------------------------------------------------------ the commands' stages, in process

@pytest.fixture(scope="module")
def topic_lines() -> list[str]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    return [ln for k in sorted(topics)[:25] for ln in topics[k].splitlines() if ln.strip()]


def _stderr_as_terminal(monkeypatch: pytest.MonkeyPatch) -> Tty:
    err = Tty()
    monkeypatch.setattr(sys, "stderr", err)
    return err


def test_train_shows_counting_in_bytes_then_building(
    tmp_path: Path, topic_lines: list[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    import nextword

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(topic_lines) + "\n", encoding="utf-8")
    err = _stderr_as_terminal(monkeypatch)
    nextword.train(corpus, tmp_path / "m.nwm")
    text = err.getvalue()
    size = corpus.stat().st_size
    assert "train [1/2] counting" in text and f"/{format_amount(size, 'B')}" in text  # total = the file's size
    assert "train [2/2] building the model file" in text
    assert text.endswith("\r")  # cleared at the end


def test_tune_shows_each_stage(tmp_path: Path, topic_lines: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    import nextword
    from nextword.cli import main

    nextword.train_texts(topic_lines[::2], tmp_path / "m.nwm", min_count=1)
    held = tmp_path / "held.txt"
    held.write_text("\n".join(topic_lines[1::2][:60]) + "\n", encoding="utf-8")
    err = _stderr_as_terminal(monkeypatch)
    code = main(["tune", str(tmp_path / "m.nwm"), str(held), "--test-percent", "30", "-o", str(tmp_path / "t.nwm"), "--json"])
    assert code == 0
    text = err.getvalue()
    # search on, -o given: events, search, before, writing, after = 5 stages
    for label in ("tune [1/5] held-out events", "tune [2/5] searching λ for KSR@3", "tune [3/5] measuring before",
                  "tune [4/5] writing", "tune [5/5] measuring after"):
        assert label in text, text
    assert re.search(r"searching λ for KSR@3: [\d,]+/[\d,]+ messages", text)


def test_prune_shows_scoring_and_trial_builds(tmp_path: Path, topic_lines: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    import nextword
    from nextword.cli import main

    nextword.train_texts(topic_lines, tmp_path / "m.nwm", min_count=1)
    budget = (tmp_path / "m.nwm").stat().st_size * 3 // 4
    err = _stderr_as_terminal(monkeypatch)
    assert main(["prune", str(tmp_path / "m.nwm"), "-o", str(tmp_path / "p.nwm"), "--max-size", str(budget), "--json"]) == 0
    text = err.getvalue()
    for label in ("prune reading the counts", "prune scoring", "pairs (entropy rule)", "prune building a file with",
                  "prune writing"):
        assert label in text, text


def test_split_shows_the_bytes_read(tmp_path: Path, topic_lines: list[str], monkeypatch: pytest.MonkeyPatch) -> None:
    from nextword.cli import main

    corpus = tmp_path / "c.txt"
    corpus.write_text("\n".join(topic_lines) + "\n", encoding="utf-8")
    err = _stderr_as_terminal(monkeypatch)
    assert main(["split", str(corpus), "--train-out", str(tmp_path / "a"), "--test-out", str(tmp_path / "b")]) == 0
    text = err.getvalue()
    assert "split reading the inputs" in text and f"/{format_amount(corpus.stat().st_size, 'B')}" in text, text
    assert text.endswith("\r")


def test_keystroke_search_reports_messages_over_all_lambda_runs(tmp_path: Path, topic_lines: list[str]) -> None:
    import nextword
    from nextword.tune import keystroke_search

    nextword.train_texts(topic_lines[::2], tmp_path / "m.nwm", min_count=1)
    model = nextword.load(tmp_path / "m.nwm")
    held = topic_lines[1::2][:15]
    seen: list[tuple[int, int]] = []
    _, curve = keystroke_search(model, held, progress=lambda d, t: seen.append((d, t)))
    done = [d for d, _ in seen]
    assert done == sorted(done) and seen[-1] == (15 * len(curve), 15 * len(curve))  # every run, every message
    # totals only shrink: an upper bound first (12 coarse λ + at most 10 new ones), then exact
    totals = [t for _, t in seen]
    assert totals == sorted(totals, reverse=True) and totals[0] <= 15 * 22


def test_time_queries_reports_each_query() -> None:
    from nextword.baselines import time_queries

    seen: list[int] = []
    times = time_queries(len, ["a", "bb", "ccc"], progress=seen.append)
    assert seen == [1, 2, 3] and len(times) == 3


def test_a_quiet_stage_is_redrawn_by_the_ticker_until_done() -> None:
    import time

    clock, out = Clock(), Tty()
    bar = Progress("eval", stages=2, stream=out, clock=clock, tick=1.0)
    bar.stage("nltk.lm fit")  # a step that makes no progress calls of its own
    assert bar.ticking
    clock.now += 5.0  # 5 s pass without an update: the ticker redraws the elapsed time
    deadline = time.monotonic() + 10  # a wait for the thread, not a timing assertion
    while "0:05 elapsed" not in out.getvalue() and time.monotonic() < deadline:
        time.sleep(0.02)
    assert "eval [1/2] nltk.lm fit: 0:05 elapsed" in out.getvalue()
    bar.done()
    assert not bar.ticking and out.getvalue().endswith("\r")


def test_no_ticker_thread_without_a_terminal_or_when_turned_off() -> None:
    quiet = Progress("x", stream=io.StringIO())
    quiet.stage("a")
    off = Progress("x", stream=Tty(), tick=None)
    off.stage("a")
    assert not quiet.ticking and not off.ticking


def test_an_error_message_starts_on_a_clean_line(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    import nextword
    from nextword.cli import main

    (tmp_path / "t.txt").write_text("see you at the workshop\nthanks for fixing the brakes\n" * 5, encoding="utf-8")
    nextword.train(tmp_path / "t.txt", tmp_path / "m.nwm", min_count=1, progress=False)
    err = _stderr_as_terminal(monkeypatch)
    missing = tmp_path / "no-such-training-file.txt"
    code = main(["eval", str(tmp_path / "m.nwm"), str(tmp_path / "t.txt"), "--train-data", str(missing)])
    assert code == 1
    text = err.getvalue()
    assert "eval [5/10] reading training data" in text  # the stage that failed was shown...
    last = text.split("\r")[-1]
    assert last.startswith("nextword: error: ") and str(missing) in last  # ...and cleared before the error
