"""The native C runtime opens mixture files (.nwx) and answers exactly like nextword.mix.

The reference for every answer is ``nextword.mix.load_mix(...)`` (MixedModel.suggest and
MixedModel.prob_after) on the same file, and, independently of MixedModel's ranking, a
brute-force oracle that scores every vocabulary word with the parts' own
``Model.prob_after`` and sorts by (probability descending, key ascending). Real text:
``pydoc_data.topics`` (shipped with CPython), split by the project's one held-out rule, as
tests/test_native.py does; the library is built from source as there (skipped with the
reason if it cannot be built, unless NEXTWORD_REQUIRE_NATIVE=1).
"""

from __future__ import annotations

import ctypes
import hashlib
import math
import os
import random
import subprocess
from pathlib import Path
from typing import Any, Iterator

import msgpack
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.evaluate import is_held_out
from nextword.mix import MIX_MAGIC, load_mix, write_mix
from test_native import _PIECES, Native, _make, _mutants, _queries, _same, build_dir, hostile_seeds  # noqa: F401 - fixtures

NW_E_ARG, NW_E_IO, NW_E_FORMAT, NW_E_VERSION = 1, 2, 3, 4


class Info(ctypes.Structure):
    _fields_ = [
        ("major", ctypes.c_uint16), ("minor", ctypes.c_uint16), ("n_words", ctypes.c_uint32),
        ("bigrams", ctypes.c_uint64), ("trigrams", ctypes.c_uint64), ("total", ctypes.c_uint64),
        ("order", ctypes.c_int), ("kneser_ney", ctypes.c_int), ("lam", ctypes.c_double), ("lam3", ctypes.c_double),
        ("codec", ctypes.c_char_p), ("file_size", ctypes.c_uint64), ("text_rules", ctypes.c_int),
        ("n_parts", ctypes.c_int), ("weights", ctypes.c_double * 8),
    ]  # fmt: skip


@pytest.fixture(scope="module")
def native(build_dir: Path) -> Native:
    nat = Native(build_dir / "libnextword.so")
    nat.lib.nw_info_get.argtypes = [ctypes.c_void_p, ctypes.POINTER(Info)]
    nat.lib.nw_exact_sum.argtypes = [ctypes.POINTER(ctypes.c_double), ctypes.c_size_t, ctypes.POINTER(ctypes.c_double)]
    nat.lib.nw_sha256.argtypes = [ctypes.c_char_p, ctypes.c_size_t, ctypes.c_char_p]
    return nat


@pytest.fixture(scope="module")
def corpus() -> tuple[list[str], list[str]]:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics) for ln in topics[k].splitlines() if ln.strip()]
    return [ln for ln in lines if not is_held_out(ln, 10)], [ln for ln in lines if is_held_out(ln, 10)]


@pytest.fixture(scope="module")
def mixes(corpus: tuple[list[str], list[str]], tmp_path_factory: pytest.TempPathFactory) -> dict[str, Path]:
    """A JM bigram + KN trigram (one corpus), two KN trigrams of the corpus' halves (different
    vocabularies), and a three-part mixture of a sub-folder's parts, all with unequal weights."""
    train, _ = corpus
    d = tmp_path_factory.mktemp("native-mix")
    half = len(train) // 2
    (d / "parts").mkdir()
    nextword.train_texts(train, d / "parts" / "jm2.nwm", min_count=2)
    nextword.train_texts(train, d / "parts" / "kn3.nwm", min_count=2, smoothing="kn", order=3, skyband_min=8, skyband_k=4)
    nextword.train_texts(train[:half], d / "parts" / "kn3a.nwm", min_count=2, smoothing="kn", order=3, skyband_min=8)
    nextword.train_texts(train[half:], d / "parts" / "kn3b.nwm", min_count=1, smoothing="kn", order=3)
    out = {"jm2+kn3": d / "jm2-kn3.nwx", "kn3+kn3": d / "kn3-kn3.nwx", "three": d / "sub" / "three.nwx"}
    write_mix(out["jm2+kn3"], [d / "parts" / "jm2.nwm", d / "parts" / "kn3.nwm"], [0.3, 0.7])
    write_mix(out["kn3+kn3"], [d / "parts" / "kn3a.nwm", d / "parts" / "kn3b.nwm"], [0.55, 0.45])
    (d / "sub").mkdir()
    write_mix(out["three"], [d / "parts" / "kn3a.nwm", d / "parts" / "jm2.nwm", d / "parts" / "kn3b.nwm"], [0.2, 0.5, 0.3])
    return out


