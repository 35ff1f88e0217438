"""Our own names for what a user sees: the typed text and the choice row.

Issue 11 item 16: two names mirrored other products' vocabulary. These checks keep the
public API, the docs and the examples on our own words (positional calls keep working).
"""

from __future__ import annotations

import inspect
import re
from pathlib import Path

import nextword
from nextword.personal import PersonalLayer

ROOT = Path(__file__).resolve().parents[1]
BANNED = [
    re.compile(r"before_cursor", re.I),
    re.compile(r"text before the cursor", re.I),
    re.compile(r"\bsuggestion strip\b", re.I),
    re.compile(r"\bstrip_words\b"),
    re.compile(r"\b(the|a) strip\b", re.I),
]


def _sources() -> list[Path]:
    out: list[Path] = [ROOT / "README.md", ROOT / "DEVELOPERS.md"]
    for folder in ("nextword", "examples", "docs", "bench"):
        out += [p for p in (ROOT / folder).rglob("*") if p.suffix in {".py", ".md", ".c", ".h"}]
    return out


def test_no_borrowed_names_in_code_or_docs() -> None:
    hits = []
    for path in _sources():
        for n, line in enumerate(path.read_text(encoding="utf-8").splitlines(), 1):
            if any(p.search(line) for p in BANNED):
                hits.append(f"{path.relative_to(ROOT)}:{n}: {line.strip()}")
    assert not hits, "\n".join(hits)


def test_suggest_parameter_is_named_typed_and_positional_calls_work(tmp_path: Path) -> None:
    for fn in (nextword.Model.suggest, PersonalLayer.suggest):
        params = list(inspect.signature(fn).parameters)
        assert params[1] == "typed", (fn, params)
    nextword.train_texts(["we fix bikes on thursday", "we fix wheels"], tmp_path / "m.nwm")
    model = nextword.load(tmp_path / "m.nwm")
    assert [s.word for s in model.suggest("we ", 1)] == ["fix"]
    assert model.suggest("we ", 2) == model.suggest(typed="we ", k=2)
