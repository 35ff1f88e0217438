"""``nextword split`` and ``split_messages``: three parts by hash, a salt, warnings, JSON counts.

The oracle for the test part is ``is_held_out`` itself (the rule every benchmark uses);
the other properties are those of any partition (disjoint parts whose union is the
input, as multisets) and of a hash split (each message independently lands in a part
with the requested probability: part sizes are binomial, checked within 5 standard
deviations — common practice for a deterministic pseudo-random split).
"""

from __future__ import annotations

import gzip
import json
import math
import os
import subprocess
import sys
import tempfile
from collections import Counter
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.cli import main
from nextword.corpus import open_sources
from nextword.evaluate import is_held_out, split_messages

ROOT = Path(__file__).resolve().parent.parent


def lines(path: Path) -> list[str]:
    data = path.read_bytes()
    if path.name.endswith(".gz"):
        data = gzip.decompress(data)
    text = data.decode("utf-8")
    return text[:-1].split("\n") if text else []  # every written line ends in "\n"; str.splitlines would also cut at \x1e etc.


def workshop_messages(n: int) -> list[str]:
    # invented demo data (Harbor Lane Bike Workshop), all distinct
    topics = ["brake pads", "a truing stand", "inner tubes", "the chain tool", "spoke keys"]
    return [f"Ticket {i}: can someone bring {topics[i % 5]} to Harbor Lane" for i in range(n)]


message = st.text(st.characters(blacklist_characters="\r\n", blacklist_categories=("Cs",)), min_size=0, max_size=12)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(
    msgs=st.lists(message, max_size=40),
    test_percent=st.integers(1, 98),
    tune_share=st.floats(0, 1),
    salt=st.text(max_size=5),
)
def test_parts_are_a_partition_and_the_test_part_is_the_held_out_rule(
    msgs: list[str], test_percent: int, tune_share: float, salt: str
) -> None:
    tune_percent = math.floor(tune_share * (99 - test_percent))
    with tempfile.TemporaryDirectory() as d:
        src = Path(d) / "in.txt"
        src.write_bytes("".join(m + "\n" for m in msgs).encode("utf-8"))
        tr, te, tu = Path(d) / "tr.txt", Path(d) / "te.txt.gz", Path(d) / "tu.txt"
        counts = split_messages(
            open_sources(src), tr, te, test_percent=test_percent, salt=salt,
            tune_out=tu if tune_percent else None, tune_percent=tune_percent,
        )
        train, test = lines(tr), lines(te)
        tune = lines(tu) if tune_percent else []
    kept = [m for m in msgs if m.strip()]
    assert Counter(train) + Counter(tune) + Counter(test) == Counter(kept)  # cover, and nothing twice
    assert not (set(train) & set(test) or set(train) & set(tune) or set(tune) & set(test))  # disjoint
    assert test == [m for m in kept if is_held_out(m, test_percent, salt=salt)]  # exactly the rule, in order
    assert counts == {"train": len(train), "tune": len(tune), "test": len(test)}


@pytest.mark.parametrize(("test_percent", "tune_percent", "salt"), [(10, 10, ""), (10, 0, ""), (30, 45, "x"), (1, 98, ""), (50, 25, "again")])
def test_part_sizes_are_near_the_requested_shares(tmp_path: Path, test_percent: int, tune_percent: int, salt: str) -> None:
    n = 20_000
    msgs = workshop_messages(n)
    src = tmp_path / "in.txt"
    src.write_text("\n".join(msgs) + "\n")
    counts = split_messages(
        open_sources(src), tmp_path / "tr", tmp_path / "te", test_percent=test_percent, salt=salt,
        tune_out=tmp_path / "tu" if tune_percent else None, tune_percent=tune_percent,
    )
    for part, share in (("test", test_percent / 100), ("tune", tune_percent / 100), ("train", 1 - (test_percent + tune_percent) / 100)):
        sd = math.sqrt(n * share * (1 - share))
        assert abs(counts[part] - n * share) <= 5 * sd + 1, (part, counts)


def test_library_refuses_bad_shares_and_clashing_outputs(tmp_path: Path) -> None:
    src = tmp_path / "in.txt"
    src.write_text("a\nb\n")
    bad = [
        ({"test_percent": 0}, "test_percent must be an integer in \\[1, 99\\], got 0"),
        ({"tune_percent": 5}, "tune_percent=5 needs tune_out"),
        ({"tune_out": tmp_path / "tu"}, "tune_out needs tune_percent >= 1"),
        ({"tune_out": tmp_path / "tu", "tune_percent": 95}, "must leave some training text, got 10 \\+ 95"),
        ({"salt": 3}, "salt must be text, got 3"),
        ({"tune_out": tmp_path / "te", "tune_percent": 5}, "te: the tune part and the test part .*te are the same file"),
    ]
    for kwargs, match in bad:
        with pytest.raises(nextword.InvalidArgumentError, match=match):
            split_messages(open_sources(src), tmp_path / "tr", tmp_path / "te", **kwargs)  # type: ignore[arg-type]
    with pytest.raises(nextword.InvalidArgumentError, match="must go to a new file, not over its input"):
        split_messages(open_sources(src), src, tmp_path / "te")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["in.txt"]  # nothing written by a refused call