_OPEN: dict[Any, Any] = {}


def _session(native: Native, path: Path) -> Any:
    """A C session on ``path``, opened once per test run."""
    if path not in _OPEN:
        code, msg, m = native.open(path)
        assert code == 0, msg
        _OPEN[path] = (m, native.session(m))
    return _OPEN[path][1]


def _mix(path: Path) -> Any:
    if ("py", path) not in _OPEN:
        _OPEN["py", path] = load_mix(path)
    return _OPEN["py", path]


def _bit_equal(ours: list[tuple[str, float]], theirs: list[Any]) -> bool:
    return [w for w, _ in ours] == [s.word for s in theirs] and [p for _, p in ours] == [s.prob for s in theirs]


# -- the same answers as MixedModel ----------------------------------------------------------------


@pytest.mark.parametrize("name", ["jm2+kn3", "kn3+kn3"])
def test_mixture_suggest_equals_python_on_held_out_queries(native: Native, mixes: dict[str, Path],
                                                           corpus: tuple[list[str], list[str]], name: str) -> None:
    # reference: nextword.mix.load_mix(...).suggest on the same .nwx; 2,500 held-out queries per
    # mixture (next word, 1-3 letter prefixes, casing, sentence starts, unseen contexts), bit for bit
    mix = _mix(mixes[name])
    s = _session(native, mixes[name])
    bad, answered, within = [], 0, 0
    for typed, k in _queries(corpus[1], 2500, seed=11):
        code, ours = native.suggest(s, typed, k)
        assert code == 0, (typed, k, code)
        theirs = mix.suggest(typed, k)
        answered += bool(theirs)
        within += _same(ours, theirs)  # 1e-12 relative (the brief's bound) ...
        if not _bit_equal(ours, theirs):  # ... and in fact bit for bit
            bad.append((typed, k, ours, theirs))
    assert not bad, bad[:5]
    assert within == 2500 and answered > 2000


@pytest.mark.parametrize("name", ["jm2+kn3", "kn3+kn3", "three"])
def test_deep_rankings_and_three_parts_equal_python(native: Native, mixes: dict[str, Path],
                                                    corpus: tuple[list[str], list[str]], name: str) -> None:
    # k up to 64: the parts' lists must go deeper than the first round (Python four times deeper,
    # C past 64 entries scores every union word of the prefix); the answers stay MixedModel's
    mix = _mix(mixes[name])
    s = _session(native, mixes[name])
    rng = random.Random(4)
    bad = []
    for typed, _ in _queries(corpus[1], 400, seed=12):
        k = rng.choice([1, 2, 16, 40, 64])
        code, ours = native.suggest(s, typed, k)
        assert code == 0
        theirs = mix.suggest(typed, k)
        if not _bit_equal(ours, theirs):
            bad.append((typed, k, ours[:4], theirs[:4]))
    assert not bad, bad[:3]


def _brute_force(mix: Any, history: tuple[str | None, ...], prefix: str, k: int) -> list[tuple[str, float]]:
    """Every union word starting with ``prefix`` scored as Σ w_i·[word in part i]·P_i (in part
    order, from 0.0) with each part's own Model.prob_after; sorted by (p desc, key asc)."""
    keys = sorted({key for p in mix.parts for key in p.word_keys() if key.startswith(prefix)})
    scored = []
    for key in keys:
        total = 0.0
        for part, w in zip(mix.parts, mix.weights):
            total += w * (part.prob_after(key, history) if key in part else 0.0)
        scored.append((-total, key))
    scored.sort()
    return [(key, -neg) for neg, key in scored[:k]]


