"""densemem: dense associative memory retrieval.

Store real-valued embeddings and retrieve them with the continuous (modern)
Hopfield update: softmax attention over the stored patterns, a log-sum-exp
energy and an inverse temperature beta. Beside it: classic and dense binary
memories, beta tuning, near-duplicate grouping, capacity experiments, a store
folder format and readers for embedding files.

The top level holds the memories, the job entry points, the results and the
errors. Each job package keeps its own option and report classes:
:mod:`densemem.tuning`, :mod:`densemem.duplicates`, :mod:`densemem.capacity`,
:mod:`densemem.benchmark`, :mod:`densemem.sharding`, :mod:`densemem.store`,
:mod:`densemem.binary`; the rest of the error classes are in
:mod:`densemem.errors`.
"""

from typing import TYPE_CHECKING, Any

from ._version import __version__ as __version__
from .errors import (
    DenseMemError,
    InputTypeError,
    InputValueError,
    MissingExtraError,
    StoreFormatError,
    UnknownIdError,
)

# Heavy modules (faiss, scipy, pydantic) load when a name is first used, not at
# ``import densemem`` (PEP 562 module __getattr__); each name's home is below.
_HOMES = {
    "DenseMemory": ".dense",
    "ShardedMemory": ".sharding",
    "BinaryMemory": ".binary",
    "DenseBinaryMemory": ".binary",
    "BinaryRetrieval": ".binary",
    "RetrievalResult": ".results",
    "NearestResult": ".results",
    "tune_beta": ".tuning",
    "plan_duplicates": ".duplicates",
    "estimate_capacity": ".capacity",
    "run_benchmark": ".benchmark",
    "shard_memory": ".sharding",
    "open_sharded": ".sharding",
    "read_embeddings": ".store",
}

if TYPE_CHECKING:  # pragma: no cover - for type checkers and IDEs only
    from .benchmark import run_benchmark
    from .binary import BinaryMemory, BinaryRetrieval, DenseBinaryMemory
    from .capacity import estimate_capacity
    from .dense import DenseMemory
    from .duplicates import plan_duplicates
    from .results import NearestResult, RetrievalResult
    from .sharding import ShardedMemory, open_sharded, shard_memory
    from .store import read_embeddings
    from .tuning import tune_beta


def __getattr__(name: str) -> Any:
    home = _HOMES.get(name)
    if home is None:
        raise AttributeError(f"module 'densemem' has no attribute {name!r}")
    import importlib

    value = getattr(importlib.import_module(home, __name__), name)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOMES))


__all__ = [
    "DenseMemory",
    "ShardedMemory",
    "BinaryMemory",
    "DenseBinaryMemory",
    "RetrievalResult",
    "NearestResult",
    "BinaryRetrieval",
    "tune_beta",
    "plan_duplicates",
    "estimate_capacity",
    "run_benchmark",
    "shard_memory",
    "open_sharded",
    "read_embeddings",
    "DenseMemError",
    "InputTypeError",
    "InputValueError",
    "UnknownIdError",
    "StoreFormatError",
    "MissingExtraError",
]
