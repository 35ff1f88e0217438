"""Output paths: a command never writes over one of its own inputs or over another output.

Every file is written atomically (a temporary file renamed over the target), so a
failed write leaves the old file alone — but a *successful* write over an input still
destroys it: ``nextword train small.txt -o small.txt`` would replace the corpus with a
model. One rule covers every command that writes: an output must not be an input or
another output. "The same file" means :func:`os.path.samefile` when both exist (which
sees hard links and symlinks), else the same fully resolved path (a symlink to a file
not written yet, ``./a`` and ``a``). The checks run before any work starts, so a
refused command writes nothing.
"""

from __future__ import annotations

import os
from typing import Iterable, Sequence, Tuple, Union

from .errors import InvalidArgumentError

__all__ = ["same_file", "check_outputs", "check_new_output", "check_writable", "Labelled"]

PathArg = Union[str, os.PathLike[str]]
Labelled = Tuple[str, PathArg]
"""A path with what it is, for the error message: ``("training part", "train.txt")``."""

STDIN = "-"


def same_file(a: PathArg, b: PathArg) -> bool:
    """True if ``a`` and ``b`` name one file (hard link, symlink, or the same resolved path)."""
    a, b = os.fspath(a), os.fspath(b)
    try:
        return os.path.samefile(a, b)
    except OSError:  # one of them does not exist (yet)
        return os.path.realpath(a) == os.path.realpath(b)


def check_outputs(inputs: Iterable[Labelled], outputs: Sequence[Labelled]) -> None:
    """Raise :class:`InvalidArgumentError`, naming both paths, if an output is an input or another output.

    ``"-"`` (standard input) is never a file on disk and is skipped.
    """
    ins = [(what, p) for what, p in inputs if os.fspath(p) != STDIN]
    for i, (what, out) in enumerate(outputs):
        for in_what, src in ins:
            if same_file(out, src):
                raise InvalidArgumentError(
                    f"{os.fspath(out)}: the {what} must go to a new file, not over its input ({in_what} {os.fspath(src)})"
                )
        for other_what, other in outputs[:i]:
            if same_file(out, other):
                raise InvalidArgumentError(
                    f"{os.fspath(out)}: the {what} and the {other_what} {os.fspath(other)} are the same file; choose two files"
                )


def check_new_output(src: PathArg, dst: PathArg, what: str) -> None:
    """Refuse to write a file derived from ``src`` over ``src`` itself (the library's
    :func:`~nextword.store.rewrite_model` reads the source through a memory map while
    the new file is built, and the source must survive a failure)."""
    check_outputs([("input", src)], [(what, dst)])


def check_writable(path: PathArg, what: str, *, directory: bool = False) -> None:
    """Raise :class:`InvalidArgumentError` naming ``path`` if the file (or, with
    ``directory=True``, the directory created on demand) cannot be written there.

    Checked before long work starts, so a typo in a directory name is reported at once
    rather than after an hour of counting, and by the name the user typed rather than
    by the temporary file the atomic writer would have created.
    """
    name = os.fspath(path)
    if not name:
        raise InvalidArgumentError(f"the {what} needs a file name, got an empty one")
    if directory:
        if os.path.exists(name) and not os.path.isdir(name):
            raise InvalidArgumentError(f"{name}: cannot write the {what} there: it exists and is not a directory")
        probe = name
        while probe and not os.path.exists(probe):  # nearest existing ancestor: created on demand below it
            parent = os.path.dirname(probe.rstrip(os.sep))
            probe = parent if parent != probe else ""
        probe = probe or "."
        if not os.path.isdir(probe):
            raise InvalidArgumentError(f"{name}: cannot create the {what}: {probe} is not a directory")
        if not os.access(probe, os.W_OK | os.X_OK):
            raise InvalidArgumentError(f"{name}: cannot create the {what}: no permission to write in {probe}")
        return
    if os.path.isdir(name):
        raise InvalidArgumentError(f"{name}: cannot write the {what} there: it is a directory")
    parent = os.path.dirname(name) or "."
    if not os.path.isdir(parent):
        what_is = "is not a directory" if os.path.exists(parent) else "does not exist"
        raise InvalidArgumentError(f"{name}: cannot write the {what}: directory {parent} {what_is}")
    if not os.access(parent, os.W_OK | os.X_OK):
        raise InvalidArgumentError(f"{name}: cannot write the {what}: no permission to write in {parent}")
