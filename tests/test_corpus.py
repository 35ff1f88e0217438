"""Reading inputs: formats, compression, and errors that name the file and line."""

from __future__ import annotations

import gzip
import json
from pathlib import Path

import pytest

import nextword
from nextword.corpus import iter_messages, open_sources
from nextword.counts import CountBuilder


def _write(path: Path, data: bytes) -> Path:
    path.write_bytes(data)
    return path


def test_plain_text_one_message_per_line(tmp_path: Path) -> None:
    p = _write(tmp_path / "a.txt", b"first message\r\nsecond one\n\nlast")
    assert list(iter_messages(open_sources(p))) == ["first message", "second one", "", "last"]


def test_jsonl_keeps_only_the_field_and_skips_blank_lines(tmp_path: Path) -> None:
    lines = [json.dumps({"text": "hi there", "user": 7}), "", json.dumps({"text": "bye", "extra": [1, 2]})]
    p = _write(tmp_path / "log.jsonl", "\n".join(lines).encode())
    assert list(iter_messages(open_sources(p))) == ["hi there", "bye"]


def test_gzip_is_detected_by_content_not_name(tmp_path: Path) -> None:
    p = _write(tmp_path / "data.txt", gzip.compress("one\ntwo\n".encode()))
    assert list(iter_messages(open_sources(p))) == ["one", "two"]


def test_custom_field_and_forced_format(tmp_path: Path) -> None:
    p = _write(tmp_path / "x.log", (json.dumps({"body": "hello"}) + "\n").encode())
    assert list(iter_messages(open_sources(p, fmt="jsonl", field="body"))) == ["hello"]


@pytest.mark.parametrize(
    ("content", "message"),
    [
        (b'{"text": "ok"}\n[1, 2]\n', "log.jsonl:2: expected a JSON object, got list"),
        (b'{"text": "ok"}\n{"txt": "x"}\n', "log.jsonl:2: field 'text' is missing"),
        (b'{"text": 5}\n', "log.jsonl:1: field 'text' is a int, not a string"),
        (b'{"text": "ok"\n', "log.jsonl:1: not valid JSON"),
        (b'{"text": "caf\xe9"}\n', "log.jsonl:1: not UTF-8"),
    ],
)
def test_bad_records_name_file_and_line(tmp_path: Path, content: bytes, message: str) -> None:
    p = _write(tmp_path / "log.jsonl", content)
    with pytest.raises(nextword.InputDataError, match=message):
        list(iter_messages(open_sources(p)))


def test_truncated_gzip_is_a_data_error(tmp_path: Path) -> None:
    data = gzip.compress(b"hello world\n" * 1000)
    p = _write(tmp_path / "t.txt.gz", data[: len(data) // 2])
    with pytest.raises(nextword.InputDataError, match="t.txt.gz: gzip data ends early"):
        list(iter_messages(open_sources(p)))


def test_missing_input_and_bad_format_option(tmp_path: Path) -> None:
    with pytest.raises(nextword.InputDataError, match="nope.txt: no such file"):
        open_sources(tmp_path / "nope.txt")
    with pytest.raises(nextword.InvalidArgumentError, match="unknown input format 'csv'"):
        open_sources([], fmt="csv")  # type: ignore[arg-type]


def test_one_shot_iterables_are_read_once(tmp_path: Path) -> None:
    consumed = []

    def gen():  # a generator can only be iterated once
        for m in ["a b", "a c"]:
            consumed.append(m)
            yield m

    nextword.train_texts(gen(), tmp_path / "m.nwm", min_count=1)
    assert consumed == ["a b", "a c"]
    with pytest.raises(nextword.InvalidArgumentError, match="not one string"):
        nextword.train_texts("a b c", tmp_path / "m.nwm")  # type: ignore[arg-type]


def test_display_spelling_rules() -> None:
    b = CountBuilder()
    # "Thanks" only ever starts a sentence: its capital is positional -> "thanks"
    # "NASA" only at sentence start keeps its spelling; "Priya" is capitalised mid-sentence
    b.add_texts(["Thanks Priya.", "Thanks. NASA called.", "ask priya", "ask Priya", "ask Priya"])
    t = b.tables(min_count=1)
    shown = dict(zip(t.keys, t.displays))
    assert shown["thanks"] == "thanks"
    assert shown["nasa"] == "NASA"
    assert shown["priya"] == "Priya"
    assert shown["ask"] == "ask"


def test_empty_input_is_a_clear_error(tmp_path: Path) -> None:
    with pytest.raises(nextword.InputDataError, match="no words"):
        nextword.train_texts(["42", "...", ""], tmp_path / "m.nwm", min_count=1)
