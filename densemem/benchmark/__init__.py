"""Recall@k, speed and memory of every retrieval path beside faiss Flat, HNSW and IVF, measured in one process."""

from ._measure import recall_at_k
from ._run import BenchReport, load_results, plot_benchmark, run_benchmark
from ._spec import BenchRecord, BenchResults, BenchSpec, MachineFacts

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
