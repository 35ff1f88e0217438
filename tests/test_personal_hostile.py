"""Hostile input to the personal layer: crafted files with valid checksums, lone surrogates,
failed writes. A layer file is untrusted: anything malformed is ModelFormatError, never
another exception, a NaN probability or unbounded work; bad arguments are
InvalidArgumentError naming the value, and memory is never ahead of the disk.

Oracles: the file layout in docs/FORMAT.md (re-implemented here with struct/zlib/msgpack),
"common practice" for what a well-formed count is (finite, >= 0), and the mixture summing
to 1 over every outcome (the definition of a distribution).
"""

from __future__ import annotations

import errno
import json
import math
import os
import struct
import subprocess
import sys
import zlib
from pathlib import Path
from typing import Any

import msgpack
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword import InvalidArgumentError, ModelFormatError
from nextword.personal import JOURNAL_MAGIC, JOURNAL_SUFFIX, PERSONAL_MAGIC, PersonalLayer
from nextword.store import atomic_write

ROOT = Path(__file__).resolve().parent.parent
ENV = dict(os.environ, PYTHONPATH=str(ROOT))


@pytest.fixture(scope="module")
def good_payload(base: nextword.Model, tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    layer = PersonalLayer(base, half_life_messages=50, blocklist=["secret"])
    for m in ("Ask Zanele about the zorbing trip", "the zorbing trip is on Friday", "Zanele booked it. 7 bikes"):
        layer.learn(m)
    path = tmp_path_factory.mktemp("g") / "good.nwp"
    layer.save(path)
    data = path.read_bytes()
    return msgpack.unpackb(data[24:], raw=False)  # header: 8s magic, 2×u16 version, u64 length, u32 crc


def _snapshot_bytes(payload: Any, *, length: int | None = None) -> bytes:
    body = msgpack.packb(payload, use_bin_type=True)
    n = len(body) if length is None else length
    return struct.pack("<8sHHQI", PERSONAL_MAGIC, 1, 1, n, zlib.crc32(body)) + body


def _journal_bytes(snapshot_id: int, records: list[bytes]) -> bytes:
    head = struct.pack("<8sHHQ", JOURNAL_MAGIC, 1, 0, snapshot_id)
    out = head + struct.pack("<I", zlib.crc32(head))
    for body in records:
        out += struct.pack("<II", len(body), zlib.crc32(body)) + body
    return out


def _copy(p: Any) -> Any:
    return msgpack.unpackb(msgpack.packb(p, use_bin_type=True), raw=False)


def _assert_usable(layer: PersonalLayer) -> None:
    """A layer that loaded must behave: finite counts, a distribution, working changes."""
    assert math.isfinite(layer.tokens) and layer.tokens >= 0
    assert 0 <= layer.weight <= 1
    outcomes = layer.vocabulary()
    for w in outcomes:
        assert math.isfinite(layer.count(w)) and layer.count(w) >= 0, w
    total = math.fsum(layer.prob(w, None) for w in outcomes)
    assert total == pytest.approx(1.0, abs=1e-9)
    for s in layer.suggest("the ", 5):
        assert math.isfinite(s.prob) and 0 <= s.prob <= 1
    layer.learn("the zorbing trip")
    layer.forget("zorbing")


# -- crafted snapshots -----------------------------------------------------------------------


def _mutated(good: dict[str, Any], where: str, value: Any) -> dict[str, Any]:
    p = _copy(good)
    if where.startswith("settings."):
        p["settings"][where.split(".", 1)[1]] = value
    elif where == "unigram.zorbing":
        p["unigram"]["zorbing"] = value
    elif where == "bigram.the.zorbing":
        p["bigram"]["the"]["zorbing"] = value
    elif where == "spelling.zanele":
        p["spelling"]["zanele"] = value
    else:
        p[where] = value
    return p


LISTED = [
    ("messages", math.inf),  # once raised OverflowError
    ("messages", -1),
    ("messages", 2.5),
    ("unigram.zorbing", math.inf),
    ("unigram.zorbing", math.nan),  # once gave prob=nan in suggestions
    ("unigram.zorbing", -3.0),
    ("unigram.zorbing", "7"),
    ("unigram.zorbing", True),
    ("bigram.the.zorbing", math.nan),
    ("bigram.the.zorbing", -1),
    ("blocklist", "x"),  # once split into characters
    ("blocklist", ["Secret"]),  # not a folded key
    ("blocklist", ["two words"]),
    ("blocklist", [7]),
    ("spelling.zanele", "Zorbing"),  # spelling of another word
    ("spelling.zanele", 5),
    ("settings.lam", 2.0),
    ("settings.lam", math.nan),
    ("settings.min_uses", 0),
    ("settings.strength", math.inf),
    ("settings.half_life_messages", -1.0),
    ("settings.max_entries", 10**12),
    ("settings.max_entries", 4),
    ("settings", [1, 2]),
    ("last_time", math.nan),
    ("snapshot_id", -5),
    ("unigram", [["zorbing", 1.0]]),
    ("bigram", {"the": []}),
]


@pytest.mark.parametrize("where,value", LISTED, ids=[f"{w}={v!r}" for w, v in LISTED])
def test_listed_crafted_fields_are_model_format_errors(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path, where: str, value: Any
) -> None:
    path = tmp_path / "x.nwp"
    path.write_bytes(_snapshot_bytes(_mutated(good_payload, where, value)))
    with pytest.raises(ModelFormatError, match="x.nwp"):
        PersonalLayer.load(base, path)
    with pytest.raises(ModelFormatError):
        PersonalLayer.open(base, path)
    assert path.read_bytes() == _snapshot_bytes(_mutated(good_payload, where, value))  # never replaced


def test_malformed_keys_and_inconsistent_maps_are_refused(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path
) -> None:
    path = tmp_path / "x.nwp"
    cases = []
    for key in ("Zorbing", "two words", "<x>", "", "tab\there"):
        p = _copy(good_payload)
        p["unigram"][key] = 1.0
        cases.append(p)
    p = _copy(good_payload)
    p["bigram"]["the"]["ghost"] = 1.0  # a pair naming a word with no count
    cases.append(p)
    p = _copy(good_payload)
    p["bigram"]["ghost"] = {"the": 1.0}  # a history that is no word of the layer
    cases.append(p)
    p = _copy(good_payload)
    p["spelling"]["ghost"] = "Ghost"  # a spelling for no word
    cases.append(p)
    p = _copy(good_payload)
    del p["unigram"]
    cases.append(p)
    cases += [[1, 2, 3], "payload", None]
    for payload in cases:
        path.write_bytes(_snapshot_bytes(payload))
        with pytest.raises(ModelFormatError):
            PersonalLayer.load(base, path)


def test_more_entries_than_max_entries_or_an_oversized_payload_is_refused(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path
) -> None:
    path = tmp_path / "big.nwp"
    p = _copy(good_payload)
    p["settings"]["max_entries"] = 1000
    p["unigram"].update({f"w{i}": 1.0 for i in range(1000)})  # once loaded in full, then the first learn never ended
    path.write_bytes(_snapshot_bytes(p))
    with pytest.raises(ModelFormatError, match="max_entries"):
        PersonalLayer.load(base, path)
    # the header announces more than any layer file may hold: refused before reading it
    path.write_bytes(_snapshot_bytes(good_payload, length=1 << 40))
    with pytest.raises(ModelFormatError, match="too large"):
        PersonalLayer.load(base, path)


special = st.sampled_from([math.nan, math.inf, -math.inf, -1, -1.5, 1e308, 2**63, 0, "x", "", [], {}, None, True])
values = special | st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**64 - 1) | st.floats() | st.text(max_size=6)
    | st.binary(max_size=4),
    lambda ch: st.lists(ch, max_size=3) | st.dictionaries(st.text(max_size=5), ch, max_size=3),
    max_leaves=8,
)
FIELDS = ["settings", "messages", "unigram", "bigram", "spelling", "blocklist", "last_time", "snapshot_id",
          "settings.min_uses", "settings.strength", "settings.max_weight", "settings.lam",
          "settings.half_life_messages", "settings.half_life_days", "settings.max_entries",
          "unigram.zorbing", "bigram.the.zorbing", "spelling.zanele"]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(st.tuples(st.sampled_from(FIELDS), values), min_size=1, max_size=3), st.dictionaries(st.text(max_size=5), values, max_size=2))
