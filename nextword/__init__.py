"""nextword: an embeddable next-word suggestion engine for keyboards and input methods.

Train a compact interpolated bigram model from a corpus, then ask it on every keystroke
for the k words the user most likely wants next or is in the middle of typing.
"""

from .counts import DEFAULT_MAX_VOCAB, DEFAULT_MIN_COUNT, CountBuilder, CountTables
from .errors import InputDataError, InvalidArgumentError, LayerNotFoundError, ModelFormatError, NextwordError
from .build import DEFAULT_LAMBDA, TrainReport, train, train_texts
from .model import Model, Suggestion, load
from .mix import MixedModel, load_mix

__version__ = "0.1.0"

__all__ = [
    "CountBuilder",
    "CountTables",
    "DEFAULT_LAMBDA",
    "DEFAULT_MAX_VOCAB",
    "DEFAULT_MIN_COUNT",
    "InputDataError",
    "InvalidArgumentError",
    "LayerNotFoundError",
    "MixedModel",
    "Model",
    "ModelFormatError",
    "NextwordError",
    "Suggestion",
    "TrainReport",
    "__version__",
    "load",
    "load_mix",
    "train",
    "train_texts",
]
