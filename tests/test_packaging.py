"""The installed package holds every subpackage of the source tree.

A plain ``packages = ["nextword"]`` list in pyproject.toml installs the top level only, so a
subpackage such as ``nextword.estimators`` works from a checkout (the tests import the source)
but is missing after ``pip install .`` — the README's first set-up command then fails. This
test applies the same package discovery setuptools runs at build time (common practice:
``setuptools.find_packages`` with the ``include`` patterns of ``[tool.setuptools.packages.find]``).
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


@pytest.mark.skipif(sys.version_info < (3, 11), reason="tomllib is in the standard library from Python 3.11")
def test_every_subpackage_is_installed() -> None:
    import tomllib

    setuptools = pytest.importorskip("setuptools")
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))
    find = config["tool"]["setuptools"]["packages"]["find"]
    found = set(setuptools.find_packages(where=str(ROOT), include=find["include"]))
    on_disk = {
        ".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "nextword").rglob("__init__.py")
    }
    assert "nextword.estimators" in on_disk
    assert on_disk <= found, f"not installed: {sorted(on_disk - found)}"
    assert all(name.startswith("nextword") for name in found)