def test_any_crafted_snapshot_loads_usably_or_is_a_model_format_error(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path, changes: list[tuple[str, Any]], extra: dict[str, Any]
) -> None:
    p = good_payload
    for where, value in changes:
        try:
            p = _mutated(p, where, value)
        except (TypeError, KeyError):  # an earlier change replaced the container: put a random one instead
            p = _copy(p)
            p[where.split(".")[0]] = value
    for k, v in extra.items():
        p.setdefault(k, v)
    path = tmp_path / "h.nwp"
    path.write_bytes(_snapshot_bytes(p))
    try:
        layer = PersonalLayer.load(base, path)
    except ModelFormatError:
        return
    _assert_usable(layer)


# -- crafted journals -------------------------------------------------------------------------


def _layer_with_journal(good: dict[str, Any], path: Path, records: list[Any]) -> None:
    """A valid snapshot (id 42) and a journal extending it with ``records`` (each CRC-valid)."""
    p = _copy(good)
    p["snapshot_id"] = 42
    path.write_bytes(_snapshot_bytes(p))
    Path(str(path) + JOURNAL_SUFFIX).write_bytes(_journal_bytes(42, [msgpack.packb(r, use_bin_type=True) for r in records]))


BAD_RECORDS = [
    {"op": "launch"},
    {"op": "forget", "key": "two words"},
    {"op": "block", "key": "Upper"},
    {"op": "clear", "extra": 1},
    {"op": "learn", "when": None, "pairs": [["<s>", "zorbing", 0]], "set": {}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["<s>", "zorbing", 2**40]], "set": {}, "default": {}},
    {"op": "learn", "when": math.nan, "pairs": [], "set": {}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["<s>", "a b", 1]], "set": {}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["</s>", "zorbing", 1]], "set": {}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["<s>", "zorbing", 1]], "set": {"zorbing": "Trip"}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["<s>", "zorbing", 1]], "set": {}, "default": {"other": "Other"}},
    {"op": "learn", "when": None, "pairs": "zorbing", "set": {}, "default": {}},
    {"op": "learn", "when": None, "pairs": [["<s>", "</s>", 1]], "set": {}, "default": {"</s>": "</s>"}},
    {"op": "learn", "when": None, "pairs": [["<s>", "z" * 300, 1]], "set": {}, "default": {}},
    ["op", "learn"],
]


