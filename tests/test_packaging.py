"""Packaging metadata stays consistent: licence file, one version source, changelog.

Checks against the packaging standards themselves (common practice): PEP 621 / PEP 639
metadata in pyproject.toml, ``importlib.metadata`` for the installed distribution.
"""

from __future__ import annotations

import importlib.metadata
import re
import sys
from pathlib import Path

import pytest

import nextword

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10
    tomllib = pytest.importorskip("tomli")

ROOT = Path(__file__).resolve().parent.parent
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))


def test_license_file_exists_and_matches_pyproject() -> None:
    project = PYPROJECT["project"]
    assert project["license"] == "MIT"  # an SPDX expression (PEP 639)
    assert project["license-files"] == ["LICENSE"]
    text = (ROOT / "LICENSE").read_text(encoding="utf-8")
    assert text.splitlines()[0] == "MIT License"
    # the operative sentences of the MIT licence text (opensource.org/license/mit)
    assert "Permission is hereby granted, free of charge, to any person obtaining a copy" in text
    assert 'THE SOFTWARE IS PROVIDED "AS IS", WITHOUT WARRANTY OF ANY KIND' in " ".join(text.split())
    assert re.search(r"Copyright \(c\) 2026 the nextword developers", text)
    # a licence classifier next to an SPDX expression is refused by setuptools >= 77
    assert not [c for c in project.get("classifiers", []) if c.startswith("License ::")]


def test_version_has_one_source() -> None:
    project = PYPROJECT["project"]
    assert "version" not in project
    assert "version" in project["dynamic"]
    assert PYPROJECT["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "nextword.__version__"}
    assert re.fullmatch(r"\d+\.\d+\.\d+(?:[ab]\d+|rc\d+|\.dev\d+)?", nextword.__version__)


def test_installed_metadata_matches_the_source_version() -> None:
    try:
        dist = importlib.metadata.distribution("nextword")
    except importlib.metadata.PackageNotFoundError:
        pytest.skip("nextword is not installed (run from a checkout with PYTHONPATH)")
    assert dist.version == nextword.__version__
    assert "MIT" in (dist.metadata.get("License-Expression"), dist.metadata.get("License"))


def test_changelog_mentions_the_current_version() -> None:
    text = (ROOT / "CHANGELOG.md").read_text(encoding="utf-8")
    assert re.search(rf"^## {re.escape(nextword.__version__)}\b", text, flags=re.M)
    assert re.search(r"^## Unreleased\b", text, flags=re.M)


def test_cli_prints_the_version(capsys: pytest.CaptureFixture[str]) -> None:
    from nextword.cli import main

    with pytest.raises(SystemExit) as exc:
        main(["--version"])
    assert exc.value.code == 0
    assert capsys.readouterr().out.strip() == f"nextword {nextword.__version__}"
