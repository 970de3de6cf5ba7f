"""densemem: dense associative memory retrieval.

Store real-valued embeddings and retrieve them with the continuous (modern)
Hopfield update: softmax attention over the stored patterns, a log-sum-exp
energy and an inverse temperature beta. Beside it: classic and dense binary
memories, beta tuning, near-duplicate grouping, capacity experiments, a store
folder format and readers for embedding files.

The job modules keep their report and option classes:
``densemem.tuning``, ``densemem.duplicates``, ``densemem.capacity``,
``densemem.storage``, ``densemem.readers``.
"""

from .benchmark import BenchReport, BenchSpec, recall_at_k, run_benchmark
from .binary import BinaryMemory, BinaryRetrieval, DenseBinaryMemory
from .capacity import capacity_curve, estimate_capacity, robustness_curve
from .dense import DenseMemory
from .duplicates import DuplicateGroup, DuplicatePlan, find_duplicates
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
from .readers import EmbeddingTable, read_embeddings
from .results import NearestResult, RetrievalResult
from .sharding import ShardedMemory, open_sharded, shard_memory
from .storage import load_memory, save_memory
from .tuning import choose_beta, predict_beta, separation, sweep_beta, tune_beta

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "DenseMemory",
    "RetrievalResult",
    "NearestResult",
    "BinaryMemory",
    "DenseBinaryMemory",
    "BinaryRetrieval",
    "separation",
    "predict_beta",
    "sweep_beta",
    "choose_beta",
    "tune_beta",
    "find_duplicates",
    "DuplicatePlan",
    "DuplicateGroup",
    "run_benchmark",
    "BenchSpec",
    "BenchReport",
    "recall_at_k",
    "estimate_capacity",
    "capacity_curve",
    "robustness_curve",
    "save_memory",
    "load_memory",
    "read_embeddings",
    "shard_memory",
    "open_sharded",
    "ShardedMemory",
    "EmbeddingTable",
    "DenseMemError",
    "DenseMemWarning",
    "IndexStaleError",
    "InputTypeError",
    "InputValueError",
    "MissingExtraError",
    "StoreFormatError",
    "UnknownIdError",
]
