"""densemem: dense associative memory retrieval.

Store real-valued embeddings and retrieve them with the continuous (modern)
Hopfield update: softmax attention over the stored patterns, a log-sum-exp
energy and an inverse temperature beta.
"""

from .dense import DenseMemory
from .errors import (
    DenseMemError,
    DenseMemWarning,
    IndexStaleError,
    InputTypeError,
    InputValueError,
    MissingExtraError,
    StoreFormatError,
    UnknownIdError,
)
from .results import NearestResult, RetrievalResult

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "DenseMemory",
    "RetrievalResult",
    "NearestResult",
    "DenseMemError",
    "DenseMemWarning",
    "IndexStaleError",
    "InputTypeError",
    "InputValueError",
    "MissingExtraError",
    "StoreFormatError",
    "UnknownIdError",
]
