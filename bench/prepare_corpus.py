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
becomes one message line. Messages are split into train and test by a hash of their
text, so the split never depends on file order. Output: ``bench/data/train.txt`` and
``bench/data/test.txt`` (git-ignored).
"""

from __future__ import annotations

import argparse
import gzip
import hashlib
import os
import re
import sys
from pathlib import Path
from typing import Iterator

HERE = Path(__file__).resolve().parent
DICTS = {
    "gcide": Path("/usr/share/dictd/gcide.dict.dz"),
    "foldoc": Path("/usr/share/dictd/foldoc.dict.dz"),
    "jargon": Path("/usr/share/dictd/jargon.dict.dz"),
}
FORTUNES = Path("/usr/share/games/fortunes")
PACKAGES = "dict-gcide dict-foldoc dict-jargon fortunes"

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


def messages() -> Iterator[tuple[str, str]]:
    """(source, message) pairs from every installed source."""
    for name, path in DICTS.items():
        if path.exists():
            with gzip.open(path, "rt", encoding="utf-8", errors="replace") as f:
                for p in _paragraphs(f.read()):
                    yield name, p
    if FORTUNES.is_dir():
        for path in sorted(FORTUNES.iterdir()):
            if path.suffix or path.is_symlink() or not path.is_file():
                continue  # skip .dat indexes and .u8 links
            text = path.read_text(encoding="utf-8", errors="replace")
            for item in text.split("\n%\n"):
                para = " ".join(item.split())
                if len(para.split()) >= 4:
                    yield "fortunes", para


def is_test(message: str, percent: int) -> bool:
    """Deterministic held-out split by the message's own text."""
    digest = hashlib.sha1(message.encode("utf-8")).digest()
    return int.from_bytes(digest[:4], "little") % 100 < percent


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", type=Path, default=HERE / "data", help="output folder (default bench/data)")
    ap.add_argument("--test-percent", type=int, default=5, help="share of messages held out (default 5)")
    args = ap.parse_args(argv)
    if not DICTS["gcide"].exists():
        print(f"prepare_corpus: {DICTS['gcide']} is missing; run: apt-get install {PACKAGES}", file=sys.stderr)
        return 2
    args.out.mkdir(parents=True, exist_ok=True)
    counts: dict[str, int] = {}
    words = {"train": 0, "test": 0}
    tmp = {part: args.out / f".{part}.txt.tmp" for part in words}
    files = {part: open(tmp[part], "w", encoding="utf-8") for part in words}
    seen: set[bytes] = set()
    try:
        for source, msg in messages():
            h = hashlib.sha1(msg.encode("utf-8")).digest()
            if h in seen:
                continue  # the same quotation appears under several headwords
            seen.add(h)
            part = "test" if is_test(msg, args.test_percent) else "train"
            files[part].write(msg + "\n")
            words[part] += len(msg.split())
            counts[source] = counts.get(source, 0) + 1
    finally:
        for f in files.values():
            f.flush()
            os.fsync(f.fileno())
            f.close()
    for part in words:
        os.replace(tmp[part], args.out / f"{part}.txt")
    print(f"messages by source: {counts}")
    print(f"words: train {words['train']:,}, test {words['test']:,} -> {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