@pytest.mark.parametrize("record", BAD_RECORDS, ids=[str(i) for i in range(len(BAD_RECORDS))])
def test_a_crafted_journal_record_is_a_model_format_error(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path, record: Any
) -> None:
    path = tmp_path / "j.nwp"
    good = {"op": "learn", "when": None, "pairs": [["<s>", "hello", 1], ["hello", "</s>", 1]], "set": {}, "default": {"hello": "Hello"}}
    _layer_with_journal(good_payload, path, [good])
    assert PersonalLayer.load(base, path).count("hello") == pytest.approx(1.0)  # the well-formed record replays
    _layer_with_journal(good_payload, path, [good, record])
    with pytest.raises(ModelFormatError, match="journal"):
        PersonalLayer.load(base, path)
    with pytest.raises(ModelFormatError, match="journal"):
        PersonalLayer.open(base, path)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.one_of(values, st.fixed_dictionaries({"op": st.sampled_from(["learn", "forget", "block", "unblock", "clear"])}, optional={
    "key": values, "when": values, "pairs": st.lists(st.lists(values, min_size=3, max_size=3), max_size=3),
    "set": values, "default": values})))
def test_any_crafted_journal_record_replays_usably_or_is_a_model_format_error(
    base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path, record: Any
) -> None:
    path = tmp_path / "hj.nwp"
    _layer_with_journal(good_payload, path, [record])
    try:
        layer = PersonalLayer.load(base, path)
    except ModelFormatError:
        return
    _assert_usable(layer)


