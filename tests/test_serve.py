"""The local service: every operation answers what the in-process API answers, every bad request
gets a documented error on a connection that keeps working, and a stop saves the users' layers.

The oracle for each answer is the library itself (``Model.suggest`` and ``PersonalLayer``),
called in this process on the same model file; the protocol is docs/PROTOCOL.md.
"""

from __future__ import annotations

import json
import os
import random
import shutil
import signal
import socket
import stat
import subprocess
import sys
import tempfile
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

import nextword
from nextword.personal import PersonalLayer
from nextword.serve import ERROR_CODES, OPS, ServeLimits, Server, encode_answer, listen_tcp, listen_unix, valid_user

ROOT = Path(__file__).resolve().parent.parent
DEMO = ROOT / "examples" / "data" / "demo_messages.txt"
WAIT = 60.0  # generous: the CI machine is shared and noisy; no test measures time


@pytest.fixture(scope="module")
def model_path(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("serve") / "demo.nwm"  # the name docs/PROTOCOL.md shows
    nextword.train(DEMO, path)
    return path


@pytest.fixture(scope="module")
def model(model_path: Path) -> nextword.Model:
    return nextword.load(model_path)


@pytest.fixture()
def short_dir() -> Iterator[Path]:
    """A short directory for socket files (a Unix socket path must stay under ~100 bytes)."""
    d = Path(tempfile.mkdtemp(prefix="nws"))
    yield d
    shutil.rmtree(d, ignore_errors=True)


def demo_queries(n: int, seed: int = 7) -> list[str]:
    """Texts before a cursor: demo messages cut at random characters (next-word and completion queries)."""
    lines = [ln for ln in DEMO.read_text(encoding="utf-8").splitlines() if ln.strip()]
    rng = random.Random(seed)
    out = []
    for _ in range(n):
        line = rng.choice(lines)
        out.append(line[: rng.randint(0, len(line))])
    return out


class Client:
    """A test client: one connection, one JSON line out, one JSON line in."""

    def __init__(self, address: Path | tuple[str, int]) -> None:
        if isinstance(address, Path):
            self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
            self.sock.settimeout(WAIT)
            self.sock.connect(str(address))
        else:
            self.sock = socket.create_connection(address, timeout=WAIT)
        self.file = self.sock.makefile("rb")

    def send_raw(self, data: bytes) -> None:
        self.sock.sendall(data)

    def read(self) -> dict[str, Any]:
        line = self.file.readline()
        assert line.endswith(b"\n"), f"connection closed, got {line!r}"
        obj = json.loads(line)
        assert isinstance(obj, dict)
        return obj

    def call(self, **req: Any) -> dict[str, Any]:
        self.send_raw((json.dumps(req) + "\n").encode())
        return self.read()

    def close(self) -> None:
        self.file.close()
        self.sock.close()


@contextmanager
def serving(
    model: nextword.Model, listener: socket.socket, users: Path | None, *, max_open_users: int = 256, **limits: Any
) -> Iterator[Server]:
    server = Server(model, listener, users_dir=users, limits=ServeLimits(**limits), max_open_users=max_open_users)
    report: dict[str, Any] = {}
    t = threading.Thread(target=lambda: report.update(server.serve_forever()), daemon=True)
    t.start()
    try:
        yield server
    finally:
        server.stop()
        t.join(WAIT)
    assert not t.is_alive(), "server did not stop"
    assert report["connections_cut"] == 0


@contextmanager
def running(
    model: nextword.Model, sock_dir: Path, users: Path | None, *, max_open_users: int = 256, **limits: Any
) -> Iterator[tuple[Server, Path]]:
    path = sock_dir / "s.sock"
    with serving(model, listen_unix(path), users, max_open_users=max_open_users, **limits) as server:
        yield server, path
    assert not path.exists(), "socket file left behind"


def as_pairs(answer: dict[str, Any]) -> list[tuple[str, float]]:
    assert answer["ok"] is True, answer
    return [(s["word"], s["prob"]) for s in answer["suggestions"]]


def expected(found: list[nextword.Suggestion]) -> list[tuple[str, float]]:
    return [(s.word, s.prob) for s in found]


# -- round trips -------------------------------------------------------------------------------


def test_suggest_answers_equal_model_suggest(model: nextword.Model, short_dir: Path) -> None:
    queries = demo_queries(300) + ["", "See you at the ", "Repair night on Th", "pri", "£5 for the tr", "ÉCOLE "]
    with running(model, short_dir, None) as (_, path):
        c = Client(path)
        for i, q in enumerate(queries):
            k = 1 + i % 6
            answer = c.call(id=i, op="suggest", text=q, k=k)
            assert answer["id"] == i
            assert as_pairs(answer) == expected(model.suggest(q, k)), q  # exact floats: JSON keeps them
        assert as_pairs(c.call(op="suggest", text="See you at the ")) == expected(model.suggest("See you at the ", 3))
        c.close()


def test_personal_ops_match_an_in_process_layer(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "users"
    mine = PersonalLayer(model)  # fed the same operations in this process
    msgs = ["Quarrington Lake ride on Sunday", "meet at Quarrington Lake", "Quarrington Lake again, bring the pump"]
    texts = ["at Qu", "Quarrington ", "bring the p", "", "See you at the "]
    with running(model, short_dir, users) as (_, path):
        c = Client(path)
        for n, m in enumerate(msgs, 1):
            answer = c.call(id=f"l{n}", op="learn", user="ana", text=m)
            mine.learn(m)
            assert answer == {
                "id": f"l{n}", "ok": True, "user": "ana", "messages": n, "entries": mine.entries,
                "weight": mine.weight, "blocked": [],
            }
        assert (users / "ana.nwp").exists()
        for q in texts:
            assert as_pairs(c.call(op="suggest", user="ana", text=q, k=4)) == expected(mine.suggest(q, 4))
        on_disk = PersonalLayer.load(model, users / "ana.nwp")  # every change is saved at once
        assert [s.word for s in on_disk.suggest("at Qu", 4)] == [s.word for s in mine.suggest("at Qu", 4)]
        assert any(s.word == "Quarrington" for s in mine.suggest("at Qu", 4))

        answer = c.call(op="block", user="ana", word="Quarrington")
        mine.block("Quarrington")
        assert answer["blocked"] == ["quarrington"]
        assert as_pairs(c.call(op="suggest", user="ana", text="at Qu", k=4)) == expected(mine.suggest("at Qu", 4))
        c.call(op="unblock", user="ana", word="Quarrington")
        mine.unblock("Quarrington")

        answer = c.call(id=5, op="forget", user="ana", word="Lake")
        mine.forget("Lake")
        assert answer["ok"] and answer["entries"] == mine.entries
        for q in texts:
            assert as_pairs(c.call(op="suggest", user="ana", text=q, k=4)) == expected(mine.suggest(q, 4))

        info = c.call(id="i", op="info", user="ana")
        assert info["id"] == "i" and info["protocol"] == 1 and info["users"] is True
        assert info["model"]["vocabulary"] == model.n_words and info["model"]["bigrams"] == model.n_bigrams
        assert info["limits"]["max_line_bytes"] == 64 * 1024
        assert info["user"]["messages"] == mine.messages == 3

        answer = c.call(op="forget", user="ana", all=True)
        mine.clear()
        assert answer["entries"] == 0
        assert as_pairs(c.call(op="suggest", user="ana", text="at Qu", k=4)) == expected(mine.suggest("at Qu", 4))
        assert PersonalLayer.load(model, users / "ana.nwp").entries == 0
        c.close()


def test_unknown_user_gets_base_answers_and_no_file(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "users"
    with running(model, short_dir, users) as (_, path):
        c = Client(path)
        for q in demo_queries(30, seed=3):
            assert as_pairs(c.call(op="suggest", user="nobody", text=q)) == expected(model.suggest(q, 3))
        assert c.call(op="forget", user="nobody", word="the")["entries"] == 0
        assert c.call(op="info", user="nobody")["user"]["messages"] == 0
        c.close()
    assert list(users.iterdir()) == []  # only learn and block create a layer


# -- bad requests ------------------------------------------------------------------------------

BAD: list[tuple[bytes, str, str | None, Any]] = [
    # (request line, error code, field named, id echoed)
    (b"{bad", "bad_json", None, None),
    (b'{"op": "suggest", "text": "a"', "bad_json", None, None),
    (b'{"id": 1, "op": "suggest", "text": NaN}', "bad_json", None, None),
    (b"\xff\xfe{}", "bad_json", None, None),
    (b"[" * 5000 + b"]" * 5000, "bad_json", None, None),
    (b"[1, 2]", "not_object", None, None),
    (b'"suggest"', "not_object", None, None),
    (b"42", "not_object", None, None),
    (b'{"id": 3, "op": "sugest", "text": "a"}', "unknown_op", None, 3),
    (b'{"id": 4, "text": "a"}', "bad_field", "op", 4),
    (b'{"id": 5, "op": 7}', "bad_field", "op", 5),
    (b'{"id": {"x": 1}, "op": "info"}', "bad_field", "id", None),
    (b'{"id": 6, "op": "suggest"}', "bad_field", "text", 6),
    (b'{"id": 7, "op": "suggest", "text": ["a"]}', "bad_field", "text", 7),
    (b'{"id": 8, "op": "suggest", "text": "a", "k": 0}', "bad_field", "k", 8),
    (b'{"id": 9, "op": "suggest", "text": "a", "k": true}', "bad_field", "k", 9),
    (b'{"id": 10, "op": "suggest", "text": "a", "k": 2.5}', "bad_field", "k", 10),
    (b'{"id": 11, "op": "suggest", "text": "a", "k": 51}', "bad_field", "k", 11),
    (b'{"id": 12, "op": "suggest", "txt": "a"}', "bad_field", "txt", 12),
    (b'{"id": 13, "op": "learn", "user": "../etc/passwd", "text": "a"}', "bad_field", "user", 13),
    (b'{"id": 14, "op": "learn", "user": ".hidden", "text": "a"}', "bad_field", "user", 14),
    (b'{"id": 15, "op": "learn", "user": "Ana", "text": "a"}', "bad_field", "user", 15),
    (b'{"id": 16, "op": "learn", "user": "", "text": "a"}', "bad_field", "user", 16),
    (b'{"id": 17, "op": "learn", "user": 5, "text": "a"}', "bad_field", "user", 17),
    (b'{"id": 18, "op": "learn", "text": "a"}', "bad_field", "user", 18),
    (b'{"id": 19, "op": "learn", "user": "ana"}', "bad_field", "text", 19),
    (b'{"id": 20, "op": "forget", "user": "ana"}', "bad_field", "word", 20),
    (b'{"id": 21, "op": "forget", "user": "ana", "word": "a", "all": true}', "bad_field", "word", 21),
    (b'{"id": 22, "op": "forget", "user": "ana", "word": "two words"}', "bad_field", "word", 22),
    (b'{"id": 23, "op": "forget", "user": "ana", "all": "yes"}', "bad_field", "all", 23),
    (b'{"id": 24, "op": "block", "user": "ana", "word": ""}', "bad_field", "word", 24),
    (b'{"id": "x' + b"y" * 100 + b'", "op": "suggest", "text": 3}', "bad_field", "text", "x" + "y" * 100),
]


def test_bad_requests_get_documented_errors_and_the_connection_survives(
    model: nextword.Model, short_dir: Path, tmp_path: Path
) -> None:
    with running(model, short_dir, tmp_path / "users") as (_, path):
        c = Client(path)
        for line, code, field, rid in BAD:
            c.send_raw(line + b"\n")
            answer = c.read()
            assert answer["ok"] is False and answer["id"] == rid, (line, answer)
            err = answer["error"]
            assert err["code"] == code and code in ERROR_CODES, (line, answer)
            assert err.get("field") == field, (line, answer)
            assert isinstance(err["message"], str) and "\n" not in err["message"]
            assert as_pairs(c.call(op="suggest", text="See you at the ")) == expected(model.suggest("See you at the "))
        # the bad value is named in the message
        answer = c.call(op="suggest", text="a", k=-3)
        assert "-3" in answer["error"]["message"]
        assert "../x" in c.call(op="learn", user="../x", text="a")["error"]["message"]
        c.send_raw(b"\n  \n")  # blank lines are ignored, not answered
        assert c.call(id="after", op="info")["id"] == "after"
        c.close()
    assert not (tmp_path / "users" / "ana.nwp").exists()  # no bad request changed anything


def strict_json(line: bytes) -> dict[str, Any]:
    """One answer line parsed the strict way: UTF-8 without surrogates (RFC 8259 §8.1), no NaN/Infinity (§6)."""
    def refuse(name: str) -> Any:
        raise AssertionError(f"{name} is not JSON")

    assert line.endswith(b"\n"), f"connection closed, got {line!r}"
    obj = json.loads(line.decode("utf-8", "strict"), parse_constant=refuse)
    assert isinstance(obj, dict)
    return obj


def write_layer_with_counts(path: Path, model: nextword.Model, value: float) -> None:
    """A layer file whose checksum is right but whose every count is ``value`` (e.g. inf).

    Built from a real saved layer: header ``<8sHHQI`` (magic, version 1.0, payload length,
    CRC-32 of the payload), payload msgpack — the PersonalLayer file layout.
    """
    import math as _math
    import struct
    import zlib

    import msgpack

    layer = PersonalLayer(model)
    layer.learn("the Zorbington Lane ride")
    layer.learn("the Zorbington Lane shop")
    layer.save(path)
    raw = path.read_bytes()
    head = struct.Struct("<8sHHQI")
    data = msgpack.unpackb(raw[head.size:], raw=False)
    data["unigram"] = {key: value for key in data["unigram"]}
    data["bigram"] = {h: {w: value for w in row} for h, row in data["bigram"].items()}
    body = msgpack.packb(data, use_bin_type=True)
    path.write_bytes(head.pack(nextword.personal.PERSONAL_MAGIC, 1, 0, len(body), zlib.crc32(body)) + body)
    assert not _math.isfinite(value)


def test_every_pipelined_line_gets_one_valid_answer_in_order(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "users"
    users.mkdir()
    write_layer_with_counts(users / "inf.nwp", model, float("inf"))
    # (request line, error code or None for ok, field named, id echoed); "\ud800" etc. are JSON
    # escapes of lone surrogates, which json.loads accepts but UTF-8 cannot carry
    lines: list[tuple[bytes, str | None, str | None, Any]] = [
        (b'{"id": 1, "op": "info"}', None, None, 1),
        (b'{"id": 1e999, "op": "info"}', "bad_field", "id", None),
        (b'{"id": -1e999, "op": "suggest", "text": "a"}', "bad_field", "id", None),
        (b'{"id": "\\ud800", "op": "info"}', "bad_field", "id", None),
        (b'{"id": 2, "op": "\\udc00"}', "bad_field", "op", 2),
        (b'{"id": 3, "op": "sugg\\ud800est", "text": "a"}', "bad_field", "op", 3),
        (b'{"id": 4, "op": "suggest", "text": "a", "\\ud800x": 1}', "bad_field", "\\ud800x", 4),
        (b'{"id": 5, "op": "learn", "user": "\\ud800", "text": "hi"}', "bad_field", "user", 5),
        (b'{"id": 6, "op": "suggest", "text": "See you at the \\ud800"}', "bad_field", "text", 6),
        (b'{"id": 7, "op": "learn", "user": "ana", "text": "bad \\udfff message"}', "bad_field", "text", 7),
        (b'{"id": 8, "op": "block", "user": "ana", "word": "\\ud83d"}', "bad_field", "word", 8),
        (b'{"id": 9, "op": "suggest", "text": ["\\ud800"]}', "bad_field", "text", 9),
        (b'{"id": 10, "op": "suggest", "text": "a", "k": 1e999}', "bad_field", "k", 10),
        (b'{"id": 11, "op": "suggest", "user": "inf", "text": "the "}', "user_layer", None, 11),
        (b'{"id": 13, "op": "info", "user": "inf"}', "user_layer", None, 13),
        (b'{"id": 14, "op": "learn", "user": "inf", "text": "more"}', "user_layer", None, 14),
        (b'{"id": "\\u00e9t\\u00e9", "op": "suggest", "text": "See you at the "}', None, None, "été"),  # a valid escape is fine
    ]
    with running(model, short_dir, users) as (_, path):
        c = Client(path)
        c.send_raw(b"".join(line + b"\n" for line, *_ in lines))  # all at once: one bad line must not cost the others
        for line, code, field, rid in lines:
            answer = strict_json(c.file.readline())
            assert answer["id"] == rid, (line, answer)
            if code is None:
                assert answer["ok"] is True, (line, answer)
            else:
                assert answer["ok"] is False and answer["error"]["code"] == code, (line, answer)
                assert answer["error"].get("field") == field, (line, answer)
                assert code in ERROR_CODES
        assert as_pairs(c.call(op="suggest", text="See you at the ")) == expected(model.suggest("See you at the "))
        c.close()
    assert not (users / "ana.nwp").exists()  # nothing with a surrogate was learned or blocked


def test_an_answer_that_cannot_be_encoded_is_an_internal_error(model: nextword.Model, short_dir: Path) -> None:
    """The last line of defence: whatever a handler returns, the line is answered with valid JSON."""
    answer = strict_json(encode_answer({"id": 3, "ok": True, "suggestions": [{"word": "a", "prob": float("nan")}]}))
    assert answer["id"] == 3 and answer["ok"] is False and answer["error"]["code"] == "internal"
    answer = strict_json(encode_answer({"id": "\ud800", "ok": True, "word": "\udfff"}))
    assert answer["id"] is None and answer["error"]["code"] == "internal"


# strings as a client may send them: letters, spaces, digits, and lone surrogates (JSON "\udXXX" escapes)
_WILD_TEXT = st.text(st.characters(categories=["Ll", "Lu", "Nd", "Zs", "Cs", "Po"]), max_size=12)
_WILD_VALUE = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**70), 2**70) | st.floats() | _WILD_TEXT,
    lambda inner: st.lists(inner, max_size=3) | st.dictionaries(_WILD_TEXT, inner, max_size=3),
    max_leaves=6,
)
_WILD_KEY = st.sampled_from(["id", "op", "text", "k", "user", "word", "all"]) | _WILD_TEXT
_WILD_REQUEST = st.fixed_dictionaries(
    {"op": st.sampled_from([*OPS, "nope"]) | _WILD_TEXT},
    optional={"id": _WILD_VALUE, "text": _WILD_VALUE, "k": _WILD_VALUE, "user": st.sampled_from(["ana", "bo"]) | _WILD_VALUE},
) | st.dictionaries(_WILD_KEY, _WILD_VALUE, max_size=5)


@pytest.fixture(scope="module")
def idle_server(model: nextword.Model, tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """A server that is never started: handle_line is called directly, as a connection thread would."""
    d = Path(tempfile.mkdtemp(prefix="nwh"))
    listener = listen_unix(d / "s.sock")
    yield Server(model, listener, users_dir=tmp_path_factory.mktemp("hyp_users"))
    listener.close()
    shutil.rmtree(d, ignore_errors=True)


@settings(max_examples=300, deadline=None)
@given(_WILD_REQUEST)
def test_any_request_gets_exactly_one_valid_json_answer(idle_server: Server, req: dict[str, Any]) -> None:
    """Invariant (RFC 8259 §6, §8.1: no NaN/Infinity, UTF-8 without lone surrogates): one strict JSON answer per line."""
    line = json.dumps(req).encode("ascii")  # ensure_ascii: surrogates become \udXXX escapes, floats may be NaN/Infinity
    answer_bytes = encode_answer(idle_server.handle_line(line) or {})
    assert answer_bytes.count(b"\n") == 1
    answer = strict_json(answer_bytes)
    assert isinstance(answer["ok"], bool) and "id" in answer
    if answer["ok"] is False:
        assert answer["error"]["code"] in ERROR_CODES and answer["error"]["code"] != "internal", answer
    rid = req.get("id")
    if isinstance(rid, (str, int)) and not isinstance(rid, bool) and "NaN" not in line.decode() and "Infinity" not in line.decode():
        if not (isinstance(rid, str) and any(0xD800 <= ord(ch) <= 0xDFFF for ch in rid)):
            assert answer["id"] == rid  # echoed unchanged whenever it can be


def test_personal_requests_without_a_users_directory(model: nextword.Model, short_dir: Path) -> None:
    with running(model, short_dir, None) as (_, path):
        c = Client(path)
        for req in ({"op": "learn", "user": "ana", "text": "hi"}, {"op": "suggest", "user": "ana", "text": "a"}):
            answer = c.call(id=1, **req)
            assert answer["error"]["code"] == "users_disabled" and answer["error"]["field"] == "user"
        assert c.call(op="info")["users"] is False
        c.close()


def test_damaged_user_layer_is_reported_and_kept(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "users"
    users.mkdir()
    damaged = b"\x89NWP\r\n\x1a\n" + b"\x00" * 5
    (users / "bo.nwp").write_bytes(damaged)
    with running(model, short_dir, users) as (_, path):
        c = Client(path)
        for req in ({"op": "learn", "user": "bo", "text": "hi"}, {"op": "suggest", "user": "bo", "text": "a"}):
            answer = c.call(id="d", **req)
            assert answer["error"]["code"] == "user_layer" and "bo" in answer["error"]["message"]
        assert c.call(op="learn", user="cy", text="hello there")["messages"] == 1  # others unaffected
        c.close()
    assert (users / "bo.nwp").read_bytes() == damaged  # never replaced by an empty layer


def test_layer_paths_that_are_not_regular_files_are_refused_at_once(
    model: nextword.Model, short_dir: Path, tmp_path: Path
) -> None:
    users = tmp_path / "users"
    users.mkdir()
    os.mkfifo(users / "fi.nwp")  # opening a FIFO for reading would wait for a writer forever
    (users / "dd.nwp").mkdir()
    with running(model, short_dir, users) as (_, path):
        c = Client(path)
        for user in ("fi", "dd"):
            for req in ({"op": "suggest", "text": "the "}, {"op": "learn", "text": "hi"}, {"op": "info"}):
                answer = c.call(id=user, user=user, **req)
                assert answer["ok"] is False and answer["error"]["code"] == "user_layer", answer
                assert user in answer["error"]["message"]
        assert c.call(op="learn", user="cy", text="hello there")["messages"] == 1  # others unaffected
        c.close()
    assert stat.S_ISFIFO(os.lstat(users / "fi.nwp").st_mode) and (users / "dd.nwp").is_dir()  # left alone


def test_a_failing_layer_answers_user_layer_and_is_read_again(
    model: nextword.Model, short_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Fault injection: the layer's own code raises for one user (as a layer with inconsistent counts might)."""
    users = tmp_path / "users"
    real_suggest = PersonalLayer.suggest
    faulty = {"bo"}

    def suggest(self: PersonalLayer, typed: str, k: int = 3) -> list[nextword.Suggestion]:
        if self.path is not None and Path(self.path).stem in faulty:
            raise ZeroDivisionError("float division by zero")
        return real_suggest(self, typed, k)

    monkeypatch.setattr(PersonalLayer, "suggest", suggest)
    with running(model, short_dir, users) as (server, path):
        c = Client(path)
        for _ in range(2):
            assert c.call(op="learn", user="bo", text="the Zorbington Lane ride")["ok"]
        for _ in range(3):  # every request for bo: a clear code naming the user, never "internal"
            answer = c.call(id="s", op="suggest", user="bo", text="at Zo")
            assert answer["error"]["code"] == "user_layer" and "bo" in answer["error"]["message"], answer
            assert "bo" not in server.open_users()  # dropped: the next request reads the file again
        assert as_pairs(c.call(op="suggest", user="cy", text="at Zo")) == expected(model.suggest("at Zo"))
        # the file is replaced (e.g. restored from a backup) and the fault is gone: bo is served from the new file
        restored = PersonalLayer(model)
        restored.learn("the Zorbington Lane shop")
        restored.learn("the Zorbington Lane stand")
        restored.save(users / "bo.nwp")
        faulty.clear()
        assert as_pairs(c.call(op="suggest", user="bo", text="Zorbington Lane ")) == expected(
            restored.suggest("Zorbington Lane ")
        )
        c.close()


@pytest.mark.parametrize(
    "busy",
    [
        BlockingIOError(11, "Resource temporarily unavailable (the layer file is locked)"),
        RuntimeError("the layer file is locked by another process"),  # whatever a lock may raise: never "internal"
    ],
    ids=["oserror", "other"],
)
def test_a_busy_layer_file_holds_up_only_its_user(
    busy: Exception, model: nextword.Model, short_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Fault injection: opening one user's layer waits (a lock held elsewhere), then fails as busy."""
    users = tmp_path / "users"
    real_open = PersonalLayer.open.__func__  # type: ignore[attr-defined]
    entered, release = threading.Event(), threading.Event()

    def open_(cls: type[PersonalLayer], base: nextword.Model, path: Any, **kw: Any) -> PersonalLayer:
        if Path(path).stem == "slow":
            entered.set()
            assert release.wait(WAIT)
            raise busy
        return real_open(cls, base, path, **kw)

    monkeypatch.setattr(PersonalLayer, "open", classmethod(open_))
    with running(model, short_dir, users, max_open_users=1) as (_, path):
        a, b = Client(path), Client(path)
        a.send_raw(b'{"id": "busy", "op": "learn", "user": "slow", "text": "hi"}\n')
        assert entered.wait(WAIT)
        for n in range(3):  # meanwhile other users are opened, served and closed (cap 1)
            for u in ("ana", "cy"):
                assert b.call(op="learn", user=u, text=f"message {n}")["messages"] == n + 1
        release.set()
        answer = a.read()
        assert answer["id"] == "busy" and answer["error"]["code"] == "user_layer", answer
        assert "slow" in answer["error"]["message"] and "locked" in answer["error"]["message"]
        monkeypatch.setattr(PersonalLayer, "open", classmethod(real_open))  # the lock is free again
        assert a.call(op="learn", user="slow", text="hi")["messages"] == 1
        a.close()
        b.close()


# -- framing: size limit, half-sent and abandoned requests ----------------------------------------


def test_oversized_request_then_a_good_one_on_the_same_connection(model: nextword.Model, short_dir: Path) -> None:
    with running(model, short_dir, None, max_line_bytes=256) as (_, path):
        c = Client(path)
        # a line of exactly the limit is accepted, one byte more is refused (the newline is not counted)
        base = b'{"id": 1, "op": "suggest", "text": "'
        fit = base + b"x" * (256 - len(base) - 2) + b'"}'
        assert len(fit) == 256
        c.send_raw(fit + b"\n")
        assert c.read()["ok"] is True
        over = base + b"x" * (257 - len(base) - 2) + b'"}'
        c.send_raw(over + b"\n")
        assert c.read()["error"]["code"] == "too_large"
        # a huge line arriving in pieces, its newline much later; then a good request right behind it
        c.send_raw(b'{"id": 2, "op": "suggest", "text": "' + b"y" * 100_000)
        assert c.read()["error"]["code"] == "too_large"  # answered before the line ends
        c.send_raw(b"z" * 50_000)
        c.send_raw(b'"}\n{"id": 3, "op": "suggest", "text": "See you at the "}\n')
        answer = c.read()
        assert answer["id"] == 3 and as_pairs(answer) == expected(model.suggest("See you at the "))
        c.close()


def test_half_sent_and_abandoned_requests_do_not_disturb_others(model: nextword.Model, short_dir: Path) -> None:
    with running(model, short_dir, None, request_timeout=0.5) as (_, path):
        steady = Client(path)
        assert steady.call(id=0, op="info")["ok"]
        # half a request, then the client disconnects
        a = Client(path)
        a.send_raw(b'{"id": 1, "op": "sugg')
        a.close()
        # a full request, disconnecting before reading the answer
        b = Client(path)
        b.send_raw(b'{"id": 2, "op": "suggest", "text": "the "}\n' * 200)
        b.sock.shutdown(socket.SHUT_RDWR)
        b.close()
        # half a request, then silence: the server answers "timeout" and closes this connection
        slow = Client(path)
        slow.send_raw(b'{"id": 3, "op": "suggest", "te')
        answer = slow.read()
        assert answer["error"]["code"] == "timeout" and answer["id"] is None
        assert slow.file.readline() == b""  # closed by the server
        slow.close()
        for q in demo_queries(20, seed=11):
            assert as_pairs(steady.call(op="suggest", text=q)) == expected(model.suggest(q, 3))
        fresh = Client(path)
        assert fresh.call(id=9, op="info")["id"] == 9
        fresh.close()
        steady.close()


def test_idle_timeout_closes_silent_connections_only(model: nextword.Model, short_dir: Path) -> None:
    with running(model, short_dir, None, idle_timeout=0.3) as (_, path):
        idle = Client(path)
        assert idle.call(id=1, op="info")["ok"]
        assert idle.file.readline() == b""  # closed quietly after its silence: no request was pending
        idle.close()
        fresh = Client(path)  # the server itself goes on
        assert as_pairs(fresh.call(op="suggest", text="thanks for ")) == expected(model.suggest("thanks for "))
        fresh.close()


def test_pipelined_requests_are_answered_in_order(model: nextword.Model, short_dir: Path) -> None:
    queries = demo_queries(100, seed=5)
    with running(model, short_dir, None) as (_, path):
        c = Client(path)
        c.send_raw(b"".join((json.dumps({"id": i, "op": "suggest", "text": q}) + "\n").encode() for i, q in enumerate(queries)))
        for i, q in enumerate(queries):
            answer = c.read()
            assert answer["id"] == i and as_pairs(answer) == expected(model.suggest(q, 3))
        c.close()


# -- concurrency -------------------------------------------------------------------------------


def test_concurrent_clients_all_get_correct_answers(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    wrong: list[str] = []
    learned: list[int] = []

    def work(n: int) -> None:
        c = Client(path)
        try:
            for i, q in enumerate(demo_queries(150, seed=100 + n)):
                answer = c.call(id=f"{n}:{i}", op="suggest", text=q, k=1 + i % 4)
                if answer["id"] != f"{n}:{i}" or as_pairs(answer) != expected(model.suggest(q, 1 + i % 4)):
                    wrong.append(q)
            for i in range(5):  # every thread also learns for one shared user
                learned.append(c.call(op="learn", user="shared", text=f"thread {n} message {i} about the tyre levers")["messages"])
        finally:
            c.close()

    with running(model, short_dir, tmp_path / "users") as (_, path):
        threads = [threading.Thread(target=work, args=(n,)) for n in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(WAIT)
        assert not any(t.is_alive() for t in threads)
        assert wrong == []
        assert sorted(learned) == list(range(1, 41))  # each learn saw a distinct message count: none lost
    assert PersonalLayer.load(model, tmp_path / "users" / "shared.nwp").messages == 40


def test_layers_beyond_max_open_users_are_closed_and_reopen_with_everything(
    model: nextword.Model, short_dir: Path, tmp_path: Path
) -> None:
    users = tmp_path / "users"
    names = [f"rider{i}" for i in range(5)]
    mine = {u: PersonalLayer(model) for u in names}  # the oracle: the same operations in this process
    with running(model, short_dir, users, max_open_users=2) as (server, path):
        c = Client(path)
        for round_ in range(4):
            for n, u in enumerate(names):  # users in turn: every request after the second reopens a closed layer
                text = f"Quarr{u[-1]}ton Lane ride {round_} with the {('pump', 'levers', 'wrench')[n % 3]}"
                mine[u].learn(text)
                answer = c.call(op="learn", user=u, text=text)
                assert answer["messages"] == round_ + 1 and answer["entries"] == mine[u].entries, answer
                assert len(server.open_users()) <= 2, server.open_users()
            assert c.call(op="block", user=names[round_], word="ride")["ok"]
            mine[names[round_]].block("ride")
        assert server.layers_closed >= 4 * 5 - 2
        for u in names:
            for q in ["Quarr", "Lane ", "the ", "ride ", ""]:
                assert as_pairs(c.call(op="suggest", user=u, text=q, k=4)) == expected(mine[u].suggest(q, 4)), (u, q)
            assert c.call(op="info", user=u)["user"]["blocked"] == sorted(mine[u].blocklist)
            assert server.open_users()[-1] == u and len(server.open_users()) <= 2  # most recent last
        c.close()
    for u in names:  # and on disk, after the stop
        assert PersonalLayer.load(model, users / f"{u}.nwp").messages == 4


def test_concurrent_clients_across_evictions_lose_nothing(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "users"
    names = [f"u{i}" for i in range(5)]
    seen: dict[str, list[int]] = {u: [] for u in names}
    errors: list[Any] = []
    lock = threading.Lock()

    def work(n: int) -> None:
        c = Client(path)
        try:
            for i in range(12):
                u = names[(n + i) % len(names)]  # every thread visits every user, so users are shared and evicted
                answer = c.call(op="learn", user=u, text=f"thread {n} message {i} about the truing stand")
                s = c.call(op="suggest", user=u, text="the tru")
                with lock:
                    if not answer.get("ok") or not s.get("ok"):
                        errors.append((answer, s))
                    else:
                        seen[u].append(answer["messages"])
        finally:
            c.close()

    with running(model, short_dir, users, max_open_users=2) as (server, path):
        threads = [threading.Thread(target=work, args=(n,)) for n in range(6)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(WAIT)
        assert not any(t.is_alive() for t in threads)
        assert errors == []
        assert server.layers_closed > 0
        total = 6 * 12 // len(names)
        for u in names:
            # one learn per answer, each seeing a distinct count: no change lost, no layer opened twice
            assert sorted(seen[u]) == list(range(1, len(seen[u]) + 1)), (u, seen[u])
        assert sum(len(v) for v in seen.values()) == 6 * 12
    for u in names:
        assert PersonalLayer.load(model, users / f"{u}.nwp").messages == len(seen[u]) >= total


def test_each_change_answers_the_state_it_made(
    model: nextword.Model, short_dir: Path, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Concurrent learns for one user: each answer's message count is its own, not a later request's.

    The window between a change and reading the state for its answer is widened on purpose
    (a layer whose save takes a while, as with a journal under a file lock).
    """
    import time as _time

    real_learn = PersonalLayer.learn

    def slow_learn(self: PersonalLayer, message: str, **kw: Any) -> Any:
        result = real_learn(self, message, **kw)
        _time.sleep(0.005)
        return result

    monkeypatch.setattr(PersonalLayer, "learn", slow_learn)
    counts: list[int] = []

    def work(n: int) -> None:
        c = Client(path)
        try:
            for i in range(6):
                counts.append(c.call(op="learn", user="shared", text=f"client {n} note {i}")["messages"])
        finally:
            c.close()

    with running(model, short_dir, tmp_path / "users") as (_, path):
        threads = [threading.Thread(target=work, args=(n,)) for n in range(4)]
        for t in threads:
            t.start()
        for t in threads:
            t.join(WAIT)
    assert sorted(counts) == list(range(1, 25))


def test_max_open_users_must_be_positive(model: nextword.Model, short_dir: Path) -> None:
    for bad in (0, -1, 2.5, True):
        with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as sock:
            with pytest.raises(nextword.InvalidArgumentError, match="max_open_users"):
                Server(model, sock, max_open_users=bad)  # type: ignore[arg-type]


def test_connections_beyond_the_cap_get_busy(model: nextword.Model, short_dir: Path) -> None:
    with running(model, short_dir, None, max_clients=2) as (_, path):
        a, b = Client(path), Client(path)
        assert a.call(op="info")["ok"] and b.call(op="info")["ok"]  # both are being served
        c = Client(path)
        assert c.read()["error"]["code"] == "busy"
        assert c.file.readline() == b""
        c.close()
        a.close()
        assert b.call(id=1, op="suggest", text="the ")["ok"]
        b.close()


# -- names and addresses -------------------------------------------------------------------------


@settings(max_examples=300, deadline=None)
@given(st.text(min_size=0, max_size=70))
def test_accepted_user_names_stay_inside_the_users_directory(name: str) -> None:
    if valid_user(name):
        users = Path("/srv/users")
        target = (users / (name + ".nwp")).resolve()
        assert target.parent == users.resolve() and "/" not in name and name not in (".", "..")
        assert name == name.lower() and 1 <= len(name) <= 64


def test_user_name_rule_examples() -> None:
    assert all(valid_user(n) for n in ("ana", "user_7", "a.b-c", "0", "x" * 64))
    assert not any(valid_user(n) for n in ("", "..", ".", "-rf", "a/b", "Ana", "x" * 65, "a b", "é", None, 3))


def test_tcp_refuses_non_loopback_hosts() -> None:
    with pytest.raises(nextword.InvalidArgumentError, match="0.0.0.0"):
        listen_tcp("0.0.0.0", 0)


def test_unix_socket_path_that_is_a_file_is_left_alone(short_dir: Path) -> None:
    f = short_dir / "s.sock"
    f.write_text("not a socket")
    with pytest.raises(FileExistsError):
        listen_unix(f)
    assert f.read_text() == "not a socket"


def test_stale_socket_file_is_replaced(model: nextword.Model, short_dir: Path) -> None:
    path = short_dir / "s.sock"
    old = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    old.bind(str(path))  # bound, never listening: what a killed server leaves behind
    old.close()
    assert path.exists()
    with running(model, short_dir, None) as (_, p):
        c = Client(p)
        assert c.call(op="info")["ok"]
        c.close()


# -- the command: subprocess, signals, restart, TCP ---------------------------------------------------


def start(*args: str) -> tuple[subprocess.Popen[str], dict[str, Any]]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.Popen(
        [sys.executable, "-m", "nextword", "serve", *args],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env,
    )
    assert proc.stdout is not None
    line = proc.stdout.readline()  # blocks until the server is ready (or has failed)
    if not line:
        proc.wait(WAIT)
        raise AssertionError(f"server did not start: {proc.stderr.read() if proc.stderr else ''}")
    ready = json.loads(line)
    assert ready["event"] == "ready" and ready["pid"] == proc.pid
    return proc, ready


def stop(proc: subprocess.Popen[str], sig: int) -> dict[str, Any]:
    proc.send_signal(sig)
    out, err = proc.communicate(timeout=WAIT)
    assert proc.returncode == 0, err
    assert err == ""
    return json.loads(out.splitlines()[-1])


def test_sigterm_saves_layers_removes_socket_and_restart_keeps_them(
    model_path: Path, model: nextword.Model, short_dir: Path, tmp_path: Path
) -> None:
    sock, users = short_dir / "s.sock", tmp_path / "users"
    proc, ready = start(str(model_path), "--socket", str(sock), "--users", str(users))
    try:
        assert ready["socket"] == str(sock)
        assert sock.exists() and (sock.stat().st_mode & 0o777) == 0o600  # personal data: owner only
        c = Client(sock)
        for m in ["Zorbington Lane ride", "the Zorbington Lane shop", "Zorbington Lane at noon"]:
            assert c.call(op="learn", user="ana", text=m)["ok"]
        before = as_pairs(c.call(op="suggest", user="ana", text="at Zo"))
        c.close()
    finally:
        report = stop(proc, signal.SIGTERM)
    assert report == {"event": "stopped", "requests": 4, "layers_saved": 1, "connections_cut": 0}
    assert not sock.exists()
    assert before and before[0][0] == "Zorbington"  # a word the base model has never seen
    assert model.suggest("at Zo") == [] or model.suggest("at Zo")[0].word != "Zorbington"

    proc, _ = start(str(model_path), "--socket", str(sock), "--users", str(users))
    try:
        c = Client(sock)
        after = as_pairs(c.call(op="suggest", user="ana", text="at Zo"))
        assert c.call(op="info", user="ana")["user"]["messages"] == 3
        c.close()
    finally:
        stop(proc, signal.SIGINT)
    assert after == before == expected(PersonalLayer.load(model, users / "ana.nwp").suggest("at Zo"))


def test_command_max_open_users_is_applied(model_path: Path, model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    sock, users = short_dir / "s.sock", tmp_path / "users"
    proc, _ = start(str(model_path), "--socket", str(sock), "--users", str(users), "--max-open-users", "1")
    try:
        c = Client(sock)
        for n in range(3):
            for u in ("ana", "bo", "cy"):
                assert c.call(op="learn", user=u, text=f"Harbor Lane note {n}")["messages"] == n + 1
        c.close()
    finally:
        report = stop(proc, signal.SIGTERM)
    assert report["layers_saved"] == 1  # only the last user's layer was still open
    assert [PersonalLayer.load(model, users / f"{u}.nwp").messages for u in ("ana", "bo", "cy")] == [3, 3, 3]


def test_tcp_on_loopback_port_zero(model_path: Path, model: nextword.Model) -> None:
    proc, ready = start(str(model_path), "--tcp", "127.0.0.1:0")
    try:
        assert ready["host"] == "127.0.0.1" and ready["port"] > 0 and ready["tcp"] == f"127.0.0.1:{ready['port']}"
        c = Client(("127.0.0.1", ready["port"]))
        for q in demo_queries(20, seed=9):
            assert as_pairs(c.call(op="suggest", text=q, k=5)) == expected(model.suggest(q, 5))
        c.close()
    finally:
        report = stop(proc, signal.SIGTERM)
    assert report["requests"] == 20


def run_cli(*args: str) -> subprocess.CompletedProcess[str]:
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    return subprocess.run([sys.executable, "-m", "nextword", "serve", *args], capture_output=True, text=True, env=env, timeout=WAIT)


def test_command_errors_are_one_line_with_exit_codes(model_path: Path, short_dir: Path) -> None:
    cases = [
        ((str(model_path), "--tcp", "0.0.0.0:0"), 2, "0.0.0.0"),
        ((str(model_path), "--tcp", "localhost"), 2, "'localhost'"),
        ((str(model_path), "--tcp", "127.0.0.1:0", "--socket", str(short_dir / "a")), 2, "--socket"),
        ((str(model_path), "--socket", str(short_dir / "a"), "--allow-non-loopback"), 2, "--allow-non-loopback"),
        ((str(model_path), "--max-line-bytes", "0"), 2, "0"),
        ((str(model_path), "--max-open-users", "0"), 2, "--max-open-users"),
        ((str(model_path), "--request-timeout", "soon"), 2, "soon"),
        ((str(model_path), "--socket", str(short_dir / ("d" * 120))), 2, "too long"),
        ((str(short_dir / "missing.nwm"), "--socket", str(short_dir / "a")), 1, "missing.nwm"),
    ]
    (short_dir / "file").write_text("keep")
    cases.append(((str(model_path), "--socket", str(short_dir / "file")), 1, "not a socket"))
    for args, code, needle in cases:
        r = run_cli(*args)
        assert r.returncode == code, (args, r.stderr)
        assert r.stdout == "" and len(r.stderr.splitlines()) == 1 and r.stderr.startswith("nextword: error:"), r.stderr
        assert needle in r.stderr, (needle, r.stderr)
    assert (short_dir / "file").read_text() == "keep"


def test_users_directory_is_created_owner_only(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    users = tmp_path / "data" / "nextword" / "users"  # two missing parents
    old = os.umask(0o002)  # a permissive umask must not widen a directory of personal data
    try:
        with running(model, short_dir, users) as (_, path):
            c = Client(path)
            assert c.call(op="learn", user="ana", text="Harbor Lane at noon")["ok"]
            c.close()
    finally:
        os.umask(old)
    for d in (users, users.parent, users.parent.parent):
        assert d.is_dir() and (d.stat().st_mode & 0o777) == 0o700, (d, oct(d.stat().st_mode))
    assert (users / "ana.nwp").exists()


def test_users_path_that_is_a_file_is_a_one_line_error(model_path: Path, short_dir: Path) -> None:
    f = short_dir / "users.txt"
    f.write_text("keep")
    sock = short_dir / "s.sock"
    for users in (f, f / "sub"):
        r = run_cli(str(model_path), "--socket", str(sock), "--users", str(users))
        assert r.returncode == 1 and r.stdout == "", r.stderr
        assert len(r.stderr.splitlines()) == 1 and r.stderr.startswith("nextword: error: "), r.stderr
        assert str(users) in r.stderr and "not a directory" in r.stderr.lower(), r.stderr
        assert not sock.exists()  # checked before listening: no socket file left behind
    assert f.read_text() == "keep"


def test_a_second_server_on_a_live_socket_is_refused(model_path: Path, short_dir: Path) -> None:
    sock = short_dir / "s.sock"
    proc, _ = start(str(model_path), "--socket", str(sock))
    try:
        r = run_cli(str(model_path), "--socket", str(sock))
        assert r.returncode == 1 and "already listening" in r.stderr
        c = Client(sock)  # the first server still works
        assert c.call(op="info")["ok"]
        c.close()
    finally:
        stop(proc, signal.SIGTERM)


# -- the protocol document stays true -----------------------------------------------------------------

PROTOCOL = (ROOT / "docs" / "PROTOCOL.md").read_text(encoding="utf-8")


def test_protocol_doc_names_every_op_and_error_code() -> None:
    headings = [ln for ln in PROTOCOL.splitlines() if ln.startswith("### ")]
    for op in OPS:
        assert any(f"`{op}`" in h for h in headings), op
    for code in ERROR_CODES:
        assert f"| `{code}` |" in PROTOCOL, code


def test_protocol_doc_session_is_what_the_server_answers(model: nextword.Model, short_dir: Path, tmp_path: Path) -> None:
    block = PROTOCOL.split("<!-- session:begin -->", 1)[1].split("<!-- session:end -->", 1)[0]
    lines = [ln for ln in block.splitlines() if ln.startswith(("> ", "< "))]
    assert len(lines) >= 30 and [ln[0] for ln in lines] == [">", "<"] * (len(lines) // 2)
    with running(model, short_dir, tmp_path / "users") as (_, path):
        c = Client(path)
        for sent, shown in zip(lines[::2], lines[1::2]):
            c.send_raw(sent[2:].encode() + b"\n")
            got, want = c.read(), json.loads(shown[2:])
            if "model" in got:  # the one field that depends on where the model file is
                assert Path(got["model"].pop("path")).name == want["model"].pop("path")
            assert got == want, sent
        c.close()


# -- the C client ------------------------------------------------------------------------------


@pytest.fixture(scope="module")
def c_client(tmp_path_factory: pytest.TempPathFactory) -> Path:
    cc = shutil.which(os.environ.get("CC", "cc")) or shutil.which("gcc") or shutil.which("clang")
    if cc is None:
        pytest.skip("no C compiler (cc, gcc or clang) on PATH: examples/client.c is not built or run")
    exe = tmp_path_factory.mktemp("cclient") / "nextword-client"
    r = subprocess.run(
        [cc, "-std=c99", "-Wall", "-Wextra", "-Werror", "-O2", "-o", str(exe), str(ROOT / "examples" / "client.c")],
        capture_output=True, text=True, timeout=WAIT,
    )
    assert r.returncode == 0, r.stderr
    return exe


def loopback_v6() -> bool:
    try:
        with socket.socket(socket.AF_INET6, socket.SOCK_STREAM) as probe:
            probe.bind(("::1", 0))
        return True
    except OSError:
        return False


@contextmanager
def c_client_server(
    transport: str, model: nextword.Model, sock_dir: Path, users: Path | None
) -> Iterator[tuple[list[str], str]]:
    """A server on ``transport`` and the C client's option naming it (and how its errors name it)."""
    if transport == "unix":
        with running(model, sock_dir, users) as (_, path):
            yield ["-s", str(path)], str(path)
        return
    if transport == "tcp6" and not loopback_v6():
        pytest.skip("no IPv6 loopback (::1) on this machine")
    host = "127.0.0.1" if transport == "tcp" else "::1"
    with serving(model, listen_tcp(host, 0), users) as server:
        port = server.address()["port"]
        where = f"{host}:{port}" if transport == "tcp" else f"[{host}]:{port}"
        yield ["-t", where], where


@pytest.mark.parametrize("transport", ["unix", "tcp", "tcp6"])
def test_c_client_prints_what_model_suggest_returns(
    transport: str, c_client: Path, model: nextword.Model, short_dir: Path, tmp_path: Path
) -> None:
    texts = ["See you at the ", "Repair night on Th", 'He said "bring the tr', "a\\b\tthanks for ", "Café at the ", "pri", ""]
    texts += demo_queries(10, seed=21)
    users = tmp_path / "users"
    with c_client_server(transport, model, short_dir, users) as (where, shown):
        for i, text in enumerate(texts):
            k = 1 + i % 5
            r = subprocess.run([str(c_client), *where, "-k", str(k), text], capture_output=True, timeout=WAIT)
            assert r.returncode == 0, r.stderr
            lines = r.stdout.decode("utf-8").splitlines()
            assert len(lines) == 1
            answer = json.loads(lines[0])
            assert answer["id"] == 1 and as_pairs(answer) == expected(model.suggest(text, k)), text
        # with a user, the answer is that user's layer's
        layer = PersonalLayer(model)  # the oracle, fed the same messages
        for _ in range(2):
            r = subprocess.run([str(c_client), *where, "-u", "ana", "x"], capture_output=True, timeout=WAIT)
            assert r.returncode == 0, r.stderr  # a user without a layer: the base answers
            layer.learn("the Zorbington Lane ride")
            assert learn_via_socket(where, "ana", "the Zorbington Lane ride")["ok"]
        r = subprocess.run([str(c_client), *where, "-u", "ana", "at Zo"], capture_output=True, timeout=WAIT)
        assert as_pairs(json.loads(r.stdout)) == expected(layer.suggest("at Zo", 3)) and b"Zorbington" in r.stdout
        # an error answer: printed, exit status 1
        r = subprocess.run([str(c_client), *where, "-u", "../ana", "x"], capture_output=True, timeout=WAIT)
        assert r.returncode == 1 and json.loads(r.stdout)["error"]["code"] == "bad_field"
    # no server: one line on stderr naming where, exit status 1
    r = subprocess.run([str(c_client), *where, "the "], capture_output=True, text=True, timeout=WAIT)
    assert r.returncode == 1 and r.stdout == "" and shown in r.stderr and len(r.stderr.splitlines()) == 1, r.stderr


def learn_via_socket(where: list[str], user: str, text: str) -> dict[str, Any]:
    if where[0] == "-s":
        c = Client(Path(where[1]))
    else:
        host, port = where[1].rsplit(":", 1)
        c = Client((host.strip("[]"), int(port)))
    try:
        return c.call(op="learn", user=user, text=text)
    finally:
        c.close()


def test_c_client_usage_mistakes_exit_2(c_client: Path) -> None:
    cases = [
        (["-k", "zero", "the "], "zero"),
        (["-t", "127.0.0.1", "the "], "'127.0.0.1'"),  # no port
        (["-t", "127.0.0.1:70000", "the "], "70000"),
        (["-t", "::1:7070", "the "], "::1:7070"),  # IPv6 needs brackets
        (["-t", "192.0.2.1:7070", "the "], "not a loopback address"),  # TEST-NET-1 (RFC 5737): never loopback
        (["-s", "a.sock", "-t", "127.0.0.1:7070", "the "], "usage"),
        (["the ", "extra"], "usage"),
    ]
    for args, needle in cases:
        r = subprocess.run([str(c_client), *args], capture_output=True, text=True, timeout=WAIT)
        assert r.returncode == 2 and r.stdout == "" and needle in r.stderr, (args, r.stderr)
