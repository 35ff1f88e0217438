"""Pruned levels (dropped mass, docs/FORMAT.md §7.13, §7.15, §9.7) and the value codec seam.

A pruned model keeps each context's total T and drops some of its n-grams; the file
records the dropped mass r, and γ gives it to the lower order:

    KN: γ = (r + D₁n₁ + D₂n₂ + D₃n₃)/T        JM: γ = (1 − λ) + λ·r/T

Checked here against ``_Oracle``, a plain-dict evaluation of that formula from the pruned
levels themselves (nothing shared with the store or the scorer but the fitted values),
by brute force over the vocabulary (suggest = scoring every word of the prefix range),
and by the invariant that every context's probabilities sum to 1 (the formula's purpose;
"Probabilities sum to 1" in docs/SEAMS.md). Also: the reader refuses an unknown codec by
name and a format 1.3 file by version (hostile files, re-checksummed).
"""

from __future__ import annotations

import random
import struct
import zlib
from pathlib import Path

import msgpack
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import nextword
from nextword.counts import CountBuilder
from nextword.errors import ModelFormatError
from nextword.estimators import JelinekMercer, KneserNey
from nextword.estimators.base import Level
from nextword.store import ENTRY, HEADER, build
from test_model_kn import WORDS, random_messages

SETTINGS = settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture])


def _prune(level: Level, rng: random.Random, frac: float, protect: set[tuple[int, ...]] = frozenset()) -> Level:  # type: ignore[assignment]
    """The level without a random ``frac`` of its n-grams (never one in ``protect``); contexts and totals kept."""
    keep = np.array([rng.random() >= frac or tuple(g) in protect for g in level.grams.tolist()], dtype=bool)
    owner = np.repeat(np.arange(len(level.ctx)), np.diff(level.ctx_start))
    starts = np.zeros(len(level.ctx) + 1, dtype=np.int64)
    starts[1:] = np.cumsum(np.bincount(owner[keep], minlength=len(level.ctx)))
    value = level.value[keep]
    n123 = np.zeros((len(level.ctx), 3), np.int64)
    for j, mask in enumerate((value == 1, value == 2, value >= 3)):
        n123[:, j] = np.bincount(owner[keep][mask], minlength=len(level.ctx))
    return Level(level.grams[keep], value, level.ctx, starts, level.ctx_total, n123)


class _Oracle:
    """P(w | u v) from the pruned levels by the formula of §9.7, with plain dicts."""

    def __init__(self, fitted: object, kn: bool, discounts: list[list[float]]) -> None:
        self.kn = kn
        self.f = fitted
        self.d = discounts  # the file's (§7.11: a level may fall back to one discount)
        lv = fitted.levels  # type: ignore[attr-defined]
        self.rows: list[dict[tuple[int, ...], dict[int, int]]] = []
        self.tot: list[dict[tuple[int, ...], int]] = []
        for lev in lv:
            rows: dict[tuple[int, ...], dict[int, int]] = {}
            tot: dict[tuple[int, ...], int] = {}
            for j in range(len(lev.ctx)):
                h = tuple(int(x) for x in lev.ctx[j])
                tot[h] = int(lev.ctx_total[j])
                rows[h] = {int(lev.grams[i, -1]): int(lev.value[i]) for i in range(int(lev.ctx_start[j]), int(lev.ctx_start[j + 1]))}
            self.rows.append(rows)
            self.tot.append(tot)

    def _disc(self, m: int, a: int) -> float:
        d = self.d[m - 1]
        return 0.0 if a == 0 else d[0] if a == 1 else d[1] if a == 2 else d[2]

    def prob(self, w: int, h: tuple[int, ...], floor: float) -> float:
        p = floor
        for m in range(2, len(h) + 2):
            ctx = h[len(h) - (m - 1):]
            if ctx not in self.tot[m - 1]:
                continue
            row, total = self.rows[m - 1][ctx], self.tot[m - 1][ctx]
            r = total - sum(row.values())
            a = row.get(w, 0)
            if self.kn:
                n = [sum(1 for x in row.values() if x == 1), sum(1 for x in row.values() if x == 2), sum(1 for x in row.values() if x >= 3)]
                gamma = (r + sum(self._disc(m, q) * nq for q, nq in zip((1, 2, 3), n))) / total
                p = max(a - self._disc(m, a), 0.0) / total + gamma * p
            else:
                lam = self.f.lams[m - 1]  # type: ignore[attr-defined]
                p = lam * (a / total) + ((1.0 - lam) + lam * (r / total)) * p
        return p


