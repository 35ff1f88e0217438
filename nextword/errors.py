"""Exception types raised by nextword.

Callers embedding the engine need to tell three situations apart without parsing
messages: they passed a bad argument (fix the call), an input corpus is unreadable
(fix the data), or a model file is damaged or foreign (retrain or re-download).
Every exception the library raises on purpose derives from :class:`NextwordError`.
"""

from __future__ import annotations

__all__ = ["NextwordError", "ModelFormatError", "InputDataError", "InvalidArgumentError", "LayerNotFoundError"]


class NextwordError(Exception):
    """Base class of every error nextword raises deliberately."""


class ModelFormatError(NextwordError):
    """A model file is not a nextword model, is of an unsupported version, or is damaged.

    Model files are treated as untrusted input: any inconsistency found while opening
    or reading one raises this, never a crash or an unrelated exception.
    """


class InputDataError(NextwordError):
    """A training or evaluation input cannot be read (missing file, bad JSON, bad encoding)."""


class LayerNotFoundError(InputDataError):
    """A personal layer file that should exist does not (a wrong or relative path).

    Opening a layer never creates one by accident: creating is asked for explicitly
    (``PersonalLayer.open(..., create=True)``), so a typo cannot silently start an
    empty layer beside the real one.
    """


class InvalidArgumentError(NextwordError, ValueError):
    """An argument has a value outside its documented range (e.g. λ not in [0, 1], k < 1)."""
