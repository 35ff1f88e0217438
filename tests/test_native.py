"""The native C runtime (native/) answers exactly like the Python library, and survives hostile files.

The library is built here from source (native/Makefile) into a temporary directory and called
through ctypes. The reference for every answer is ``nextword.Model`` (the Python reader of the
same file, docs/FORMAT.md); the text rules are compared with ``nextword.text`` and Python's own
``str`` methods, code point by code point. Real text: ``pydoc_data.topics`` (shipped with
CPython), split by the project's one held-out rule (``evaluate.is_held_out``): models train on
the training part, queries come from the held-out part.

If the build is impossible (no compiler, no libmarisa-dev / libutf8proc-dev) the module is
skipped with the reason — unless ``NEXTWORD_REQUIRE_NATIVE=1`` (set by .ci/run when it could
install the build dependencies), then it fails.
"""

from __future__ import annotations

import ctypes
import os
import random
import shutil
import struct
import subprocess
import sys
import unicodedata
import zlib
from pathlib import Path
from typing import Any, Iterator

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword import text as nwtext
from nextword.evaluate import is_held_out
from nextword.prune import prune_model
from nextword.store import ENTRY, HEADER, atomic_write, rewrite_model

ROOT = Path(__file__).resolve().parent.parent
NATIVE = ROOT / "native"
REQUIRE = os.environ.get("NEXTWORD_REQUIRE_NATIVE") == "1"
MAX_K = 64


def _unavailable(why: str) -> None:
    if REQUIRE:
        pytest.fail(f"NEXTWORD_REQUIRE_NATIVE=1 but the native library cannot be built: {why}")
    pytest.skip(f"native library not built: {why}")


def _make(build: Path, *targets: str, timeout: int = 300) -> None:
    if shutil.which("make") is None or shutil.which("cc") is None or shutil.which("c++") is None:
        _unavailable("make, cc or c++ is missing (Debian: build-essential)")
    for header in ("/usr/include/marisa.h", "/usr/include/utf8proc.h"):
        if not Path(header).exists():
            _unavailable(f"{header} is missing (Debian: libmarisa-dev libutf8proc-dev)")
    proc = subprocess.run(
        ["make", "-C", str(NATIVE), f"BUILD={build}", *targets], capture_output=True, text=True, timeout=timeout
    )
    if proc.returncode != 0:
        _unavailable(f"make failed:\n{proc.stdout[-2000:]}\n{proc.stderr[-2000:]}")


class Suggestion(ctypes.Structure):
    _fields_ = [("word", ctypes.c_char_p), ("len", ctypes.c_size_t), ("prob", ctypes.c_double)]


class Error(ctypes.Structure):
    _fields_ = [("code", ctypes.c_int), ("message", ctypes.c_char * 320)]


class Parsed(ctypes.Structure):
    _fields_ = [
        ("previous_kind", ctypes.c_int), ("before_kind", ctypes.c_int),
        ("previous_off", ctypes.c_size_t), ("previous_len", ctypes.c_size_t),
        ("before_off", ctypes.c_size_t), ("before_len", ctypes.c_size_t),
        ("prefix_off", ctypes.c_size_t), ("prefix_len", ctypes.c_size_t),
        ("tail", ctypes.c_char * 4352), ("tail_len", ctypes.c_size_t),
    ]  # fmt: skip