@SETTINGS
@given(seed=st.integers(0, 10**6), n_messages=st.integers(5, 50), frac=st.sampled_from([0.0, 0.3, 0.7, 1.0]),
       smoothing=st.sampled_from(["kn", "jm"]), small_bands=st.booleans())
def test_pruned_levels_sum_to_one_and_rank_exactly(tmp_path_factory: pytest.TempPathFactory, seed: int, n_messages: int,
                                                   frac: float, smoothing: str, small_bands: bool) -> None:
    rng = random.Random(seed)
    b = CountBuilder(order=3)
    b.add_texts(random_messages(rng, n_messages, WORDS))
    tables, counts = b.ngram_counts(min_count=1)
    if tables.n_words == 0:
        return
    kn = smoothing == "kn"
    est = KneserNey() if kn else JelinekMercer((0.8, 0.6))
    fitted = est.fit(counts)
    lev3 = _prune(fitted.levels[2], rng, frac)
    # a trigram context (u, v) must stay a stored bigram (docs/FORMAT.md §7.14)
    contexts = {tuple(g[:2]) for g in lev3.grams.tolist()}
    fitted.levels = [fitted.levels[0], _prune(fitted.levels[1], rng, frac / 2, contexts), lev3]
    path = tmp_path_factory.mktemp("drop") / "m.nwm"
    extra = {"skyband_min": 1, "skyband_k": 3} if small_bands else {}
    build(counts, tables, est, path, fitted=fitted, **extra)  # type: ignore[arg-type]
    model = nextword.load(path, verify=True)
    info = model.header()
    assert info["order"] == 3
    oracle = _Oracle(fitted, kn, model.discounts)
    n = model.n_words
    keys = [model._key(i) for i in range(n)]  # noqa: SLF001 - the test reads the id order
    tok = {key: i for i, key in enumerate(tables.keys)}  # the counts' ids
    names = [*tables.keys, "</s>", "<unk>"]
    contexts = [("<s>",), ("<s>", rng.choice(tables.keys))] + [tuple(rng.choice(names[:-2] + ["<unk>"]) for _ in range(2)) for _ in range(6)]
    floor = fitted.floor()
    for hist in contexts:
        ids = tuple(counts.bos if t == "<s>" else tok.get(t, counts.unk) for t in hist)
        total = 0.0
        for w, name in enumerate(names):
            p = model.prob_after(name, list(hist))
            assert p == pytest.approx(oracle.prob(w, ids[-2:], float(floor[w])), rel=1e-9, abs=1e-15), (hist, name)
            total += p
        assert total == pytest.approx(1.0, rel=1e-9), hist  # every context sums to 1 (§9.7)
        for prefix in ("", keys[0][:1], "b"):
            for k in (1, 3, 5):
                got = model.rank_after(list(hist), prefix, k)
                brute = sorted(((model.prob_after(key, list(hist)), key) for key in keys if key.startswith(prefix)),
                               key=lambda t: (-t[0], -floor[tok[t[1]]], t[1]))[:k]  # ties: larger floor, then key  # fmt: skip
                assert [key for key, _ in got] == [key for _, key in brute], (hist, prefix, k)
    if frac > 0:
        dropped = len(model._src.arrays["TDRI"]) + len(model._src.arrays["HDRI"])  # noqa: SLF001
        # the file lists dropped mass exactly where a context lost part of its total: every
        # bigram history keeps its total (HIST), an emptied one then has all of it dropped;
        # a trigram context that lost every n-gram is not stored at all (FORMAT.md §7.13-7.15)
        expect = 0
        for m, lv in enumerate(fitted.levels[1:], 2):
            kept = np.diff(lv.ctx_start) > 0
            sums = np.zeros(len(lv.ctx), np.int64)
            if kept.any():
                sums[kept] = np.add.reduceat(lv.value, lv.ctx_start[:-1][kept])
            lost = lv.ctx_total > sums
            expect += int((lost if m == 2 else lost & kept).sum())
        assert dropped == expect


