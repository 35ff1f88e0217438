"""The one rule on outputs: no command writes over one of its inputs or over another output.

Each case runs the real command line (in process, through ``nextword.cli.main``) and checks
that it refuses with exit status 2 and one line naming both paths, and that the directory
holding every input is byte for byte what it was (nothing written, nothing half-written).
The expectations are the rule itself (an input must survive; "the same file" as the OS
sees it, ``os.path.samefile``, common practice), not figures from the engine.
"""

from __future__ import annotations

import errno
import os
from pathlib import Path

import pytest

import nextword
from nextword.cli import main

# invented demo data (Harbor Lane Bike Workshop)
MSGS = [
    "See you at the workshop on Saturday",
    "Can someone bring the truing stand",
    "Thanks for fixing the brakes",
    "Repair night on Thursday at the workshop",
    "see you at the ride",
] * 4


def snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: (p.read_bytes() if p.is_file() else b"<dir>") for p in sorted(folder.iterdir())}


@pytest.fixture()
def work(tmp_path: Path) -> Path:
    (tmp_path / "msgs.txt").write_text("\n".join(MSGS) + "\n", encoding="utf-8")
    (tmp_path / "held.txt").write_text("\n".join(reversed(MSGS)) + "\n", encoding="utf-8")
    nextword.train_texts(MSGS, tmp_path / "m.nwm", min_count=1)
    os.symlink("msgs.txt", tmp_path / "link.txt")
    os.link(tmp_path / "m.nwm", tmp_path / "hard.nwm")
    (tmp_path / "rep").mkdir()
    (tmp_path / "rep" / "report.md").write_text("see you at the workshop\n")  # a log that lives where eval reports go
    (tmp_path / "rep" / "tune.md").write_text("see you at the ride\n")
    return tmp_path


# (argv, the output path and the path it collides with, both as shown in the message)
CASES = [
    (["train", "msgs.txt", "-o", "msgs.txt"], "msgs.txt", "msgs.txt"),
    (["train", "held.txt", "msgs.txt", "-o", "./msgs.txt"], "./msgs.txt", "msgs.txt"),
    (["train", "link.txt", "-o", "msgs.txt"], "msgs.txt", "link.txt"),  # symlink to the output
    (["train", "msgs.txt", "-o", "link.txt"], "link.txt", "msgs.txt"),  # output is a symlink to an input
    (["split", "msgs.txt", "--train-out", "msgs.txt", "--test-out", "t.txt"], "msgs.txt", "msgs.txt"),
    (["split", "msgs.txt", "--train-out", "a.txt", "--test-out", "link.txt"], "link.txt", "msgs.txt"),
    (["split", "msgs.txt", "--train-out", "a.txt", "--test-out", "a.txt"], "a.txt", "a.txt"),
    (["split", "msgs.txt", "--train-out", "a.txt", "--test-out", "b.txt", "--tune-out", "./b.txt"], "./b.txt", "b.txt"),
    (["split", "msgs.txt", "held.txt", "--train-out", "a.txt", "--test-out", "b.txt", "--tune-out", "held.txt"], "held.txt", "held.txt"),
    (["export", "m.nwm", "--arpa", "m.nwm"], "m.nwm", "m.nwm"),
    (["export", "m.nwm", "--arpa", "hard.nwm"], "hard.nwm", "m.nwm"),  # hard link
    (["prune", "m.nwm", "-o", "hard.nwm", "--max-size", "1MB"], "hard.nwm", "m.nwm"),
    (["tune", "m.nwm", "held.txt", "-o", "m.nwm", "--no-ksr-curve"], "m.nwm", "m.nwm"),
    (["tune", "m.nwm", "held.txt", "-o", "held.txt", "--no-ksr-curve"], "held.txt", "held.txt"),
    (["tune", "m.nwm", "rep/tune.md", "--report", "rep", "--no-ksr-curve"], "rep/tune.md", "rep/tune.md"),
    (["eval", "m.nwm", "rep/report.md", "--report", "rep", "--no-baselines"], "rep/report.md", "rep/report.md"),
    (["personal", "m.nwm", "--model", "m.nwm", "learn", "see you"], "m.nwm", "m.nwm"),
    (["personal", "hard.nwm", "--model", "m.nwm", "info"], "hard.nwm", "m.nwm"),
]