def run(*args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "nextword", *args], capture_output=True, text=True, env=env, cwd=cwd)


def test_resplitting_a_held_out_file_warns_and_a_salt_fixes_it(tmp_path: Path) -> None:
    (tmp_path / "all.txt").write_text("\n".join(workshop_messages(3000)) + "\n")
    r = run("split", "all.txt", "--train-out", "train.txt", "--test-out", "held.txt", cwd=tmp_path)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    held = lines(tmp_path / "held.txt")
    assert held == [m for m in workshop_messages(3000) if is_held_out(m, 10)]
    # every held-out message hashes below 10 < 50: the same rule puts them all on the test side
    r = run("split", "held.txt", "--test-percent", "50", "--train-out", "a.txt", "--test-out", "b.txt", cwd=tmp_path)
    assert r.returncode == 0
    assert lines(tmp_path / "a.txt") == [] and len(lines(tmp_path / "b.txt")) == len(held)
    warning = r.stderr.strip().splitlines()
    assert len(warning) == 1 and warning[0].startswith(f"nextword: warning: the training part (a.txt) is empty: 0 of {len(held):,} messages")
    assert "--salt" in warning[0]
    r = run("split", "held.txt", "--test-percent", "50", "--salt", "again", "--train-out", "a.txt", "--test-out", "b.txt", "--json", cwd=tmp_path)
    assert r.returncode == 0 and r.stderr == "", r.stderr
    data = json.loads(r.stdout)
    n = len(held)
    assert data["messages"] == n and data["salt"] == "again"
    assert data["train"]["messages"] + data["test"]["messages"] == n
    assert abs(data["test"]["messages"] - n / 2) <= 5 * math.sqrt(n / 4)
    assert lines(tmp_path / "b.txt") == [m for m in held if is_held_out(m, 50, salt="again")]


def test_three_way_split_from_the_command_line(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(tmp_path)
    rows = [{"body": m, "user": i % 7} for i, m in enumerate(workshop_messages(2000))]
    Path("log.jsonl").write_text("".join(json.dumps(r) + "\n" for r in rows))
    argv = ["split", "log.jsonl", "--field", "body", "--train-out", "tr.jsonl", "--test-out", "te.jsonl",
            "--tune-out", "tu.jsonl.gz", "--tune-percent", "20", "--json"]
    assert main(argv) == 0
    out, err = capsys.readouterr()
    assert err == ""
    data = json.loads(out)
    assert data["test_percent"] == 10 and data["tune_percent"] == 20 and data["messages"] == 2000
    parts = {p: [json.loads(x) for x in lines(Path(data[p]["path"]))] for p in ("train", "tune", "test")}
    assert {p: len(v) for p, v in parts.items()} == {p: data[p]["messages"] for p in parts}
    assert sorted((r for v in parts.values() for r in v), key=lambda r: r["body"]) == sorted(rows, key=lambda r: r["body"])
    # the test part is the plain two-way split's test part: held-out files agree with the benchmarks'
    assert main(["split", "log.jsonl", "--field", "body", "--train-out", "tr2.jsonl", "--test-out", "te2.jsonl"]) == 0
    assert Path("te2.jsonl").read_bytes() == Path("te.jsonl").read_bytes()
    capsys.readouterr()
    # --tune-out alone takes the default share; --tune-percent alone is a usage error
    assert main(["split", "log.jsonl", "--field", "body", "--train-out", "a", "--test-out", "b", "--tune-out", "c", "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["tune_percent"] == 10
    assert main(["split", "log.jsonl", "--train-out", "a", "--test-out", "b", "--tune-percent", "5"]) == 2
    assert "give --tune-out FILE too" in capsys.readouterr().err
    assert main(["split", "log.jsonl", "--train-out", "a", "--test-out", "b", "--tune-out", "c", "--test-percent", "60", "--tune-percent", "40"]) == 2
    assert "leave no training part" in capsys.readouterr().err


def test_an_empty_input_warns_for_every_part(tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.chdir(tmp_path)
    Path("blank.txt").write_text("\n \n")
    assert main(["split", "blank.txt", "--train-out", "a", "--test-out", "b", "--tune-out", "c"]) == 0
    err = capsys.readouterr().err.splitlines()
    assert err == [f"nextword: warning: the {p} part ({f}) is empty: 0 of 0 messages" for p, f in (("training", "a"), ("test", "b"), ("tune", "c"))]
    assert [Path(f).read_bytes() for f in "abc"] == [b"", b"", b""]