def test_a_torn_journal_tail_is_ignored_then_cut(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "t.nwp"
    with PersonalLayer.open(base, path, create=True) as layer:
        layer.learn("the zorbing trip")
        layer.learn("zorbing again")
    journal = Path(str(path) + JOURNAL_SUFFIX)
    whole = journal.read_bytes()
    for torn in (whole[:-3], whole[:-3] + b"\xff\xff\xff", whole + b"\x05\x00"):
        journal.write_bytes(torn)
        assert PersonalLayer.load(base, path).messages in (1, 2)  # the torn record is the only loss
        with PersonalLayer.open(base, path) as again:
            kept = again.messages
            again.learn("a third message")  # appended after the cut, not after garbage
        assert PersonalLayer.load(base, path).messages == kept + 1


# -- lone surrogates and failed writes -----------------------------------------------------------


def test_lone_surrogates_are_refused_and_never_poison_the_layer(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    layer = PersonalLayer.open(base, path, create=True)
    layer.learn("the zorbing trip")
    for bad, call in (
        ("\\ud800", lambda: layer.block("\ud800")),
        ("\\udcff", lambda: layer.learn("caf\udcff menu")),  # what $'\xff' becomes in argv
        ("\\ud800", lambda: layer.forget("x\ud800")),
        ("\\udcff", lambda: layer.unblock("\udcff")),
    ):
        with pytest.raises(InvalidArgumentError, match=bad.replace("\\", "\\\\")):
            call()
    with pytest.raises(InvalidArgumentError):
        PersonalLayer(base, blocklist=["\ud800"])
    layer.block("Zanele")  # every later change and save still works
    layer.save(path)
    layer.learn("zorbing again")
    back = PersonalLayer.load(base, path)
    assert back.messages == layer.messages == 2 and back.blocklist == layer.blocklist == {"zanele"}


FULL_DISK = r"""
import json, os, resource, signal, sys, nextword
from nextword.personal import PersonalLayer
signal.signal(signal.SIGXFSZ, signal.SIG_IGN)
layer = PersonalLayer.open(nextword.load(sys.argv[1]), sys.argv[2])
layer.learn("the first message")
sizes = [os.path.getsize(p) for p in (sys.argv[2], sys.argv[2] + ".journal") if os.path.exists(p)]
limit = max(sizes) + 8
resource.setrlimit(resource.RLIMIT_FSIZE, (limit, resource.RLIM_INFINITY))
try:
    layer.learn("a second message about zorbing that does not fit on the disk")
    err = None
except OSError as e:
    err = [e.errno, e.filename]
print(json.dumps({"err": err, "messages": layer.messages, "zorbing": layer.count("zorbing")}))
"""


def test_a_change_that_cannot_be_written_changes_nothing_in_memory(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    PersonalLayer.open(base, path, create=True).close()
    r = subprocess.run([sys.executable, "-c", FULL_DISK, base.path, str(path)], capture_output=True, text=True, env=ENV)
    assert r.returncode == 0, r.stderr
    got = json.loads(r.stdout)
    assert got["err"] is not None and got["err"][0] in (errno.EFBIG, errno.ENOSPC)  # refused, or a short write
    assert got["messages"] == 1 and got["zorbing"] == 0  # memory is not ahead of the disk
    assert got["err"][1] in (str(path), str(path) + JOURNAL_SUFFIX)  # the user's file, not a temp file
    back = PersonalLayer.load(base, path)
    assert back.messages == 1 and back.count("zorbing") == 0


def test_atomic_write_errors_name_the_target_and_modes_are_kept(tmp_path: Path) -> None:
    afile = tmp_path / "afile"
    afile.write_text("x")
    with pytest.raises(NotADirectoryError) as e1:
        atomic_write(afile / "model.nwm", [b"data"])  # the parent is a file
    assert e1.value.filename == str(afile / "model.nwm")
    with pytest.raises(FileNotFoundError) as e2:
        atomic_write(tmp_path / "no-such-dir" / "model.nwm", [b"data"])
    assert e2.value.filename == str(tmp_path / "no-such-dir" / "model.nwm")

    def failing() -> Any:
        yield b"abc"
        raise OSError(errno.ENOSPC, "No space left on device")

    with pytest.raises(OSError) as e3:
        atomic_write(tmp_path / "out.nwm", failing())
    assert e3.value.errno == errno.ENOSPC and e3.value.filename == str(tmp_path / "out.nwm")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["afile"]  # no temp file left behind
    if os.geteuid() != 0:  # root may write into a read-only directory
        ro = tmp_path / "ro"
        ro.mkdir(mode=0o500)
        with pytest.raises(PermissionError) as e4:
            atomic_write(ro / "m.nwm", [b"x"])
        assert e4.value.filename == str(ro / "m.nwm")
    old = os.umask(0o022)
    try:
        atomic_write(tmp_path / "a", [b"x"])
        atomic_write(tmp_path / "b", [b"x"], mode=0o600)
    finally:
        os.umask(old)
    assert (tmp_path / "a").stat().st_mode & 0o777 == 0o644 and (tmp_path / "b").stat().st_mode & 0o777 == 0o600


def test_cli_refuses_undecodable_bytes_in_one_line(base: nextword.Model, tmp_path: Path) -> None:
    layer = tmp_path / "me.nwp"
    for action in ("block", "learn", "forget"):
        r = subprocess.run(
            [sys.executable, "-m", "nextword", "personal", str(layer), "--model", base.path, action, b"caf\xff"],
            capture_output=True, text=True, env=ENV,
        )
        assert r.returncode == 2, r.stderr
        assert r.stderr.startswith("nextword: error: ") and r.stderr.count("\n") == 1 and "\\udcff" in r.stderr
    r = subprocess.run([sys.executable, "-m", "nextword", "personal", str(layer), "--model", base.path, "block", "ok"],
                       capture_output=True, text=True, env=ENV)
    assert r.returncode == 0, r.stderr  # the layer still saves


def test_format_md_journal_example_matches_the_writer() -> None:
    """docs/FORMAT.md §12.2 quotes a journal header and record byte by byte: the writer must agree."""
    import re

    from nextword.personal import _journal_header, _learn_record  # the writer's own encoders

    doc = (ROOT / "docs" / "FORMAT.md").read_text(encoding="utf-8")
    quoted = dict(re.findall(r"^(journal-header|learn-record):\n([0-9a-f ]+)$", doc, flags=re.M))
    assert bytes.fromhex(quoted["journal-header"]) == _journal_header(0x0123456789ABCDEF)
    body = msgpack.packb(_learn_record("Hi Ana", None), use_bin_type=True)
    assert bytes.fromhex(quoted["learn-record"]) == struct.pack("<II", len(body), zlib.crc32(body)) + body
    # and an independent decode of the quoted bytes (struct + zlib + msgpack, per the tables)
    head = bytes.fromhex(quoted["journal-header"])
    magic, major, minor, sid, crc = struct.unpack("<8sHHQI", head)
    assert (magic, major, minor, sid, crc) == (JOURNAL_MAGIC, 1, 0, 0x0123456789ABCDEF, zlib.crc32(head[:20]))
    rec = bytes.fromhex(quoted["learn-record"])
    n, c = struct.unpack_from("<II", rec)
    assert n == len(rec) - 8 and c == zlib.crc32(rec[8:])
    assert msgpack.unpackb(rec[8:], raw=False)["pairs"] == [["<s>", "hi", 1], ["ana", "</s>", 1], ["hi", "ana", 1]]


def test_a_version_1_0_file_still_opens_and_learns(base: nextword.Model, good_payload: dict[str, Any], tmp_path: Path) -> None:
    """Files written before the journal (minor version 0, no snapshot_id) keep working."""
    p = _copy(good_payload)
    del p["snapshot_id"]
    body = msgpack.packb(p, use_bin_type=True)
    path = tmp_path / "old.nwp"
    path.write_bytes(struct.pack("<8sHHQI", PERSONAL_MAGIC, 1, 0, len(body), zlib.crc32(body)) + body)
    before = PersonalLayer.load(base, path)
    assert before.messages == 3 and before.blocklist == {"secret"}
    with PersonalLayer.open(base, path) as layer:
        layer.learn("the zorbing trip")
    after = PersonalLayer.load(base, path)
    assert after.messages == 4 and after.count("zorbing") == pytest.approx(before.count("zorbing") * 2 ** (-1 / 50) + 1)
