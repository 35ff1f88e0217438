"""Fixtures shared by several test modules."""

from __future__ import annotations

import pytest

import nextword


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    """A small base model from real English shipped with CPython (``pydoc_data.topics``), for
    the personal-layer tests; a module may define its own ``base`` instead."""
    from pydoc_data.topics import topics

    lines = [ln for k in sorted(topics)[:10] for ln in topics[k].splitlines() if ln.strip()]
    path = tmp_path_factory.mktemp("p") / "base.nwm"
    nextword.train_texts(lines, path, min_count=2)
    return nextword.load(path)