def _recrc(buf: bytearray) -> None:
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * ENTRY.size
        tag, code, off, length, _ = ENTRY.unpack_from(buf, at)
        ENTRY.pack_into(buf, at, tag, code, off, length, zlib.crc32(bytes(buf[off : off + length])))
    table = bytes(buf[HEADER.size : HEADER.size + n_sec * ENTRY.size])
    struct.pack_into("<I", buf, 24, zlib.crc32(table))
    struct.pack_into("<I", buf, 28, zlib.crc32(bytes(buf[:28])))


def _with_meta(data: bytes, change: dict[str, object]) -> bytes:
    """The file with META fields replaced, at the same length (the free-text "generator" absorbs the difference)."""
    buf = bytearray(data)
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        tag, code, off, length, crc = ENTRY.unpack_from(buf, HEADER.size + i * ENTRY.size)
        if tag == b"META":
            meta = msgpack.unpackb(bytes(buf[off : off + length]), raw=False)
            meta.update(change)
            for pad in range(0, 30):
                meta["generator"] = "x" * pad
                raw = msgpack.packb(meta, use_bin_type=True)
                if len(raw) == length:
                    buf[off : off + length] = raw
                    _recrc(buf)
                    return bytes(buf)
    raise AssertionError("could not rewrite META in place")