class Native:
    """A small ctypes binding of native/include/nextword.h."""

    def __init__(self, path: Path) -> None:
        lib = self.lib = ctypes.CDLL(str(path))
        vp, sz, cp = ctypes.c_void_p, ctypes.c_size_t, ctypes.c_char_p
        lib.nw_open.argtypes = [cp, ctypes.POINTER(vp), ctypes.POINTER(Error)]
        lib.nw_close.argtypes = [vp]
        lib.nw_session_new.argtypes = [vp, ctypes.POINTER(vp), ctypes.POINTER(Error)]
        lib.nw_session_free.argtypes = [vp]
        lib.nw_suggest.argtypes = [vp, cp, sz, ctypes.c_int, ctypes.POINTER(Suggestion), ctypes.POINTER(sz),
                                   ctypes.c_char_p, sz, ctypes.POINTER(Error)]
        lib.nw_prob.argtypes = [vp, cp, ctypes.POINTER(cp), sz, ctypes.POINTER(ctypes.c_double), ctypes.POINTER(Error)]
        lib.nw_fold.argtypes = [cp, sz, ctypes.c_char_p, sz, ctypes.POINTER(sz)]
        lib.nw_parse_typed.argtypes = [cp, sz, ctypes.POINTER(Parsed)]
        lib.nw_char_class.argtypes = [ctypes.c_uint32]
        lib.nw_char_class.restype = ctypes.c_uint
        lib.nw_char_upper.argtypes = [ctypes.c_uint32, ctypes.POINTER(ctypes.c_uint32)]
        lib.nw_unicode_version.restype = ctypes.c_char_p
        self.out = (Suggestion * MAX_K)()
        self.buf = ctypes.create_string_buffer(1 << 16)

    def open(self, path: Path) -> tuple[int, str, Any]:
        m, err = ctypes.c_void_p(), Error()
        code = self.lib.nw_open(str(path).encode(), ctypes.byref(m), ctypes.byref(err))
        return code, err.message.decode("utf-8", "replace"), m

    def session(self, model: Any) -> Any:
        s, err = ctypes.c_void_p(), Error()
        assert self.lib.nw_session_new(model, ctypes.byref(s), ctypes.byref(err)) == 0, err.message
        return s

    def suggest(self, s: Any, typed: str, k: int) -> tuple[int, list[tuple[str, float]]]:
        data = typed.encode("utf-8")
        n, err = ctypes.c_size_t(), Error()
        code = self.lib.nw_suggest(s, data, len(data), k, self.out, ctypes.byref(n), self.buf, len(self.buf), ctypes.byref(err))
        if code:
            return code, []
        return 0, [(self.out[i].word[: self.out[i].len].decode("utf-8"), self.out[i].prob) for i in range(n.value)]

    def prob(self, s: Any, word: str, history: list[str | None]) -> tuple[int, float]:
        hist = (ctypes.c_char_p * max(1, len(history)))(*[None if h is None else h.encode() for h in history])
        p, err = ctypes.c_double(), Error()
        code = self.lib.nw_prob(s, word.encode(), hist, len(history), ctypes.byref(p), ctypes.byref(err))
        return code, p.value

    def fold(self, word: str) -> str:
        data = word.encode("utf-8", "surrogatepass")
        n = ctypes.c_size_t()
        assert self.lib.nw_fold(data, len(data), self.buf, len(self.buf), ctypes.byref(n)) == 0
        return self.buf.raw[: n.value].decode("utf-8")

    def parse(self, typed: str) -> tuple[tuple[str, ...], str]:
        data = typed.encode("utf-8")
        p = Parsed()
        assert self.lib.nw_parse_typed(data, len(data), ctypes.byref(p)) == 0
        tail = p.tail[: p.tail_len]

        def tok(kind: int, off: int, ln: int) -> str:
            return tail[off : off + ln].decode("utf-8") if kind == 0 else {1: nwtext.BOS, 2: nwtext.UNK}[kind]

        prev = tok(p.previous_kind, p.previous_off, p.previous_len)
        hist = (prev,) if p.before_kind == 3 else (tok(p.before_kind, p.before_off, p.before_len), prev)
        return hist, tail[p.prefix_off : p.prefix_off + p.prefix_len].decode("utf-8")


@pytest.fixture(scope="module")
def build_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    build = tmp_path_factory.mktemp("native-build")
    _make(build)
    return build


@pytest.fixture(scope="module")
def native(build_dir: Path) -> Native:
    return Native(build_dir / "libnextword.so")


# -- real text, split by the project's held-out rule -------------------------------------------


@pytest.fixture(scope="module")
def corpus() -> tuple[list[str], list[str]]:
    from pydoc_data.topics import topics  # real English shipped with CPython (as tests/conftest.py)

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines() if ln.strip()]
    train = [ln for ln in lines if not is_held_out(ln, 10)]
    held = [ln for ln in lines if is_held_out(ln, 10)]
    return train, held


KINDS = {
    "jm2": dict(),
    "kn2": dict(smoothing="kn", skyband_min=8),
    "jm3": dict(order=3),
    "kn3": dict(smoothing="kn", order=3, skyband_min=8, skyband_k=4),
}


