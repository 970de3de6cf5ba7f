"""What the benchmark measures and how (private): recall@k, medians, memory peaks, machine.

* recall@k: mean over queries of ``|returned top-k & true top-k| / k`` (common
  practice in approximate nearest-neighbour benchmarks; recall@1 is top-1
  agreement). A returned id of -1 (faiss's "no result") never matches.
* time: the median of ``repeats`` wall times after ``warmup`` untimed calls;
  a row with a baseline is timed alternately with it (call, baseline call, ...),
  so both medians see the same machine load.
* memory: one extra call watched twice: tracemalloc's peak (Python and NumPy
  allocations) and the process RSS peak over the RSS before the call, read
  from /proc (Linux: writing "5" to /proc/self/clear_refs resets the peak
  ``VmHWM``; where that is refused, the RSS after the call is used).
"""

from __future__ import annotations

import os
import platform
import time
import tracemalloc
from collections.abc import Callable
from typing import Any

import numpy as np

from ..errors import InputTypeError, InputValueError

__all__ = ["machine_facts", "median", "memory_peaks", "paired_times", "recall_at_k", "time_calls"]

_MIB = 2.0**20


def _ids_matrix(a: Any, name: str, where: str) -> np.ndarray:
    arr = np.asarray(a)
    if arr.ndim == 1:
        arr = arr[:, None]
    if arr.ndim != 2:
        raise InputValueError(f"{where}: `{name}` must be 2-D (n_queries, k); got shape {arr.shape}.")
    if arr.dtype.kind not in "iuU":
        raise InputTypeError(f"{where}: `{name}` must hold integer or string ids; got dtype {arr.dtype}.")
    return arr


def recall_at_k(found: Any, truth: Any, k: int) -> float:
    """recall@k = mean over queries of ``|found[:k] & truth[:k]| / k``.

    Parameters
    ----------
    found : array-like of shape (n_queries, >= k)
        Returned ids per query, best first (-1: no result, never a match).
    truth : array-like of shape (n_queries, >= k)
        True nearest ids per query (exact search), best first.
    k : int
        How many of each list to compare.

    Returns
    -------
    float
        In [0, 1]; recall@1 is the fraction of queries whose first id is the true first.

    Examples
    --------
    >>> from densemem.benchmark import recall_at_k
    >>> recall_at_k([[3, 1], [0, 9]], [[1, 3], [0, 2]], k=2)
    0.75
    """
    where = "recall_at_k"
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise InputValueError(f"{where}: `k` must be an integer >= 1; got {k!r}.")
    f, t = _ids_matrix(found, "found", where), _ids_matrix(truth, "truth", where)
    if f.shape[0] != t.shape[0]:
        raise InputValueError(f"{where}: `found` has {f.shape[0]} queries but `truth` has {t.shape[0]}.")
    for name, arr in (("found", f), ("truth", t)):
        if arr.shape[1] < k:
            raise InputValueError(f"{where}: `{name}` has {arr.shape[1]} ids per query; k={k} needs at least {k}.")
    if f.shape[0] == 0:
        raise InputValueError(f"{where}: no queries to score.")
    f, t = f[:, :k], t[:, :k]
    hit = (f[:, :, None] == t[:, None, :]).any(axis=2)
    if f.dtype.kind in "iu":
        hit &= f >= 0
    return float(hit.sum(axis=1).mean() / k)


def median(values: list[float]) -> float:
    """The median (the middle value; the mean of the two middle values for an even count)."""
    return float(np.median(np.asarray(values, dtype=np.float64)))


def time_calls(fn: Callable[[], Any], repeats: int, warmup: int) -> tuple[list[float], Any]:
    """Wall times of ``repeats`` calls after ``warmup`` untimed ones, and the last result."""
    out = None
    for _ in range(warmup):
        out = fn()
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        times.append(max(time.perf_counter() - t0, 1e-9))
    return times, out


def paired_times(fn: Callable[[], Any], base: Callable[[], Any], repeats: int,
                 warmup: int) -> tuple[list[float], list[float], Any]:
    """Times of ``fn`` and of its baseline ``base`` called alternately (both see the same load)."""
    out = None
    for _ in range(warmup):
        out = fn()
        base()
    times, base_times = [], []
    for _ in range(repeats):
        t0 = time.perf_counter()
        out = fn()
        t1 = time.perf_counter()
        base()
        t2 = time.perf_counter()
        times.append(max(t1 - t0, 1e-9))
        base_times.append(max(t2 - t1, 1e-9))
    return times, base_times, out


def _status_kib(field: str) -> float | None:
    try:
        with open("/proc/self/status") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return float(line.split()[1])
    except OSError:
        return None
    return None


def _reset_peak() -> bool:
    try:
        with open("/proc/self/clear_refs", "w") as fh:
            fh.write("5")
        return True
    except OSError:
        return False


def memory_peaks(fn: Callable[[], Any], *, python: bool = True) -> tuple[float, float, Any]:
    """(tracemalloc peak MiB, RSS peak over the starting RSS in MiB, result) of one call of ``fn``."""
    rss0 = _status_kib("VmRSS")
    exact_peak = _reset_peak()
    was_tracing = tracemalloc.is_tracing()
    if python and not was_tracing:
        tracemalloc.start()
    base = tracemalloc.get_traced_memory()[0] if python else 0
    if python:
        tracemalloc.reset_peak()
    try:
        out = fn()
        py = (tracemalloc.get_traced_memory()[1] - base) / _MIB if python else 0.0
    finally:
        if python and not was_tracing:
            tracemalloc.stop()
    after = _status_kib("VmHWM" if exact_peak else "VmRSS")
    rss = 0.0 if rss0 is None or after is None else max(after - rss0, 0.0) / 1024.0
    return max(py, 0.0), rss, out


def _blas() -> list[dict[str, Any]]:
    try:
        from threadpoolctl import threadpool_info
    except ImportError:  # pragma: no cover - a core dependency
        return []
    keep = ("user_api", "internal_api", "num_threads", "version", "architecture")
    return [{k: info.get(k) for k in keep} for info in threadpool_info()]


def machine_facts() -> dict[str, Any]:
    """CPU count, library versions, BLAS threads (threadpoolctl), OPENBLAS_CORETYPE, load."""
    import faiss
    import pydantic
    import scipy

    from .._version import __version__
    try:
        usable = len(os.sched_getaffinity(0))
    except (AttributeError, OSError):  # pragma: no cover - not Linux
        usable = None
    return {
        "cpu_count": os.cpu_count(),
        "usable_cpus": usable,
        "platform": platform.platform(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "scipy": scipy.__version__,
        "faiss": faiss.__version__,
        "pydantic": pydantic.VERSION,
        "densemem": __version__,
        "blas": _blas(),
        "faiss_omp_threads": int(faiss.omp_get_max_threads()),
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
        "load_average_start": list(load_average()),
    }


def load_average() -> tuple[float, float, float]:
    """1, 5 and 15 minute load averages ((0, 0, 0) where the OS does not report them)."""
    try:
        return tuple(float(v) for v in os.getloadavg())  # type: ignore[return-value]
    except OSError:  # pragma: no cover
        return (0.0, 0.0, 0.0)