@pytest.mark.parametrize(("argv", "out", "other"), CASES, ids=[" ".join(c[0][:1] + c[0][-3:]) for c in CASES])
def test_an_output_never_replaces_an_input_or_another_output(
    work: Path, argv: list[str], out: str, other: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(work)
    before, before_rep = snapshot(work), snapshot(work / "rep")
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("nextword: error: "), err
    prefix = f"nextword: error: {out}: "
    assert lines[0].startswith(prefix) and f" {other}" in lines[0][len(prefix):], lines[0]  # names both paths
    assert snapshot(work) == before and snapshot(work / "rep") == before_rep  # nothing written or left behind


def test_an_output_may_share_a_name_pattern_but_not_the_file(work: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]) -> None:
    """The rule must not refuse legitimate writes: a new file, or replacing an old output."""
    monkeypatch.chdir(work)
    assert main(["export", "m.nwm", "--arpa", "m.arpa"]) == 0
    assert main(["export", "m.nwm", "--arpa", "m.arpa"]) == 0  # replacing an earlier output is fine
    assert Path("m.arpa").read_text().startswith("\\data\\")
    assert main(["train", "msgs.txt", "-o", "sub/../new.nwm", "--min-count", "1"]) == 2  # sub/ does not exist
    Path("sub").mkdir()
    assert main(["train", "msgs.txt", "-o", "sub/../new.nwm", "--min-count", "1"]) == 0
    assert nextword.load("new.nwm").n_words == nextword.load("m.nwm").n_words
    capsys.readouterr()


@pytest.mark.parametrize(
    ("argv", "needle"),
    [
        (["train", "msgs.txt", "-o", "nodir/x.nwm"], "nodir/x.nwm: cannot write the model: directory nodir does not exist"),
        (["train", "msgs.txt", "-o", "msgs.txt/x.nwm"], "msgs.txt/x.nwm: cannot write the model: directory msgs.txt is not a directory"),
        (["export", "m.nwm", "--arpa", "rep"], "rep: cannot write the ARPA file there: it is a directory"),
        (["export", "m.nwm", "--arpa", ""], "the ARPA file needs a file name, got an empty one"),
        (["split", "msgs.txt", "--train-out", "a.txt", "--test-out", "no/b.txt"], "no/b.txt: cannot write the test part"),
        (["eval", "m.nwm", "held.txt", "--report", "msgs.txt", "--no-baselines"], "msgs.txt: cannot write the report directory there"),
        (["tune", "m.nwm", "held.txt", "--report", "msgs.txt/r", "--no-ksr-curve"], "msgs.txt/r: cannot create the report directory"),
    ],
)
def test_unwritable_outputs_are_refused_before_any_work(
    work: Path, argv: list[str], needle: str, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.chdir(work)
    before = snapshot(work)
    code = main(argv)
    err = capsys.readouterr().err
    assert code == 2, err
    assert err.count("\n") == 1 and err.startswith("nextword: error: ") and needle in err, err
    assert snapshot(work) == before


def test_a_failed_write_names_the_users_path_not_the_temporary_file(
    work: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch
) -> None:
    """A rename refused by the OS reports the file the user named (the atomic writer's
    temporary ``.m2.nwm.xxxx.tmp`` is an implementation detail), and leaves nothing behind."""
    monkeypatch.chdir(work)
    before = snapshot(work)
    real_replace = os.replace

    def refuse(src: str, dst: str) -> None:
        raise PermissionError(errno.EACCES, "Permission denied", src)

    monkeypatch.setattr(os, "replace", refuse)
    code = main(["train", "msgs.txt", "-o", "m2.nwm", "--min-count", "1"])
    err = capsys.readouterr().err
    assert code == 1 and err == "nextword: error: m2.nwm: Permission denied\n", err
    monkeypatch.setattr(os, "replace", real_replace)
    assert snapshot(work) == before


def test_a_full_disk_names_the_output(work: Path, capsys: pytest.CaptureFixture[str], monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.chdir(work)
    before = snapshot(work)

    def full(fd: int) -> None:
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    code = main(["export", "m.nwm", "--arpa", "m.arpa"])
    err = capsys.readouterr().err
    assert code == 1 and err == "nextword: error: m.arpa: No space left on device\n", err
    assert snapshot(work) == before


def test_same_file_rule(tmp_path: Path) -> None:
    from nextword.paths import check_outputs, same_file

    a = tmp_path / "a.txt"
    a.write_text("x")
    os.symlink(a, tmp_path / "s.txt")
    os.link(a, tmp_path / "h.txt")
    os.symlink(tmp_path / "later.txt", tmp_path / "dangling.txt")
    assert same_file(a, tmp_path / "s.txt") and same_file(a, tmp_path / "h.txt")
    assert same_file(tmp_path / "sub" / ".." / "new.txt", tmp_path / "new.txt")  # neither exists: resolved paths
    assert same_file(tmp_path / "dangling.txt", tmp_path / "later.txt")  # a symlink to a file not written yet
    assert not same_file(a, tmp_path / "b.txt")
    check_outputs([("input", "-")], [("model", "-x")])  # standard input is no file on disk
    with pytest.raises(nextword.InvalidArgumentError, match="h.txt: the model must go to a new file.*a.txt"):
        check_outputs([("corpus", a)], [("model", tmp_path / "h.txt")])


def test_library_train_refuses_to_write_over_its_corpus(tmp_path: Path) -> None:
    import nextword

    corpus = tmp_path / "small.txt"
    corpus.write_text("we fix bikes\nwe fix wheels\n", encoding="utf-8")
    before = corpus.read_bytes()
    with pytest.raises(nextword.InvalidArgumentError, match="small.txt"):
        nextword.train(corpus, corpus)
    assert corpus.read_bytes() == before
