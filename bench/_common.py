"""Shared helpers for the bench scripts: timing medians, memory peaks, machine facts."""

from __future__ import annotations

import json
import os
import platform
import time
import tracemalloc
from pathlib import Path
from typing import Any, Callable

import numpy as np

RESULTS = Path(__file__).resolve().parent / "results"


def median_time(fn: Callable[[], Any], repeats: int = 5, warmup: int = 1) -> float:
    """Median wall time of ``fn`` over ``repeats`` runs after ``warmup`` runs."""
    for _ in range(warmup):
        fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return float(np.median(times))


def paired_times(fn: Callable[[], Any], base: Callable[[], Any], repeats: int = 5) -> tuple[float, float]:
    """Medians of ``fn`` and ``base`` timed back to back in each repeat (after one warm-up each)."""
    fn()
    base()
    a, b = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        base()
        b.append(time.perf_counter() - t0)
        t0 = time.perf_counter()
        fn()
        a.append(time.perf_counter() - t0)
    return float(np.median(a)), float(np.median(b))


def peak_python_mib(fn: Callable[[], Any]) -> float:
    """Peak memory (MiB) traced by tracemalloc while ``fn`` runs (NumPy buffers included)."""
    tracemalloc.start()
    tracemalloc.reset_peak()
    base, _ = tracemalloc.get_traced_memory()
    fn()
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return (peak - base) / 2**20


def machine_facts() -> dict[str, Any]:
    """CPU count, library versions, BLAS threads and core type: printed with every bench."""
    import faiss
    import scipy
    from threadpoolctl import threadpool_info

    return {
        "cpu_count": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "faiss": faiss.__version__,
        "blas": [
            {k: v for k, v in info.items() if k in ("internal_api", "num_threads", "architecture", "version")}
            for info in threadpool_info()
        ],
        "OPENBLAS_CORETYPE": os.environ.get("OPENBLAS_CORETYPE"),
        "load_average": os.getloadavg(),
    }


def unit_rows(rng: np.random.Generator, n: int, d: int) -> np.ndarray:
    x = rng.standard_normal((n, d), dtype=np.float32)
    x /= np.linalg.norm(x, axis=1, keepdims=True)
    return x


def noisy_queries(rng: np.random.Generator, x: np.ndarray, n: int, noise: float) -> np.ndarray:
    """Stored rows plus Gaussian noise of relative size ``noise``, normalized."""
    src = rng.choice(x.shape[0], n, replace=False)
    q = x[src] + np.float32(noise / np.sqrt(x.shape[1])) * rng.standard_normal((n, x.shape[1]), dtype=np.float32)
    q /= np.linalg.norm(q, axis=1, keepdims=True)
    return np.ascontiguousarray(q)


def write_json(name: str, payload: dict[str, Any]) -> Path:
    RESULTS.mkdir(exist_ok=True)
    path = RESULTS / name
    path.write_text(json.dumps(payload, indent=2, default=float))
    return path