@pytest.mark.parametrize("name", ["jm2+kn3", "kn3+kn3"])
def test_top_k_equals_a_brute_force_ranking(native: Native, mixes: dict[str, Path], name: str) -> None:
    # oracle: the brute force above (shares only the text rules and the parts' prob_after);
    # keys compared after folding the C answer, probabilities bit for bit
    mix = _mix(mixes[name])
    s = _session(native, mixes[name])
    cases = [("", "the ", 5), ("r", "Return the ", 3), ("", "If x is ", 8), ("a", "zzq qzz ", 4), ("", "", 6),
             ("th", "The ", 3), ("", "see the ", 12), ("in", "and ", 2)]
    for prefix, before, k in cases:
        typed = before + prefix
        ctx = nextword.text.parse_typed(typed)
        want = _brute_force(mix, ctx.history, nextword.text.fold(ctx.prefix), k)
        code, ours = native.suggest(s, typed, k)
        assert code == 0
        assert [(native.fold(w), p) for w, p in ours] == want, typed


@pytest.mark.parametrize("name", ["jm2+kn3", "kn3+kn3", "three"])
def test_mixture_prob_equals_python(native: Native, mixes: dict[str, Path], corpus: tuple[list[str], list[str]],
                                    name: str) -> None:
    # reference: MixedModel.prob_after (words one part lacks, words no part has, </s>, <unk>,
    # every history form), bit for bit
    mix = _mix(mixes[name])
    s = _session(native, mixes[name])
    rng = random.Random(5)
    words = [w for ln in corpus[1][:300] for w in ln.split()][:600] + ["</s>", "<unk>", "zzqx", "The", "THE"]
    for _ in range(800):
        hist: list[str | None] = rng.choice([[], [None], ["<unk>"], [rng.choice(words)], [rng.choice(words), rng.choice(words)],
                                             ["<s>", rng.choice(words)], [rng.choice(words), "<s>", rng.choice(words)]])
        hist = [h for h in hist if h != "</s>"]
        w = rng.choice(words)
        code, p = native.prob(s, w, hist)
        assert code == 0
        assert p == mix.prob_after(w, hist), (w, hist)
    assert native.prob(s, "<s>", [])[0] == NW_E_ARG  # MixedModel raises InvalidArgumentError
    assert native.prob(s, "the", ["</s>"])[0] == NW_E_ARG


@settings(max_examples=300, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])
@given(parts=st.lists(st.sampled_from(_PIECES), max_size=30), k=st.integers(1, 20), name=st.sampled_from(["jm2+kn3", "kn3+kn3", "three"]))
def test_any_typed_text_gets_the_mixtures_answer(native: Native, mixes: dict[str, Path], parts: list[str], k: int,
                                                 name: str) -> None:
    # property: any typed text (words, numbers, symbols, casing, sentence ends, joiners,
    # combining marks) gets MixedModel.suggest's words and probabilities, bit for bit
    typed = "".join(parts)
    code, ours = native.suggest(_session(native, mixes[name]), typed, k)
    assert code == 0
    theirs = _mix(mixes[name]).suggest(typed, k)
    assert _bit_equal(ours, theirs), (typed, ours, theirs)


def test_info_and_weights_as_python_uses_them(native: Native, mixes: dict[str, Path], tmp_path: Path) -> None:
    # the weights after read_mix's and MixedModel's normalisation (w / math.fsum(w), twice),
    # bit for bit, including weights that sum to 1 only within 1e-6; the union vocabulary size
    parts = [str(mixes["three"].parent.parent / "parts" / n) for n in ("kn3a.nwm", "kn3b.nwm")]
    for ws in ([0.3, 0.7], [0.1 + 0.2, 0.7], [1, 0], [0.3333333, 0.6666668], [1e-300, 1.0]):
        path = tmp_path / "w.nwx"
        write_mix(path, parts, ws)
        mix = load_mix(path)
        code, msg, m = native.open(path)
        assert code == 0, msg
        info = Info()
        assert native.lib.nw_info_get(m, ctypes.byref(info)) == 0
        assert info.n_parts == 2 and info.codec == b"mixture"
        assert list(info.weights[:2]) == list(mix.weights), ws
        assert info.n_words == mix.n_words and info.order == mix.order and info.text_rules == mix.text_rules
        native.lib.nw_close(m)


# -- the helpers against outside references --------------------------------------------------------


