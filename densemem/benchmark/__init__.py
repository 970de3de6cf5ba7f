"""Recall@k, speed and memory of every retrieval path beside faiss Flat, HNSW and IVF, measured in one process."""

from ._run import (
    BenchRecord,
    BenchReport,
    BenchResults,
    BenchSpec,
    MachineFacts,
    load_results,
    plot_benchmark,
    recall_at_k,
    run_benchmark,
)

__all__ = [
    "BenchRecord",
    "BenchReport",
    "BenchResults",
    "BenchSpec",
    "MachineFacts",
    "load_results",
    "plot_benchmark",
    "recall_at_k",
    "run_benchmark",
]
