"""Opening and closing a personal layer: explicit creation, close(), the context manager."""

from __future__ import annotations

from pathlib import Path

import pytest

import nextword
from nextword import InputDataError, InvalidArgumentError, LayerNotFoundError
from nextword.personal import PersonalLayer


@pytest.fixture(scope="module")
def base(tmp_path_factory: pytest.TempPathFactory) -> nextword.Model:
    from pydoc_data.topics import topics  # real English shipped with CPython

    lines = [ln for k in sorted(topics)[:10] for ln in topics[k].splitlines() if ln.strip()]
    path = tmp_path_factory.mktemp("p") / "base.nwm"
    nextword.train_texts(lines, path, min_count=2)
    return nextword.load(path)


def test_open_without_create_refuses_a_missing_file_and_names_it(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "typo.nwp"
    with pytest.raises(LayerNotFoundError, match="typo.nwp"):
        PersonalLayer.open(base, path)
    assert not path.exists()  # nothing was created by accident
    assert issubclass(LayerNotFoundError, InputDataError)
    with PersonalLayer.open(base, path, create=True, min_uses=3) as layer:
        assert layer.min_uses == 3
    assert path.exists()
    with PersonalLayer.open(base, path) as again:  # now it exists: no create needed
        assert again.min_uses == 3


def test_close_is_idempotent_keeps_the_changes_and_refuses_more(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    layer = PersonalLayer.open(base, path, create=True, strength=5.0)
    layer.learn("the zorbing trip")
    layer.close()
    layer.close()  # idempotent
    assert layer.closed
    assert PersonalLayer.load(base, path).messages == 1  # persisted
    assert layer.count("zorbing") == 1  # reading still works
    for change in (lambda: layer.learn("more"), lambda: layer.forget("zorbing"), layer.clear,
                   lambda: layer.block("x"), lambda: layer.unblock("x")):
        with pytest.raises(InvalidArgumentError, match="closed"):
            change()
    assert PersonalLayer.load(base, path).messages == 1


def test_context_manager_closes_even_on_error(base: nextword.Model, tmp_path: Path) -> None:
    path = tmp_path / "me.nwp"
    with pytest.raises(RuntimeError):
        with PersonalLayer.open(base, path, create=True) as layer:
            layer.learn("zorbing")
            raise RuntimeError("boom")
    assert layer.closed
    assert PersonalLayer.load(base, path).messages == 1