def test_sha256_equals_hashlib_and_the_published_examples(native: Native) -> None:
    # FIPS 180-2 appendix B (from memory): SHA-256("abc") and the 448-bit two-block message;
    # the empty message's digest (common practice); then hashlib on every length 0..300 and 1 MB
    out = ctypes.create_string_buffer(32)

    def c_sha(data: bytes) -> str:
        native.lib.nw_sha256(data, len(data), out)
        return out.raw.hex()

    assert c_sha(b"abc") == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    assert c_sha(b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq") == (
        "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1")
    assert c_sha(b"") == "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    rng = random.Random(1)
    for n in list(range(301)) + [1 << 20]:
        data = rng.randbytes(n)
        assert c_sha(data) == hashlib.sha256(data).hexdigest(), n


def _c_sum(native: Native, xs: list[float]) -> tuple[int, float]:
    arr = (ctypes.c_double * max(1, len(xs)))(*xs)
    out = ctypes.c_double()
    code = native.lib.nw_exact_sum(arr, len(xs), ctypes.byref(out))
    return code, out.value


def test_exact_sum_known_cases(native: Native) -> None:
    # math.fsum's documented example (Python docs: sum([.1]*10) != 1, fsum gives 1.0), cancellation,
    # the half-way rounding cases, and an intermediate overflow (fsum raises OverflowError)
    cases = [[0.1] * 10, [1e100, 1.0, -1e100, 1e-100, 1e50, -1.0, -1e50], [1.0, 1e-16, 1e-16],
             [2.0 ** 53, 1.0, 2.0 ** -52], [2.0 ** 53, 1.0, -(2.0 ** -52)], [0.3, 0.7], [1e-300, 1.0], [], [-0.0],
             [0.1, 0.2, 0.3, 0.4, 1e-17, -1e-17, 5e-324]]
    for xs in cases:
        code, got = _c_sum(native, xs)
        assert code == 0 and got == math.fsum(xs) and math.copysign(1, got) == math.copysign(1, math.fsum(xs)), xs
    assert _c_sum(native, [1e308, 1e308])[0] == NW_E_ARG
    assert _c_sum(native, [1.0, math.inf])[0] == NW_E_ARG and _c_sum(native, [math.nan])[0] == NW_E_ARG