@pytest.fixture(scope="module")
def models(corpus: tuple[list[str], list[str]], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    train, _ = corpus
    d = tmp_path_factory.mktemp("native-models")
    out = {}
    for name, kw in KINDS.items():
        out[name] = d / f"{name}.nwm"
        nextword.train_texts(train, out[name], min_count=2, **kw)  # type: ignore[arg-type]
    for name in ("jm2", "kn3"):  # pruned files: format 1.2 (HIST) and 1.4 with dropped mass
        m = nextword.load(out[name])
        chunks, _ = prune_model(m, int(out[name].stat().st_size * 0.6))
        out[f"{name}-pruned"] = d / f"{name}-pruned.nwm"
        atomic_write(out[f"{name}-pruned"], chunks)
    out["jm2-buckets"] = d / "jm2-buckets.nwm"  # format 1.1: λ by history count
    rewrite_model(out["jm2"], out["jm2-buckets"], lam=0.8, buckets={"bounds": [3, 30, 300], "lambdas": [0.3, 0.6, 0.85, 0.95]})
    return out


def _queries(held: list[str], n: int, seed: int) -> list[tuple[str, int]]:
    """(typed text, k): next word, 1-3 letter prefixes, casing, sentence starts, unseen contexts."""
    rng = random.Random(seed)
    out: list[tuple[str, int]] = []
    spans = [(ln, m.span()) for ln in held for m in nwtext.TOKEN_RE.finditer(ln) if m.lastgroup == "word"]
    while len(out) < n:
        ln, (s, e) = rng.choice(spans)
        k = rng.choice([1, 3, 3, 5, 8, 12])
        kind = rng.randrange(7)
        if kind == 0:
            out.append((ln[:s], k))  # the next word
        elif kind in (1, 2, 3):
            out.append((ln[: min(e, s + kind)], k))  # 1-3 letters of it
        elif kind == 4:
            cut = ln[: min(e, s + rng.randint(1, 3))]
            out.append((cut[:s] + cut[s:].upper(), k))  # a capitalised / all-capitals prefix
        elif kind == 5:
            out.append((ln[:s].rstrip() + ". " + ln[s : min(e, s + rng.randint(0, 2))], k))  # a sentence start
        else:
            junk = "".join(rng.choice("qxzjvkw") for _ in range(rng.randint(3, 7)))
            out.append((f"{junk} {junk[::-1]} " + ln[s : min(e, s + rng.randint(0, 2))], k))  # unseen context
    return out


def _same(ours: list[tuple[str, float]], theirs: list[Any]) -> bool:
    return [w for w, _ in ours] == [s.word for s in theirs] and all(
        p == pytest.approx(s.prob, rel=1e-12, abs=0.0) for (_, p), s in zip(ours, theirs)
    )


FILES = ["jm2", "kn2", "jm3", "kn3", "jm2-pruned", "kn3-pruned", "jm2-buckets"]


@pytest.mark.parametrize("name", FILES)
def test_suggest_equals_python_on_held_out_queries(native: Native, models: dict[str, Path],
                                                     corpus: tuple[list[str], list[str]], name: str) -> None:
    # reference: nextword.Model.suggest on the same file; 2,000 queries x 7 files = 14,000
    model = nextword.load(models[name])
    assert model.format_version == {"jm2": (1, 0), "jm2-pruned": (1, 2), "jm2-buckets": (1, 1)}.get(name, (1, 4))
    code, msg, m = native.open(models[name])
    assert code == 0, msg
    s = native.session(m)
    try:
        bad = []
        answered = 0
        for typed, k in _queries(corpus[1], 2000, seed=hash(name) % 1000):
            code, ours = native.suggest(s, typed, k)
            assert code == 0, (typed, k, code)
            theirs = model.suggest(typed, k)
            answered += bool(theirs)
            if not _same(ours, theirs):
                bad.append((typed, k, ours, theirs))
        assert not bad, bad[:5]
        assert answered > 1500
    finally:
        native.lib.nw_session_free(s)
        native.lib.nw_close(m)


@pytest.mark.parametrize("name", FILES)
def test_prob_equals_python(native: Native, models: dict[str, Path], corpus: tuple[list[str], list[str]], name: str) -> None:
    # reference: nextword.Model.prob_after (every history form: start, <unk>, one or two words)
    model = nextword.load(models[name])
    code, msg, m = native.open(models[name])
    assert code == 0, msg
    s = native.session(m)
    rng = random.Random(5)
    words = [w for ln in corpus[1][:300] for w in ln.split()][:600] + ["</s>", "<unk>", "zzqx", "The", "THE"]
    try:
        for _ in range(600):
            hist: list[str | None] = rng.choice([[], [None], ["<unk>"], [rng.choice(words)], [rng.choice(words), rng.choice(words)],
                                                 ["<s>", rng.choice(words)], [rng.choice(words), "<s>", rng.choice(words)]])
            hist = [h for h in hist if h != "</s>"]
            w = rng.choice(words)
            code, p = native.prob(s, w, hist)
            assert code == 0
            assert p == pytest.approx(model.prob_after(w, hist), rel=1e-12, abs=0.0), (w, hist)
        assert native.prob(s, "<s>", [])[0] == 1  # NW_E_ARG, as Python's InvalidArgumentError
        assert native.prob(s, "the", ["</s>"])[0] == 1
    finally:
        native.lib.nw_session_free(s)
        native.lib.nw_close(m)


_PIECES = ["the ", "The ", "THE ", "of ", "a", "re", "x", " ", ". ", "! ", "\n", ", ", "42 ", "3.5", "#", "don't ", "É",
           "ß", "e\u0301", "Return ", "value", "-", "’", "\\", "  ", "is ", "in", "( ", "zq"]


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(parts=st.lists(st.sampled_from(_PIECES), max_size=30), k=st.integers(1, 12), name=st.sampled_from(["jm2", "kn3"]))
def test_any_typed_text_gets_pythons_answer(native: Native, models: dict[str, Path], parts: list[str], k: int,
                                            name: str) -> None:
    # property: for any typed text (words, numbers, symbols, casing, sentence ends, joiners,
    # combining marks), the C answer is Model.suggest's, words and probabilities
    typed = "".join(parts)
    model = _loaded(models[name])
    code, m = _opened(native, models[name])
    code, ours = native.suggest(m, typed, k)
    assert code == 0
    assert _same(ours, model.suggest(typed, k)), (typed, ours, model.suggest(typed, k))


_CACHE: dict[Any, Any] = {}


def _loaded(path: Path) -> nextword.Model:
    if ("py", path) not in _CACHE:
        _CACHE["py", path] = nextword.load(path)
    return _CACHE["py", path]  # type: ignore[no-any-return]


def _opened(native: Native, path: Path) -> tuple[int, Any]:
    """A session on the C model of ``path``, opened once and kept for the rest of the test run."""
    if ("c", path) not in _CACHE:
        code, msg, m = native.open(path)
        assert code == 0, msg
        _CACHE["c", path] = (m, native.session(m))
    return 0, _CACHE["c", path][1]


def test_worked_example_of_the_format_document(native: Native, tmp_path: Path) -> None:
    # docs/FORMAT.md §10.5 and §10.7 (worked by hand there): after "i", am 0.611765, do 0.305882;
    # the KN trigram after "I am": sam = 329/918
    path = tmp_path / "tiny.nwm"
    nextword.train_texts(["I am Sam.", "Sam I am.", "I do not like green eggs and ham."], path, min_count=1)
    code, msg, m = native.open(path)
    assert code == 0, msg
    s = native.session(m)
    code, got = native.suggest(s, "I ", 2)
    assert [w for w, _ in got] == ["am", "do"]
    assert got[0][1] == pytest.approx(0.9 * 2 / 3 + 0.1 * 2 / 17, rel=1e-15)
    native.lib.nw_session_free(s)
    native.lib.nw_close(m)
    nextword.train_texts(["I am Sam.", "Sam I am.", "I do not like green eggs and ham."], path, min_count=1,
                         smoothing="kn", order=3)
    code, msg, m = native.open(path)
    s = native.session(m)
    code, got = native.suggest(s, "I am ", 1)
    assert got[0][0] == "Sam" and got[0][1] == pytest.approx(329 / 918, rel=1e-14)
    native.lib.nw_session_free(s)
    native.lib.nw_close(m)


# -- text rules: code point by code point against Python ----------------------------------------

# Python 3.11's unicodedata is Unicode 14.0; utf8proc 2.8 is Unicode 15.0. The comparison skips
# the code points unassigned in Python's version (4,489 are new in 15.0) and any whose category
# differs between the two (none today). utf8proc's enum order (utf8proc.h) for the category check:
_CATS = {"Lu": 1, "Ll": 2, "Lt": 3, "Lm": 4, "Lo": 5, "Mn": 6, "Mc": 7, "Me": 8, "Nd": 9, "Nl": 10, "No": 11,
         "Pc": 12, "Pd": 13, "Ps": 14, "Pe": 15, "Pi": 16, "Pf": 17, "Po": 18, "Sm": 19, "Sc": 20, "Sk": 21,
         "So": 22, "Zs": 23, "Zl": 24, "Zp": 25, "Cc": 26, "Cf": 27, "Cs": 28, "Co": 29, "Cn": 0}


def _comparable(native: Native) -> Iterator[str]:
    u8 = ctypes.CDLL("libutf8proc.so.2")
    u8.utf8proc_category.argtypes = [ctypes.c_int32]
    for c in range(0x110000):
        if 0xD800 <= c <= 0xDFFF:
            continue
        ch = chr(c)
        cat = unicodedata.category(ch)
        if cat == "Cn" or _CATS[cat] != u8.utf8proc_category(c):
            continue
        yield ch


def test_character_classes_equal_pythons(native: Native) -> None:
    # reference: Python's str.isalnum/isdecimal/isspace/islower/isupper, unicodedata.category, str.upper
    checked = 0
    up = (ctypes.c_uint32 * 3)()
    for ch in _comparable(native):
        c = ord(ch)
        got = native.lib.nw_char_class(c)
        want = ((ch.isalnum() and 1) | (ch.isdecimal() and 2) | (ch.isspace() and 4)
                | (unicodedata.category(ch).startswith("P") and 8) | (ch.islower() and 16) | (ch.isupper() and 32)
                | (unicodedata.category(ch) == "Lt" and 64) | ((ch in nwtext._SENTENCE_END_CHARS) and 128))  # fmt: skip
        assert got == want, (hex(c), got, want)
        n = native.lib.nw_char_upper(c, up)
        assert "".join(chr(up[i]) for i in range(n)) == ch.upper(), hex(c)
        checked += 1
    assert checked > 280_000


def test_fold_equals_python(native: Native) -> None:
    # reference: nextword.text.fold (NFC(str.casefold) + apostrophe/hyphen mapping), per code point
    # and on real words (with their capitals)
    from pydoc_data.topics import topics

    diffs = [hex(ord(ch)) for ch in _comparable(native) if not unicodedata.category(ch).startswith("C")
             and native.fold(ch) != nwtext.fold(ch)]  # fmt: skip
    assert not diffs, diffs[:20]
    words = {w for k in sorted(topics)[:40] for w in topics[k].split()}
    words |= {"Straße", "ΌΣΟΣ", "Don’t", "İstanbul", "ǅemal", "ﬁx", "e\u0301te\u0301", "Å", "ᾼ", "Ǻ"}
    assert [native.fold(w) for w in sorted(words)] == [nwtext.fold(w) for w in sorted(words)]


def test_parse_typed_equals_python(native: Native) -> None:
    # reference: nextword.text.parse_typed on random texts over the characters the rules treat apart
    rng = random.Random(3)
    alphabet = list("aZé ß9 .,:'’-‐‑!?…\n\t_#£+“”()\\") + ["e\u0301", "Ä", "١", "²", "ǅ", "。", " ", "ﬁ", "x"] * 2
    words = ["the", "Cat", "7:30", "3.5", "don't", "well-known", "5pm", "NASA", "é", "über"]
    for i in range(3000):
        parts = [rng.choice(alphabet + words) for _ in range(rng.randint(0, 80 if i % 10 else 400))]
        typed = "".join(parts)
        ctx = nwtext.parse_typed(typed)
        assert native.parse(typed) == (ctx.history, ctx.prefix), repr(typed)


def test_unknown_versions_and_codecs_are_refused_by_name(native: Native, models: dict[str, Path], tmp_path: Path) -> None:
    # docs/FORMAT.md §3, §7.11 and §7.17: 1.3 and 2.x are refused (NW_E_VERSION), so is an exact-codec
    # file labelled 1.5 (a 1.5 file names the quant codec), and a codec name or version the library
    # does not know (NW_E_UNSUPPORTED); never read as something else
    data = models["kn3"].read_bytes()
    cases = {"1.3": (4, "1.3"), "1.5": (4, "1.5"), "2.4": (4, "2.4")}
    for version, (want, says) in cases.items():
        buf = bytearray(data)
        struct.pack_into("<HH", buf, 8, *map(int, version.split(".")))
        _recrc(buf)
        (tmp_path / "v.nwm").write_bytes(bytes(buf))
        with pytest.raises(nextword.ModelFormatError):
            nextword.load(tmp_path / "v.nwm")
        code, msg, _ = native.open(tmp_path / "v.nwm")
        assert code == want and says in msg, (version, code, msg)
    off, length = _sections(data)[b"META"]
    meta = data[off : off + length]
    for old, new in ((b"\xa5exact", b"\xa5quant"), (b"\xa7version\x01", b"\xa7version\x02")):
        assert meta.count(old) == 1
        buf = bytearray(data)
        buf[off : off + length] = meta.replace(old, new)
        _recrc(buf)
        (tmp_path / "c.nwm").write_bytes(bytes(buf))
        with pytest.raises(nextword.ModelFormatError):
            nextword.load(tmp_path / "c.nwm")
        code, msg, _ = native.open(tmp_path / "c.nwm")
        assert code == 5 and "codec" in msg, (new, code, msg)


def test_bad_arguments_are_refused(native: Native, models: dict[str, Path]) -> None:
    code, _, m = native.open(models["jm2"])
    s = native.session(m)
    n, err = ctypes.c_size_t(), Error()
    bad = b"the \xff\xfe"
    assert native.lib.nw_suggest(s, bad, len(bad), 3, native.out, ctypes.byref(n), native.buf, len(native.buf), ctypes.byref(err)) == 1
    assert b"UTF-8" in err.message
    for k in (0, MAX_K + 1):
        assert native.suggest(s, "the ", k)[0] == 1
    small = ctypes.create_string_buffer(3)
    assert native.lib.nw_suggest(s, b"the ", 4, 3, native.out, ctypes.byref(n), small, 3, ctypes.byref(err)) == 7
    native.lib.nw_session_free(s)
    native.lib.nw_close(m)
    code, msg, _ = native.open(models["jm2"].parent / "missing.nwm")
    assert code == 2 and "cannot open" in msg


# -- hostile files ----------------------------------------------------------------------------------


def _recrc(buf: bytearray) -> None:
    """Recompute every checksum (a crafted file), as tests/test_model_trigram.py does."""
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * ENTRY.size
        tag, code, off, length, _ = ENTRY.unpack_from(buf, at)
        ENTRY.pack_into(buf, at, tag, code, off, length, zlib.crc32(bytes(buf[off : off + length])))
    struct.pack_into("<I", buf, 24, zlib.crc32(bytes(buf[HEADER.size : HEADER.size + n_sec * ENTRY.size])))
    struct.pack_into("<I", buf, 28, zlib.crc32(bytes(buf[:28])))


def _sections(data: bytes) -> dict[bytes, tuple[int, int]]:
    n_sec = HEADER.unpack_from(data, 0)[3]
    return {t: (o, ln) for t, _, o, ln, _ in (ENTRY.unpack_from(data, HEADER.size + i * ENTRY.size) for i in range(n_sec))}


@pytest.fixture(scope="module")
def fuzz_driver(build_dir: Path) -> Path:
    _make(build_dir, "fuzz", "ZLIB=0", timeout=600)  # also exercises the built-in CRC-32 under the sanitizers
    return build_dir / "nwfuzz"


@pytest.fixture(scope="module")
def hostile_seeds(tmp_path_factory: pytest.TempPathFactory) -> dict[str, bytes]:
    """The valid files the Python reader's hostile tests mutate (tests/test_load_bounds.py and
    tests/test_model_trigram.py), plus a JM trigram and a pruned KN trigram."""
    sys.path.insert(0, str(ROOT / "tests"))
    import test_load_bounds  # noqa: E402 - the same seed files as the Python reader's tests

    d = tmp_path_factory.mktemp("seeds")
    msgs = test_load_bounds.MSGS
    seeds = {"bigram": test_load_bounds.MODELS[False], "bigram-pruned": test_load_bounds.MODELS[True]}
    for name, kw in (("kn3", dict(smoothing="kn", order=3)), ("jm3", dict(order=3)), ("kn2", dict(smoothing="kn"))):
        nextword.train_texts(msgs, d / f"{name}.nwm", min_count=1, skyband_min=1, skyband_k=2, **kw)  # type: ignore[arg-type]
        seeds[name] = (d / f"{name}.nwm").read_bytes()
    m = nextword.load(d / "kn3.nwm")
    chunks, _ = prune_model(m, len(seeds["kn3"]) - 200)
    atomic_write(d / "kn3p.nwm", chunks)
    seeds["kn3-pruned"] = (d / "kn3p.nwm").read_bytes()
    return seeds


def _mutants(seeds: dict[str, bytes], n: int, seed: int) -> Iterator[tuple[str, bytes]]:
    rng = random.Random(seed)
    names = sorted(seeds)
    for i in range(n):
        name = names[i % len(names)]
        buf = bytearray(seeds[name])
        if i % 2:  # anywhere, checksums left as they are (test_any_changed_bytes_that_load_...)
            for _ in range(rng.randint(1, 4)):
                buf[rng.randrange(len(buf))] = rng.randrange(256)
        else:  # inside one section but the trie, every checksum fixed (test_crafted_kn_trigram_files_...)
            spans = [(o, ln) for t, (o, ln) in _sections(bytes(buf)).items() if t != b"TRIE" and ln]
            off, length = rng.choice(spans)
            for _ in range(rng.randint(1, 4)):
                buf[off + rng.randrange(length)] = rng.randrange(256)
            _recrc(buf)
        yield name, bytes(buf)


def check_mutants_under_sanitizers(fuzz_driver: Path, seeds: dict[str, bytes], n: int, seed: int, tmp_path: Path) -> None:
    """``n`` mutants of ``seeds`` through the sanitizer build of the fuzz driver (C open and every query).

    No crash, no out-of-bounds read, no probability outside [0, 1]; the seeds open; a file the
    Python reader refuses on load is refused by the C open too (the same checks, docs/FORMAT.md §8).
    """
    files, python_refused = [], set()
    for i, (name, data) in enumerate(_mutants(seeds, n, seed=seed)):
        path = tmp_path / f"{i:04d}-{name}.nwm"
        path.write_bytes(data)
        files.append(path)
        try:
            nextword.load(path)
        except nextword.ModelFormatError:
            python_refused.add(path.name)
    for name, data in seeds.items():
        (tmp_path / f"seed-{name}.nwm").write_bytes(data)
        files.append(tmp_path / f"seed-{name}.nwm")
    proc = subprocess.run([str(fuzz_driver), "--files", *map(str, files)], capture_output=True, text=True, timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    status = dict(line.split("\t")[:2] for line in proc.stdout.splitlines() if "\t" in line)
    assert len(status) == len(files)
    assert all(status[f"seed-{n}.nwm"] == "ok" for n in seeds), status
    opened_by_c = {n for n, st in status.items() if st == "ok"}
    assert not (python_refused & opened_by_c), sorted(python_refused & opened_by_c)[:10]
    assert len(python_refused) > 50  # the mutations do reach the checks


def test_hostile_files_give_error_codes_never_a_crash(fuzz_driver: Path, hostile_seeds: dict[str, bytes],
                                                      tmp_path: Path) -> None:
    # every mutated model file in an AddressSanitizer + UndefinedBehaviorSanitizer build
    check_mutants_under_sanitizers(fuzz_driver, hostile_seeds, 400, 1, tmp_path)


def test_fuzz_random_mutations_under_sanitizers(fuzz_driver: Path, hostile_seeds: dict[str, bytes], tmp_path: Path) -> None:
    # the driver mutates the seeds itself (random bytes, and crafted files with fixed checksums),
    # a bounded number of iterations per seed; any crash, hang or sanitizer report fails
    seeds = []
    for name, data in hostile_seeds.items():
        (tmp_path / f"{name}.nwm").write_bytes(data)
        seeds.append(str(tmp_path / f"{name}.nwm"))
    proc = subprocess.run([str(fuzz_driver), "--mutate", "300", "--seed", "7", *seeds], capture_output=True, text=True,
                          timeout=300)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "iterations" in proc.stdout


@pytest.mark.parametrize("name", ["jm2", "kn3"])
def test_no_heap_allocation_per_query_and_threads_share_a_model(build_dir: Path, models: dict[str, Path],
                                                                corpus: tuple[list[str], list[str]], tmp_path: Path,
                                                                name: str) -> None:
    # native/tools/nwcheck.c counts malloc/calloc/realloc/free around 500 queries (after a first
    # pass) and runs 4 threads on one model, each of which must give the single-thread answers
    _make(build_dir, "check-tools")
    queries = tmp_path / "q.txt"
    queries.write_text("".join(t.replace("\n", " ") + "\n" for t, _ in _queries(corpus[1], 500, seed=2)), encoding="utf-8")
    tool = str(build_dir / "nwcheck")
    proc = subprocess.run([tool, "--alloc", str(models[name]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert '"allocations": 0' in proc.stdout
    proc = subprocess.run([tool, "--threads", "4", str(models[name]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stdout + proc.stderr
    assert '"threads_differing": 0' in proc.stdout


def test_command_line(build_dir: Path, models: dict[str, Path], tmp_path: Path) -> None:
    # nwsuggest: answers as Model.suggest; errors are one line on stderr, exit 2 for usage, 1 for data
    import json

    tool = str(build_dir / "nwsuggest")
    proc = subprocess.run([tool, "--json", "-k", "4", str(models["jm3"]), "Return", "the", "v"], capture_output=True, text=True)
    want = [(s.word, s.prob) for s in nextword.load(models["jm3"]).suggest("Return the v", 4)]
    assert proc.returncode == 0 and [(g["word"], g["prob"]) for g in json.loads(proc.stdout)] == want
    (tmp_path / "short.nwm").write_bytes(models["jm3"].read_bytes()[:100])
    for args, rc, says in (([], 2, "MODEL is required"), (["-k", "0", str(models["jm3"]), "a"], 2, "k must be"),
                           ([str(tmp_path / "short.nwm"), "a"], 1, "truncated"), ([str(tmp_path / "none.nwm")], 1, "cannot open")):
        proc = subprocess.run([tool, *args], capture_output=True, text=True)
        assert proc.returncode == rc and proc.stderr.count("\n") == 1 and proc.stderr.startswith("nwsuggest: error: ")
        assert says in proc.stderr


def test_cmake_build(models: dict[str, Path], tmp_path: Path) -> None:
    # the CMake build (the one Android's NDK uses) builds warning-free and answers like the Makefile's
    if shutil.which("cmake") is None:
        _unavailable("cmake is missing (Debian: cmake)")
    build = tmp_path / "cmake"
    for cmd in (["cmake", "-S", str(NATIVE), "-B", str(build)], ["cmake", "--build", str(build), "--target", "nwsuggest"]):
        proc = subprocess.run(cmd, capture_output=True, text=True, timeout=300)
        assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-3000:]
    model = nextword.load(models["kn3"])
    for typed in ("The ", "the m", "Return the v"):
        proc = subprocess.run([str(build / "nwsuggest"), "--json", "-k", "5", str(models["kn3"]), typed],
                              capture_output=True, text=True, timeout=60)
        import json

        got = json.loads(proc.stdout)
        assert [(g["word"], g["prob"]) for g in got] == [(s.word, s.prob) for s in model.suggest(typed, 5)]


def test_jni_shim_from_java(build_dir: Path, models: dict[str, Path], tmp_path: Path) -> None:
    # examples/jni: the C shim compiled against the JDK's headers and called from Java
    # (org/example/nextword/Demo.java); the Kotlin sketch declares the same native methods
    javac, java = shutil.which("javac"), shutil.which("java")
    if javac is None or java is None:
        pytest.skip("no JDK here (javac/java): the JNI example is not compiled")
    jdk = Path(os.path.realpath(javac)).parent.parent
    if not (jdk / "include" / "jni.h").exists():
        pytest.skip(f"no JNI headers under {jdk}")
    jni = ROOT / "examples" / "jni"
    lib = tmp_path / "libnextword_jni.so"
    subprocess.run(["cc", "-shared", "-fPIC", "-Wall", "-Wextra", "-Werror", f"-I{jdk}/include", f"-I{jdk}/include/linux",
                    f"-I{NATIVE}/include", str(jni / "nextword_jni.c"), str(build_dir / "libnextword.a"),
                    "-lmarisa", "-lutf8proc", "-lz", "-lstdc++", "-o", str(lib)], check=True, timeout=120)
    subprocess.run([javac, "-d", str(tmp_path / "classes"), *map(str, (jni / "org/example/nextword").glob("*.java"))],
                   check=True, timeout=120)
    typed = ["The ", "the m", "Return the v", "If x is ", ""]
    proc = subprocess.run([java, f"-Dnextword.jni={lib}", "-cp", str(tmp_path / "classes"), "org.example.nextword.Demo",
                           str(models["kn3"]), *typed], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    model = nextword.load(models["kn3"])
    for line, t in zip(proc.stdout.splitlines(), typed):
        got = [(w, float(p)) for w, p in (item.rsplit(" ", 1) for item in line.split("\t"))]
        want = [(s.word, s.prob) for s in model.suggest(t, 3)]
        assert [w for w, _ in got] == [w for w, _ in want]
        assert all(p == pytest.approx(q, rel=1e-15) for (_, p), (_, q) in zip(got, want))
