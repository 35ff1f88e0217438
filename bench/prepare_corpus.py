"""Prepare the benchmark corpus from public Debian text packages, at run time.

Nothing prepared here is committed. The sources are dictionaries and quotation
collections packaged by Debian (install them with
``apt-get install dict-gcide dict-foldoc dict-jargon fortunes``):

* GCIDE, the GNU Collaborative International Dictionary of English (definitions and
  literary quotations), ``/usr/share/dictd/gcide.dict.dz``;
* FOLDOC, the Free On-line Dictionary of Computing, ``/usr/share/dictd/foldoc.dict.dz``;
* the Jargon File, ``/usr/share/dictd/jargon.dict.dz``;
* the ``fortunes`` quotations, ``/usr/share/games/fortunes/*``.

Markup (pronunciations, bracketed sources, citations) is removed and each paragraph
becomes one message line. Messages are split into train and test by the library's own
rule, :func:`nextword.evaluate.is_held_out` at :data:`TEST_PERCENT` — the very rule
``nextword split`` applies — so every benchmark built on this corpus (``bench_eval`` splits
its fortunes with ``nextword split`` at the same share) holds out the same messages, and no
figure is measured on text one of its models was trained on. Output:
``bench/data/train.txt`` and ``bench/data/test.txt`` (git-ignored).
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import re
import sys
from pathlib import Path
from typing import Iterator, Mapping

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))

from nextword.evaluate import is_held_out  # noqa: E402

DICTS = {
    "gcide": Path("/usr/share/dictd/gcide.dict.dz"),
    "foldoc": Path("/usr/share/dictd/foldoc.dict.dz"),
    "jargon": Path("/usr/share/dictd/jargon.dict.dz"),
}
FORTUNES = Path("/usr/share/games/fortunes")
PACKAGES = "dict-gcide dict-foldoc dict-jargon fortunes"
# The share of messages held out, for every benchmark on this corpus (bench_eval and
# bench_tune use it too): one rule at one share, so the held-out parts are the same
# messages. 5% keeps the training part above 5 million words.
TEST_PERCENT = 5

_BRACKETS = re.compile(r"\[[^\]]*\]|\\[^\\\n]*\\|\{|\}")
_CITATION = re.compile(r"--\s*[A-Z][\w.]*(?:\s[A-Z][\w.]*)*\.?")
_NUMBERING = re.compile(r"^\s*(?:\d+|[a-z])\.\s+")
_URL = re.compile(r"https?://\S+|<[^>]*>")


def _paragraphs(text: str) -> Iterator[str]:
    for para in re.split(r"\n\s*\n", text):
        para = _URL.sub(" ", para)
        para = _BRACKETS.sub(" ", para)
        para = _CITATION.sub(" ", para)
        para = _NUMBERING.sub("", para)
        para = " ".join(para.replace('"', " ").replace("*", "").split())
        if len(para.split()) >= 4:
            yield para


def messages(
    *, dicts: Mapping[str, Path] = DICTS, fortunes: Path | None = FORTUNES
) -> Iterator[tuple[str, str]]:
    """(source, message) pairs from every installed source (the defaults: Debian's paths)."""
    for name, path in dicts.items():
        if path.exists():
            with gzip.open(path, "rt", encoding="utf-8", errors="replace") as f:
                for p in _paragraphs(f.read()):
                    yield name, p
    if fortunes is not None and fortunes.is_dir():
        for path in sorted(fortunes.iterdir()):
            if path.suffix or path.is_symlink() or not path.is_file():
                continue  # skip .dat indexes and .u8 links
            text = path.read_text(encoding="utf-8", errors="replace")
            for item in text.split("\n%\n"):
                para = " ".join(item.split())
                if len(para.split()) >= 4:
                    yield "fortunes", para


def part_of(message: str, test_percent: int = TEST_PERCENT) -> str:
    """"test" or "train": the library's split rule, the one ``nextword split`` applies."""
    return "test" if is_held_out(message, test_percent) else "train"


def prepare(
    out: Path,
    *,
    test_percent: int = TEST_PERCENT,
    dicts: Mapping[str, Path] = DICTS,
    fortunes: Path | None = FORTUNES,
) -> dict[str, dict[str, int]]:
    """Write ``out/train.txt`` and ``out/test.txt`` (atomically); returns messages by
    source and words by part. A message met twice (the same quotation under several
    headwords) is kept once."""
    out.mkdir(parents=True, exist_ok=True)
    counts: dict[str, int] = {}
    words = {"train": 0, "test": 0}
    lines = {"train": 0, "test": 0}
    tmp = {part: out / f".{part}.txt.tmp" for part in words}
    files = {part: open(tmp[part], "w", encoding="utf-8") for part in words}
    seen: set[str] = set()
    try:
        for source, msg in messages(dicts=dicts, fortunes=fortunes):
            if msg in seen:
                continue
            seen.add(msg)
            part = part_of(msg, test_percent)
            files[part].write(msg + "\n")
            words[part] += len(msg.split())
            lines[part] += 1
            counts[source] = counts.get(source, 0) + 1
    finally:
        for f in files.values():
            f.flush()
            os.fsync(f.fileno())
            f.close()
    for part in words:
        os.replace(tmp[part], out / f"{part}.txt")
    # how the split was made, so later scripts can refuse to mix splits
    (out / "split.json").write_text(json.dumps({"test_percent": test_percent, "train_messages": lines["train"]}))
    return {"messages": counts, "words": words}


def split_of(data: Path) -> dict[str, int] | None:
    """How ``data`` was split (``test_percent``, ``train_messages``), or None if unknown."""
    try:
        return json.loads((data / "split.json").read_text())
    except (OSError, ValueError):
        return None


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=HERE / "data", help="output folder (default bench/data)")
    ap.add_argument("--test-percent", type=int, default=TEST_PERCENT,
                    help=f"share of messages held out (default {TEST_PERCENT}, the share every benchmark uses)")
    args = ap.parse_args(argv)
    if not DICTS["gcide"].exists():
        print(f"prepare_corpus: {DICTS['gcide']} is missing; run: apt-get install {PACKAGES}", file=sys.stderr)
        return 2
    done = prepare(args.out, test_percent=args.test_percent)
    words = done["words"]
    print(f"messages by source: {done['messages']}")
    print(f"words: train {words['train']:,}, test {words['test']:,} -> {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