@settings(max_examples=500, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(xs=st.lists(st.floats(allow_nan=False, allow_infinity=False, min_value=-1e300, max_value=1e300)
                   | st.sampled_from([0.1, 0.2, 0.3, 0.7, 1e-16, 2.0 ** 53, 1.0, -1.0, 5e-324]), max_size=12))
def test_exact_sum_equals_math_fsum(native: Native, xs: list[float]) -> None:
    # property: the C sum is math.fsum's correctly rounded sum, bit for bit
    code, got = _c_sum(native, xs)
    assert code == 0
    assert got == math.fsum(xs) and math.copysign(1, got) == math.copysign(1, math.fsum(xs))


# -- paths, sizes, digests and hostile files ----------------------------------------------------------


def _write_raw(path: Path, body: Any, *, magic: bytes = MIX_MAGIC) -> None:
    path.write_bytes(magic + msgpack.packb(body, use_bin_type=True))


def _python_outcome(path: Path) -> str:
    try:
        load_mix(path).close()
        return "ok"
    except (nextword.ModelFormatError, nextword.InputDataError, nextword.InvalidArgumentError):
        return "refused"
    except Exception as e:  # noqa: BLE001 - a hostile file may raise another type in Python (reported)
        return f"refused ({type(e).__name__})"


def _good_body(d: Path, names: list[str], weights: list[float]) -> dict[str, Any]:
    parts = [{"path": n, "bytes": (d / n).stat().st_size, "sha256": hashlib.sha256((d / n).read_bytes()).hexdigest()}
             for n in names]
    return {"version": [1, 0], "parts": parts, "weights": weights}


def _hostile_bodies(d: Path) -> Iterator[tuple[str, bytes, set[int]]]:
    good = _good_body(d, ["a.nwm", "b.nwm"], [0.4, 0.6])
    pack = lambda b: MIX_MAGIC + msgpack.packb(b, use_bin_type=True)  # noqa: E731

    def change(**kw: Any) -> bytes:
        return pack({**good, **kw})

    def part(i: int, **kw: Any) -> bytes:
        parts = [dict(p) for p in good["parts"]]
        parts[i].update(kw)
        return change(parts=parts)

    F, V, IO = {NW_E_FORMAT}, {NW_E_VERSION}, {NW_E_IO}
    yield "bad magic", b"\x89NWX\r\n\x1a\x00" + pack(good)[8:], F
    yield "model magic", b"\x89NWM\r\n\x1a\n" + pack(good)[8:], F
    yield "truncated", pack(good)[:-5], F
    yield "trailing bytes", pack(good) + b"\xc0", F
    yield "not a map", pack([1, 2]), F
    yield "over 1 MiB", pack({**good, "pad": "x" * (1 << 20)}), F
    yield "int map key", MIX_MAGIC + b"\x81\x01\x02", F
    yield "bad utf-8", MIX_MAGIC + b"\x81\xa1\xff\xc0", F
    yield "too deep", MIX_MAGIC + b"\x81\xa3pad" + b"\x91" * 1100 + b"\xc0", F
    body = msgpack.packb(good, use_bin_type=True)
    assert body[0] == 0x83  # a map of 3: one more entry, a timestamp with 2**30 - 1 nanoseconds
    yield "bad timestamp", MIX_MAGIC + b"\x84" + body[1:] + b"\xa1t\xd7\xff" + b"\xff" * 8, F
    yield "no version", pack({k: v for k, v in good.items() if k != "version"}), F
    for bad in ([1], [1, 0, 0], ["1", 0], [True, 0], [1.0, 0], 1, None):
        yield f"version {bad!r}", change(version=bad), F
    for bad in ([2, 0], [1, 1], [0, 0]):
        yield f"version {bad!r}", change(version=bad), V
    yield "parts missing", pack({k: v for k, v in good.items() if k != "parts"}), F
    yield "no parts", change(parts=[], weights=[]), F
    yield "nine parts", change(parts=(good["parts"] * 5)[:9], weights=[1 / 9] * 9), F
    yield "part not a map", change(parts=["a.nwm", good["parts"][1]]), F
    for bad in ("", "a\x00b", 7, None, b"a.nwm"):
        yield f"path {bad!r}", part(0, path=bad), F
    for bad in (-1, True, "12", 1.5, None):
        yield f"bytes {bad!r}", part(1, bytes=bad), F
    for bad in ("A" * 64, "0" * 63, "0" * 65, 5, "g" * 64):
        yield f"sha256 {bad!r}", part(0, sha256=bad), F
    for bad in ([1.0], [0.5, 0.5, 0.0], [0.5, "0.5"], [True, 0.0], [-0.1, 1.1], [0.5, 0.4], [math.inf, 0.0],
                [math.nan, 1.0], [1e308, 1e308], 0.5, None):
        yield f"weights {bad!r}", change(weights=bad), F
    yield "fitted not a map", change(fitted=[1]), F
    yield "part missing", part(0, path="gone.nwm"), IO
    yield "part is a folder", part(0, path="."), IO
    yield "part size differs", part(0, bytes=good["parts"][0]["bytes"] + 1), F
    yield "part digest differs", part(1, sha256="0" * 64), F
    yield "part is a mixture", part(1, path="ok.nwx", bytes=(d / "ok.nwx").stat().st_size,
                                    sha256=hashlib.sha256((d / "ok.nwx").read_bytes()).hexdigest()), F
    yield "part is not a model", part(1, path="junk.bin", bytes=(d / "junk.bin").stat().st_size,
                                      sha256=hashlib.sha256((d / "junk.bin").read_bytes()).hexdigest()), F
    yield "part of newer text rules", part(1, path="rules2.nwm", bytes=(d / "rules2.nwm").stat().st_size,
                                           sha256=hashlib.sha256((d / "rules2.nwm").read_bytes()).hexdigest()), V


@pytest.fixture(scope="module")
def hostile_dir(corpus: tuple[list[str], list[str]], tmp_path_factory: pytest.TempPathFactory) -> Path:
    d = tmp_path_factory.mktemp("mix-hostile")
    msgs = corpus[0][:400]
    nextword.train_texts(msgs, d / "a.nwm", min_count=1)
    nextword.train_texts(msgs[::-1][:300], d / "b.nwm", min_count=1, smoothing="kn", order=3, skyband_min=1, skyband_k=2)
    write_mix(d / "ok.nwx", [d / "a.nwm", d / "b.nwm"], [0.4, 0.6])
    (d / "junk.bin").write_bytes(b"not a model at all" * 10)
    (d / "rules2.nwm").write_bytes(_with_text_rules((d / "a.nwm").read_bytes(), 2))
    return d


def _with_text_rules(data: bytes, version: int) -> bytes:
    """A model file whose META says text_rules = version (as tests/test_mix.py makes one)."""
    from test_dropped_mass import _with_meta

    for n in range(0, 1000, 16):  # room for the new field: the corpus statistics shrink to one padded entry
        try:
            return _with_meta(data, {"text_rules": version, "stats": {"p": "x" * n}})  # type: ignore[no-any-return]
        except AssertionError:
            continue
    raise AssertionError("no room in META")


def test_hostile_mixture_files_are_refused_as_python_refuses_them(native: Native, hostile_dir: Path) -> None:
    # every field of docs/FORMAT.md §13 checked as nextword.mix.read_mix / load_mix check it:
    # Python raises, C gives the listed error code with a one-line message (never a crash)
    cases = list(_hostile_bodies(hostile_dir))
    assert len(cases) > 50
    code, msg, m = native.open(hostile_dir / "ok.nwx")
    assert code == 0, msg
    native.lib.nw_close(m)
    wrong = []
    for label, data, codes in cases:
        path = hostile_dir / "case.nwx"
        path.write_bytes(data)
        py = _python_outcome(path)
        code, msg, m = native.open(path)
        if code == 0:
            native.lib.nw_close(m)
        if py == "ok" or code not in codes or not msg or "\n" in msg:
            wrong.append((label, py, code, msg))
    assert not wrong, wrong


def test_parts_are_found_relative_to_the_mixture(native: Native, hostile_dir: Path, tmp_path: Path) -> None:
    # part paths as os.path.normpath(os.path.join(folder of abspath(.nwx), path)) (FORMAT §13.1):
    # "..", ".", doubled slashes and an absolute path; opened from another working directory
    d = hostile_dir
    (d / "deep" / "er").mkdir(parents=True, exist_ok=True)
    body = _good_body(d, ["a.nwm", "b.nwm"], [0.5, 0.5])
    body["parts"][0]["path"] = "../.././/a.nwm"
    body["parts"][1]["path"] = str(d / "deep" / ".." / "b.nwm")
    _write_raw(d / "deep" / "er" / "rel.nwx", body)
    cwd = os.getcwd()
    try:
        os.chdir(tmp_path)
        rel = os.path.relpath(d / "deep" / "er" / "rel.nwx")
        assert _python_outcome(Path(rel)) == "ok"
        code, msg, m = native.open(Path(rel))
        assert code == 0, msg
        native.lib.nw_close(m)
    finally:
        os.chdir(cwd)


def test_skipping_the_part_digests_as_load_mix_verify_parts_false(native: Native, hostile_dir: Path) -> None:
    # nw_open_ex(NW_OPEN_SKIP_PART_DIGESTS) = load_mix(verify_parts=False): a recorded digest that
    # differs is not read (the sizes still are); nw_open checks it, as load_mix does by default
    body = _good_body(hostile_dir, ["a.nwm", "b.nwm"], [0.5, 0.5])
    body["parts"][1]["sha256"] = "0" * 64
    path = hostile_dir / "nodigest.nwx"
    _write_raw(path, body)
    lib = native.lib
    lib.nw_open_ex.argtypes = [ctypes.c_char_p, ctypes.c_uint, ctypes.POINTER(ctypes.c_void_p), ctypes.c_void_p]
    m = ctypes.c_void_p()
    assert lib.nw_open_ex(str(path).encode(), 1, ctypes.byref(m), None) == 0
    load_mix(path, verify_parts=False).close()
    lib.nw_close(m)
    assert native.open(path)[0] == NW_E_FORMAT and _python_outcome(path) == "refused"
    assert lib.nw_open_ex(str(path).encode(), 2, ctypes.byref(m), None) == NW_E_ARG
    body["parts"][1]["bytes"] += 1  # the size is checked either way
    _write_raw(path, body)
    assert lib.nw_open_ex(str(path).encode(), 1, ctypes.byref(m), None) == NW_E_FORMAT
    with pytest.raises(nextword.ModelFormatError):
        load_mix(path, verify_parts=False)


@pytest.fixture(scope="module")
def fuzz_driver(build_dir: Path) -> Path:
    _make(build_dir, "fuzz", "ZLIB=0", timeout=600)
    return build_dir / "nwfuzz"


def _mix_mutants(seed: bytes, n: int, rng: random.Random) -> Iterator[bytes]:
    """Random bytes anywhere, and structured changes of one decoded field (re-encoded)."""
    body = msgpack.unpackb(seed[8:], raw=False)
    values = [None, True, -1, 0, 1, 2, 2**64 - 1, -(2**63), 0.5, -0.0, 1e308, math.nan, "", "a.nwm", "b.nwm", "x\x00",
              b"a.nwm", [], [1, 0], [0.5, 0.5], {}, {"path": "a.nwm"}, "0" * 64, msgpack.ExtType(5, b"x")]
    for i in range(n):
        if i % 2:
            buf = bytearray(seed)
            for _ in range(rng.randint(1, 4)):
                buf[rng.randrange(len(buf))] = rng.randrange(256)
            yield bytes(buf)
            continue
        b = msgpack.unpackb(seed[8:], raw=False)
        where = rng.choice(["version", "parts", "weights", "fitted", "part", "weight", "extra"])
        v = rng.choice(values)
        if where == "part":
            b["parts"][rng.randrange(len(b["parts"]))][rng.choice(["path", "bytes", "sha256", "other"])] = v
        elif where == "weight":
            b["weights"][rng.randrange(len(b["weights"]))] = v
        elif where == "extra":
            b[rng.choice(["extra", "version"])] = v
        else:
            b[where] = v
        yield MIX_MAGIC + msgpack.packb(b, use_bin_type=True)
    assert body


def test_hostile_mixtures_under_sanitizers_agree_with_python(fuzz_driver: Path, hostile_dir: Path) -> None:
    # 400 mutants of a valid mixture through the AddressSanitizer + UndefinedBehaviorSanitizer
    # build (open, then every query of the driver): no crash, no out-of-bounds read; each is
    # opened by C exactly when Python's load_mix opens it
    seed = (hostile_dir / "ok.nwx").read_bytes()
    rng = random.Random(3)
    files, py = [], {}
    for i, data in enumerate(_mix_mutants(seed, 400, rng)):
        path = hostile_dir / f"m{i:04d}.nwx"
        path.write_bytes(data)
        files.append(path)
        py[path.name] = _python_outcome(path)
    files.append(hostile_dir / "ok.nwx")
    py["ok.nwx"] = "ok"
    proc = subprocess.run([str(fuzz_driver), "--files", *map(str, files)], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    status = dict(line.split("\t")[:2] for line in proc.stdout.splitlines() if "\t" in line)
    assert len(status) == len(files)
    differ = [(n, py[n], status[n]) for n in status if (py[n] == "ok") != (status[n] == "ok")]
    assert not differ, differ[:10]
    assert sum(s == "ok" for s in status.values()) > 20 and sum(s != "ok" for s in status.values()) > 100
    proc = subprocess.run([str(fuzz_driver), "--mutate", "300", "--seed", "5", str(hostile_dir / "ok.nwx")],
                          capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]


def test_mixtures_of_damaged_parts_under_sanitizers(fuzz_driver: Path, hostile_seeds: dict[str, bytes],
                                                     hostile_dir: Path) -> None:
    # the model files tests/test_native.py mutates (bytes anywhere, or inside one section with
    # every checksum fixed), each mixed with a good part in a .nwx that records its size and
    # digest: open + every query of the driver under the sanitizers, no crash; a mixture whose
    # damaged part Python's load_mix refuses is refused by C too
    d = hostile_dir / "damaged"
    d.mkdir(exist_ok=True)
    files, py = [], {}
    for i, (name, data) in enumerate(_mutants(hostile_seeds, 200, seed=9)):
        part = d / f"p{i:04d}.nwm"
        part.write_bytes(data)
        body = _good_body(hostile_dir, ["a.nwm"], [0.4])
        body["parts"].append({"path": part.name, "bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()})
        body["parts"][0]["path"] = "../a.nwm"
        body["weights"] = [0.4, 0.6]
        path = d / f"x{i:04d}.nwx"
        _write_raw(path, body)
        files.append(path)
        py[path.name] = _python_outcome(path)
    proc = subprocess.run([str(fuzz_driver), "--files", *map(str, files)], capture_output=True, text=True, timeout=600)
    assert proc.returncode == 0, proc.stderr[-3000:]
    status = dict(line.split("\t")[:2] for line in proc.stdout.splitlines() if "\t" in line)
    assert len(status) == len(files)
    opened_by_c_only = [n for n in status if status[n] == "ok" and py[n] != "ok"]
    assert not opened_by_c_only, opened_by_c_only[:10]
    assert sum(st == "ok" for st in status.values()) > 20 and sum(p != "ok" for p in py.values()) > 20


def test_no_heap_allocation_per_query_and_threads_share_a_mixture(build_dir: Path, mixes: dict[str, Path],
                                                                 corpus: tuple[list[str], list[str]], tmp_path: Path) -> None:
    # native/tools/nwcheck.c on a mixture: 0 allocations around 500 queries; 4 threads on one
    # opened mixture give the single-thread answers
    _make(build_dir, "check-tools")
    queries = tmp_path / "q.txt"
    queries.write_text("".join(t.replace("\n", " ") + "\n" for t, _ in _queries(corpus[1], 500, seed=2)), encoding="utf-8")
    tool = str(build_dir / "nwcheck")
    proc = subprocess.run([tool, "--alloc", str(mixes["three"]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and '"allocations": 0' in proc.stdout, proc.stdout + proc.stderr
    proc = subprocess.run([tool, "--threads", "4", str(mixes["three"]), str(queries)], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0 and '"threads_differing": 0' in proc.stdout, proc.stdout + proc.stderr


def test_command_line_opens_a_mixture(build_dir: Path, mixes: dict[str, Path]) -> None:
    import json

    proc = subprocess.run([str(build_dir / "nwsuggest"), "--json", "-k", "4", str(mixes["jm2+kn3"]), "Return", "the", "v"],
                          capture_output=True, text=True, timeout=60)
    want = [(s.word, s.prob) for s in _mix(mixes["jm2+kn3"]).suggest("Return the v", 4)]
    assert proc.returncode == 0 and [(g["word"], g["prob"]) for g in json.loads(proc.stdout)] == want


def test_jni_shim_from_java_opens_a_mixture(build_dir: Path, mixes: dict[str, Path], tmp_path: Path) -> None:
    # examples/jni unchanged: the shim's nw_open takes a .nwx as it takes a model file
    import shutil

    javac, java = shutil.which("javac"), shutil.which("java")
    if javac is None or java is None:
        pytest.skip("no JDK here (javac/java): the JNI example is not compiled")
    jdk = Path(os.path.realpath(javac)).parent.parent
    if not (jdk / "include" / "jni.h").exists():
        pytest.skip(f"no JNI headers under {jdk}")
    root = Path(__file__).resolve().parent.parent
    jni = root / "examples" / "jni"
    lib = tmp_path / "libnextword_jni.so"
    subprocess.run(["cc", "-shared", "-fPIC", "-Wall", "-Wextra", "-Werror", f"-I{jdk}/include", f"-I{jdk}/include/linux",
                    f"-I{root / 'native' / 'include'}", str(jni / "nextword_jni.c"), str(build_dir / "libnextword.a"),
                    "-lmarisa", "-lutf8proc", "-lz", "-lm", "-lstdc++", "-o", str(lib)], check=True, timeout=120)
    subprocess.run([javac, "-d", str(tmp_path / "classes"), *map(str, (jni / "org/example/nextword").glob("*.java"))],
                   check=True, timeout=120)
    typed = ["The ", "the m", "Return the v", "If x is ", ""]
    proc = subprocess.run([java, f"-Dnextword.jni={lib}", "-cp", str(tmp_path / "classes"), "org.example.nextword.Demo",
                           str(mixes["kn3+kn3"]), *typed], capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr
    mix = _mix(mixes["kn3+kn3"])
    for line, t in zip(proc.stdout.splitlines(), typed):
        got = [(w, float(p)) for w, p in (item.rsplit(" ", 1) for item in line.split("\t"))]
        want = [(s.word, s.prob) for s in mix.suggest(t, 3)]
        assert [w for w, _ in got] == [w for w, _ in want]
        assert all(p == pytest.approx(q, rel=1e-15) for (_, p), (_, q) in zip(got, want))