@pytest.fixture(scope="module")
def kn3(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    path = tmp_path_factory.mktemp("codec") / "m.nwm"
    nextword.train_texts(["the cat sat on the mat", "a cat ran to the mat"] * 3, path, smoothing="kn", order=3, min_count=1)
    return path.read_bytes()


@pytest.mark.parametrize("codec,message", [
    ({"name": "quant8", "version": 1}, "unknown value codec 'quant8'"),
    ({"name": "exact", "version": 2}, "codec 'exact' version 2 is not supported"),
    ("exact", "metadata field 'codec' is invalid"),
])  # fmt: skip
def test_the_reader_refuses_an_unknown_codec_by_name(kn3: bytes, tmp_path: Path, codec: object, message: str) -> None:
    bad = tmp_path / "bad.nwm"
    bad.write_bytes(_with_meta(kn3, {"codec": codec}))
    with pytest.raises(ModelFormatError, match=message):
        nextword.load(bad)


def test_a_format_1_3_file_is_refused_naming_its_version(kn3: bytes, tmp_path: Path) -> None:
    buf = bytearray(kn3)
    struct.pack_into("<H", buf, 10, 3)  # minor version (docs/FORMAT.md §3)
    _recrc(buf)
    bad = tmp_path / "old.nwm"
    bad.write_bytes(bytes(buf))
    with pytest.raises(ModelFormatError, match=r"format 1\.3 .* is no longer read; retrain"):
        nextword.load(bad)


def test_the_exact_codec_round_trips_values_with_escapes() -> None:
    # values around the one-byte escape (255 marks "look it up"), common practice for u8 counts
    from nextword.codecs import EXACT

    values = np.array([1, 2, 254, 255, 256, 70000, 3, 2**32 - 1], dtype=np.int64)
    tags = (b"TVAL", b"TBGI", b"TBGC")
    arrays = {t.decode(): np.asarray(a, dtype=dt) for t, dt, a in EXACT.encode(tags, values)}
    assert arrays["TVAL"].tolist() == [1, 2, 254, 255, 255, 255, 3, 255]
    assert arrays["TBGI"].tolist() == [3, 4, 5, 7]
    EXACT.check("x", arrays, tags, len(values))
    view = EXACT.decode("x", arrays, tags)
    assert [view.at(i) for i in range(len(values))] == values.tolist()
    assert view.slice(2, 7) == values[2:7].tolist()
    assert view.take(np.array([7, 0, 4])).tolist() == [2**32 - 1, 1, 256]
    assert view.all().tolist() == values.tolist()


# -- hostile 1.4 files: every new section's length, offsets and values, CRCs fixed ----------

NEW_SECTIONS = [b"HIST", b"HN13", b"HDRI", b"HDRV", b"TCTB", b"TLEN", b"TLEI", b"TLEV", b"TSUC", b"TVAL", b"TBGI",
                b"TBGC", b"TLNI", b"TLNV", b"TDRI", b"TDRV", b"TSGS", b"TSGE", b"TSKP", b"TSKI", b"TSKC"]  # fmt: skip


def _syllables(count: int) -> list[str]:
    return [a + b for a in ("ba", "de", "ki", "lo", "mu", "ra", "so", "tu") for b in ("n", "m", "x", "z", "p", "t", "k", "l")][:count]


@pytest.fixture(scope="module")
def rich_kn3(tmp_path_factory: pytest.TempPathFactory) -> bytes:
    """A KN trigram file with escaped values (a trigram seen 300 times), an escaped length (a
    context with 300 successors), stored summaries, bands (skyband_min 4) and dropped mass."""
    words = [w + v for w in _syllables(64) for v in ("a", "e", "o", "i", "u", "y")]  # 384: over 255 after pruning
    msgs = ["the cat sat on the mat"] * 300 + [f"of the {w}" for w in words]
    b = CountBuilder(order=3)
    b.add_texts(msgs)
    tables, counts = b.ngram_counts(min_count=1)
    est = KneserNey()
    fitted = est.fit(counts)
    rng = random.Random(1)
    lev3 = _prune(fitted.levels[2], rng, 0.2)
    fitted.levels = [fitted.levels[0], _prune(fitted.levels[1], rng, 0.1, {tuple(g[:2]) for g in lev3.grams.tolist()}), lev3]
    path = tmp_path_factory.mktemp("rich") / "m.nwm"
    build(counts, tables, est, path, fitted=fitted, skyband_min=4, skyband_k=3)
    a = nextword.store.read_model(path, verify=True).arrays
    for tag in ("TBGI", "TLEI", "TLNI", "TDRI", "HDRI", "TSGS"):
        assert len(a[tag]), tag  # the fixture exercises every sparse table
    return path.read_bytes()


def _ask(m: nextword.Model) -> None:
    for hist in (["of", "the"], ["the", "cat"], ["<s>", "the"], ["on", "the"], ["the"], ["<s>"]):
        for prefix in ("", "b", "t", "ma", "de"):
            for k in (1, 3, 12):
                try:
                    got = m.rank_after(hist, prefix, k)
                except ModelFormatError:
                    continue
                assert all(0.0 <= p <= 1.0 + 1e-9 for _, p in got)
        for w in ("the", "mat", "bana", "</s>", "<unk>"):
            try:
                p = m.prob_after(w, hist)
            except ModelFormatError:
                continue
            assert 0.0 <= p <= 1.0 + 1e-9
    for typed in ("of the ", "of the b", "The cat ", "on the m"):
        try:
            m.suggest(typed, 3)
        except ModelFormatError:
            pass


def _mutations(buf: bytes, tag: bytes) -> list[bytes]:
    """Changed copies: first/last/middle element set to 0, to the maximum, +1; one element shorter."""
    out = []
    n_sec = HEADER.unpack_from(buf, 0)[3]
    for i in range(n_sec):
        at = HEADER.size + i * ENTRY.size
        t, code, off, length, crc = ENTRY.unpack_from(buf, at)
        if t != tag:
            continue
        item = {1: 1, 2: 2, 3: 4, 4: 8}[code]
        fmt = {1: "<B", 2: "<H", 3: "<I", 4: "<Q"}[code]
        count = length // item
        for idx in sorted({0, count // 2, count - 1}) if count else []:
            old = struct.unpack_from(fmt, buf, off + idx * item)[0]
            for new in (0, (1 << (8 * item)) - 1, (old + 1) % (1 << (8 * item))):
                b = bytearray(buf)
                struct.pack_into(fmt, b, off + idx * item, new)
                _recrc(b)
                out.append(bytes(b))
        if count:
            b = bytearray(buf)
            ENTRY.pack_into(b, at, t, code, off, length - item, crc)
            b[off + length - item : off + length] = bytes(item)  # now padding: zeros
            _recrc(b)
            out.append(bytes(b))
    return out


@pytest.mark.parametrize("tag", NEW_SECTIONS, ids=[t.decode() for t in NEW_SECTIONS])
def test_crafted_changes_to_each_1_4_section_raise_or_answer_in_range(rich_kn3: bytes, tmp_path: Path, tag: bytes) -> None:
    # only ModelFormatError may come out of load or any query: no IndexError, no crash, no P > 1
    m0 = None
    for j, data in enumerate(_mutations(rich_kn3, tag)):
        path = tmp_path / f"bad{j}.nwm"
        path.write_bytes(data)
        for verify in (False, True):
            try:
                m0 = nextword.load(path, verify=verify)
            except ModelFormatError:
                continue
            _ask(m0)
    assert _mutations(rich_kn3, tag)  # every new section is present and was changed


def test_trigram_skyband_min_is_recorded_and_checked(kn3: bytes, tmp_path: Path) -> None:
    # docs/FORMAT.md §7.11: META trigram_skyband_min, the writer's default min(skyband_min, 24)
    from nextword.store import DEFAULT_SKYBAND_MIN, DEFAULT_TRIGRAM_SKYBAND_MIN

    good = tmp_path / "good.nwm"
    good.write_bytes(kn3)
    with nextword.load(good, verify=True) as m:
        assert m.header()["trigram_skyband_min"] == min(DEFAULT_SKYBAND_MIN, DEFAULT_TRIGRAM_SKYBAND_MIN)
    small = tmp_path / "small.nwm"
    nextword.train_texts(["the cat sat on the mat"], small, smoothing="kn", order=3, min_count=1, skyband_min=2)
    with nextword.load(small, verify=True) as m:
        assert m.header()["trigram_skyband_min"] == 2  # a smaller skyband_min lowers it too
    bad = tmp_path / "bad.nwm"
    for value in (-1, "24", True, 2**33):
        bad.write_bytes(_with_meta(kn3, {"trigram_skyband_min": value}))
        with pytest.raises(nextword.ModelFormatError, match="trigram_skyband_min"):
            nextword.load(bad)
    # a threshold the bands were not built with: verify recomputes the bands and refuses
    bad.write_bytes(_with_meta(kn3, {"trigram_skyband_min": 0}))
    with pytest.raises(nextword.ModelFormatError, match="skyband data of the trigram rows"):
        nextword.load(bad, verify=True)


def test_a_kn_bigram_whose_sentence_start_row_is_pruned_whole_verifies(tmp_path: Path) -> None:
    # Every bigram after <s> removed: the <s> context is dropped whole (no dropped-mass entry), so the
    # continuation counts of UNIG (fitted before pruning) exceed the rows' — a pruned file that
    # verify=True must accept, as it does when a word's row is dropped whole (§7.13). Found by
    # tests/test_compact.py's hypothesis search (seed 54, two words, three messages).
    from nextword.prune import keep_contexts, ngram_file, prune_fitted
    from nextword.store import atomic_write

    b = CountBuilder(order=2)
    b.add_texts(["a b a.", "b a b", "a a."])
    tables, counts = b.ngram_counts(min_count=1)
    fitted = KneserNey().fit(counts)
    g2 = fitted.levels[1].grams
    keep2 = g2[:, 0] != counts.n_words + 2  # <s> is id n + 2
    pruned = prune_fitted(fitted, keep_contexts(fitted, [None, keep2]))
    path = tmp_path / "p.nwm"
    atomic_write(path, ngram_file(counts, tables, pruned))
    model = nextword.load(path, verify=True)
    assert model.rank_after(["<s>"], "", 2)  # after <s> the unigram floor answers
    total = sum(model.prob_after(w, ["<s>"]) for w in model.word_keys() + ["</s>", "<unk>"])
    assert total == pytest.approx(1.0, abs=1e-12)
