"""Exact retrieval over a sharded store on a Dask distributed cluster.

:func:`retrieve` and :func:`nearest` take a :class:`~densemem.sharding.ShardedMemory`
(or its folder) and a ``dask.distributed.Client`` (or a scheduler address such
as ``"tcp://10.0.0.5:8786"``). Dask is an optional extra: ``pip install
densemem[dist]``. Without it, the local path
(:meth:`ShardedMemory.retrieve <densemem.sharding.ShardedMemory.retrieve>`)
works unchanged and these functions raise :class:`~densemem.MissingExtraError`.

How one query batch runs
------------------------
1. The client scatters the batch of states to every worker once
   (``broadcast=True``: every worker holds a copy, so losing one loses none).
2. One task per shard computes that shard's partial with the single-machine
   kernel (:func:`densemem.core.exact.exact_reduce`, or
   :func:`densemem.core.candidates.certified_reduce` with its per-query exact
   fallback). The shard's ids travel with its top list, so no global id table
   exists anywhere.
3. Partials are merged on the workers in a tree built as they finish (two
   finished partials become one merge task; the last one standing is fetched by
   the client). The order is whatever the cluster produces; it does not matter.
4. ``steps > 1`` repeats 1-3 per update (one distributed pass per step), and
   the energy is one more pass that skips the weighted sums.

Why the merge is exact
----------------------
A partial over rows ``R`` is ``(m, l, acc, top)`` with ``m`` a reference
(the largest ``z = beta * score``), ``l = sum_R e^(z - m)`` and
``acc = sum_R e^(z - m) x``. For disjoint ``A`` and ``B`` the partial of
``A u B`` is ``m = max(m_A, m_B)``, ``l = l_A e^(m_A - m) + l_B e^(m_B - m)``,
``acc`` likewise, ``top`` = the best k of both (derived merge of partials): an
identity, not an approximation, and associative and commutative, so any tree
gives the single-machine normaliser, state and top list up to float rounding.
Certified shards bound their own omitted mass; the merged bound is the merged
omitted mass over the merged normaliser, proved in :mod:`densemem.sharding._ops`.

Where shards live on workers (and why not Actors)
-------------------------------------------------
Each worker process keeps a small cache: shard folder -> (manifest checksum,
memory-mapped :class:`~densemem.DenseMemory`). A task looks its shard up,
loads it on a miss (checking the shard manifest against ``shards.json``) and
keeps it; a rewritten shard has a new checksum and is reloaded. Tasks carry a
placement hint (shard ``i`` on worker ``i mod n_workers``,
``allow_other_workers=True``) so each shard normally stays on one worker and is
loaded once. Dask Actors were not used: an actor lives on one worker and is
not rebuilt elsewhere when that worker dies, while a plain task is
rescheduled by the scheduler on another worker, which loads the shard from
shared storage.

Faults
------
A worker lost mid-task is noticed by the scheduler and its tasks (and any
finished partials it held) are recomputed on other workers (Dask's
``distributed.scheduler.allowed-failures``, 3 by default); an exception inside a
task is retried ``retries`` times (``submit(..., retries=N)``). A shard that
cannot be loaded raises :class:`~densemem.StoreFormatError` naming the shard
folder; no answer is assembled from fewer than all shards.

Running on a real cluster
-------------------------
Put the sharded store on storage every host mounts at the same path (NFS, a
parallel file system), then::

    host-a$ dask scheduler                        # listens on tcp://host-a:8786
    host-b$ dask worker tcp://host-a:8786 --nthreads 8
    host-c$ dask worker tcp://host-a:8786 --nthreads 8

and call ``densemem.sharding.retrieve(store, q, client="tcp://host-a:8786")``
(or pass a ``Client``). Every worker needs densemem installed. Use about one
shard per worker (or a multiple of the worker count) so the work is even.

Examples
--------
>>> import os, tempfile, numpy as np, densemem
>>> from densemem.sharding import shard_memory
>>> from densemem import sharding as distributed
>>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4)), os.path.join(tempfile.mkdtemp(), "s"), 2)
>>> from dask.distributed import Client  # doctest: +SKIP
>>> with Client(n_workers=2, threads_per_worker=1) as client:  # doctest: +SKIP
...     res = distributed.retrieve(sm, np.eye(4), beta=20.0, client=client, method="exact")
"""

from __future__ import annotations

import os
import threading
import time
import uuid
from collections.abc import Callable
from typing import Any, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from . import _ops as S
from ..core.candidates import CertifiedOptions
from ..core.tiles import DEFAULT_TILE_MIB
from .._validation import check_nonneg_float, check_positive_int
from ..errors import InputTypeError, InputValueError, MissingExtraError
from ..results import NearestResult, RetrievalResult

__all__ = ["SchedulerSpec", "nearest", "retrieve"]

_CACHE: dict[str, tuple[str, Any]] = {}  # per worker process: folder -> (checksum, memory)
_LOCKS: dict[str, threading.Lock] = {}
_GUARD = threading.Lock()
_LOADS: list[str] = []  # folders loaded by this process (for tests and diagnostics)


class SchedulerSpec(BaseModel):
    """Options of ``densemem retrieve/nearest --scheduler tcp://host:port`` (validated at the CLI boundary)."""

    model_config = ConfigDict(frozen=True, extra="forbid")

    scheduler: str = Field(pattern=r"^(tcp|tls|ucx|inproc)://.+$")
    retries: int = Field(2, ge=0)
    timeout: float | None = Field(None, gt=0, allow_inf_nan=False)


def _dask(where: str) -> Any:
    try:
        import distributed
    except ImportError:
        raise MissingExtraError(
            f"{where}: needs Dask distributed, which is not installed; `pip install densemem[dist]`."
        ) from None
    return distributed


# ------------------------------------------------------------- worker side
def _worker_threads() -> int:
    try:
        from distributed import get_worker

        w = get_worker()
        return max(1, int(getattr(getattr(w, "state", w), "nthreads", 1)))
    except (ImportError, ValueError, AttributeError):
        return 1


def _shard(folder: str, checksum: str, number: int, verify: bool, where: str) -> Any:
    """This process's copy of a shard: loaded (memory-mapped) once per checksum."""
    from ._store import load_shard

    with _GUARD:
        lock = _LOCKS.setdefault(folder, threading.Lock())
    with lock:
        hit = _CACHE.get(folder)
        if hit is None or hit[0] != checksum:
            mem = load_shard(folder, checksum, verify=verify, where=where, number=number)
            mem.n_threads = _worker_threads()
            hit = (checksum, mem)
            _CACHE[folder] = hit
            _LOADS.append(folder)
        return hit[1]


def _partial_task(
    shard: tuple[str, str, int, bool, str],
    states: np.ndarray,
    beta: float,
    k: int,
    method: str,
    need_acc: bool,
    cert: CertifiedOptions,
) -> S.ShardPartial:
    mem = _shard(*shard)
    return S.shard_partial(mem, states, beta, k=k, method=method, need_acc=need_acc, cert=cert)


def _nearest_task(shard: tuple[str, str, int, bool, str], q: np.ndarray, k: int, metric: str) -> S.ShardNearest:
    return S.shard_nearest(_shard(*shard), q, k, metric)


# ------------------------------------------------------------- client side
def _store(store: Any, where: str) -> Any:
    from ._memory import ShardedMemory, open_sharded

    if isinstance(store, ShardedMemory):
        return store
    if isinstance(store, (str, os.PathLike)):
        return open_sharded(store)
    raise InputTypeError(f"{where}: `store` must be a ShardedMemory or a sharded store folder; got {type(store).__name__}.")


class _Session:
    """A client (ours to close when made from an address) and the call's settings."""

    def __init__(self, client: Any, *, retries: Any, timeout: Any, where: str) -> None:
        dd = _dask(where)
        self.where = where
        self.retries = check_positive_int(retries, name="retries", where=where, minimum=0)
        self.timeout = None if timeout is None else check_nonneg_float(timeout, name="timeout", where=where, strict=True)
        self.deadline = None if self.timeout is None else time.monotonic() + self.timeout
        self.dd = dd
        self.owned = False
        if isinstance(client, str):
            self.client = dd.Client(client, set_as_default=False, timeout=self.timeout or 30)
            self.owned = True
        elif isinstance(client, dd.Client):
            self.client = client
        else:
            raise InputTypeError(
                f"{where}: `client` must be a dask.distributed.Client or a scheduler address "
                f"like 'tcp://host:8786'; got {type(client).__name__}."
            )

    def __enter__(self) -> _Session:
        return self

    def __exit__(self, *exc: object) -> None:
        if self.owned:
            self.client.close()

    def _left(self) -> float | None:
        if self.deadline is None:
            return None
        left = self.deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError(f"{self.where}: no answer within timeout={self.timeout:g} s.")
        return left

    def placement(self, n_shards: int) -> list[str | None]:
        workers = sorted(self.client.scheduler_info().get("workers", {}))
        if not workers:
            raise InputValueError(f"{self.where}: the Dask cluster has no workers; start `dask worker` processes first.")
        return [workers[i % len(workers)] for i in range(n_shards)]

    def run(self, task: Callable[..., Any], shards: list[tuple[str, str, int, bool, str]], batch: np.ndarray,
            args: tuple[Any, ...], merge: Callable[[Any, Any], Any]) -> Any:
        """One distributed pass: scatter the batch once, a task per shard, a merge tree on the workers."""
        c, tag = self.client, uuid.uuid4().hex[:12]
        where = self.placement(len(shards))
        data = c.scatter(batch, broadcast=True, hash=False)
        futs = [
            c.submit(task, sh, data, *args, key=f"densemem-shard-{i}-{tag}", workers=[where[i]],
                     allow_other_workers=True, retries=self.retries, pure=False)
            for i, sh in enumerate(shards)
        ]
        made = list(futs)
        try:
            final = self._tree(futs, merge, made, tag)
            return final.result(timeout=self._left())
        except TimeoutError:
            raise TimeoutError(f"{self.where}: no answer within timeout={self.timeout:g} s.") from None
        finally:
            c.cancel(made)
            c.cancel([data])

    def _tree(self, futs: list[Any], merge: Callable[[Any, Any], Any], made: list[Any], tag: str) -> Any:
        """Merge partials two at a time as they finish; a failed shard raises at once."""
        ready: list[Any] = []
        done = self.dd.as_completed(futs, timeout=self._left(), loop=self.client.loop)
        n = 0
        for fut in done:
            if fut.status == "error":
                fut.result()  # re-raises the shard's error (for example StoreFormatError)
            ready.append(fut)
            if len(ready) == 2:
                m = self.client.submit(merge, ready.pop(), ready.pop(), key=f"densemem-merge-{n}-{tag}",
                                       retries=self.retries, pure=False)
                made.append(m)
                done.add(m)
                n += 1
        return ready[0]


def _shards(sm: Any, verify: bool, where: str) -> list[tuple[str, str, int, bool, str]]:
    return [(f, c, i, verify, where) for i, (f, c) in enumerate(zip(sm.shard_folders, sm.checksums))]


def retrieve(
    store: Any,
    queries: Any,
    beta: float | None = None,
    *,
    client: Any,
    steps: int = 1,
    tol: float = 1e-6,
    k: int | None = None,
    method: Literal["auto", "exact", "certified"] = "auto",
    return_energy: bool = True,
    tol_mass: float = 1e-6,
    k_max: int = 1024,
    retries: int = 2,
    timeout: float | None = None,
    verify: bool = True,
) -> RetrievalResult:
    """Softmax retrieval over every shard of a sharded store, on a Dask cluster.

    Returns what :meth:`densemem.DenseMemory.retrieve` returns for a memory
    holding every row (states to float32 rounding, identical top ids).

    Parameters
    ----------
    store : ShardedMemory or str or os.PathLike
        The sharded store; its folder must be readable by every worker at the same path.
    queries : array-like of shape (n_queries, dim) or (dim,)
        Sent to the workers once per update, as one batch.
    beta, steps, tol, k, method, return_energy, tol_mass, k_max
        As for :meth:`densemem.DenseMemory.retrieve` ("index" is not available
        on shards). "certified" and "auto" certify each shard for its own rows;
        the reported ``mass_bound`` is the merged omitted mass over the merged
        normaliser (<= the largest shard bound), ``fell_back`` marks queries
        that some shard answered by its exact path, ``k_used`` sums the
        candidates over shards.
    client : dask.distributed.Client or str
        A connected client, or a scheduler address ("tcp://host:8786"; a
        client is made and closed for this call).
    retries : int, default 2
        Times Dask reruns a task that raised (worker loss is handled by the
        scheduler separately).
    timeout : float, optional
        Seconds to wait for the whole call before raising ``TimeoutError``.
    verify : bool, default True
        Workers check shard files' sha256 when they first load a shard.

    Returns
    -------
    RetrievalResult

    Raises
    ------
    MissingExtraError
        Dask distributed is not installed.
    StoreFormatError
        A shard cannot be loaded (the message names its folder).
    InputValueError, InputTypeError
        Bad queries or options, or a cluster without workers.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem import sharding as distributed
    >>> distributed.retrieve("/no/such/store", np.eye(2), client=None)  # doctest: +SKIP
    """
    where = "densemem.sharding.retrieve"
    with _Session(client, retries=retries, timeout=timeout, where=where) as session:
        sm = _store(store, where)
        args = S.check_retrieve(
            sm._layout(), queries, beta, sm.beta, steps=steps, tol=tol, k=k, method=method,
            return_energy=return_energy, tol_mass=tol_mass, k_max=k_max, tile_mib=DEFAULT_TILE_MIB, where=where,
        )
        shards = _shards(sm, bool(verify), where)

        def run_pass(states: np.ndarray, kk: int, need_acc: bool, cert: CertifiedOptions) -> S.ShardPartial:
            return session.run(_partial_task, shards, states, (args.beta, kk, args.method, need_acc, cert), S.merge)

        return S.run_retrieve(run_pass, sm._layout(), args)


def nearest(
    store: Any,
    queries: Any,
    k: int | None = None,
    *,
    client: Any,
    metric: Literal["ip", "l2"] = "ip",
    retries: int = 2,
    timeout: float | None = None,
    verify: bool = True,
) -> NearestResult:
    """Exact k nearest stored patterns over every shard, on a Dask cluster.

    Each shard runs faiss brute-force search on its rows; the top lists are
    merged on the workers. Equals :meth:`densemem.DenseMemory.nearest` on all
    rows. Parameters as for :func:`retrieve` and
    :meth:`densemem.DenseMemory.nearest`.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem import sharding as distributed
    >>> distributed.nearest("/no/such/store", np.eye(2), k=1, client=None)  # doctest: +SKIP
    """
    where = "densemem.sharding.nearest"
    with _Session(client, retries=retries, timeout=timeout, where=where) as session:
        sm = _store(store, where)
        q, was_1d, k = S.check_nearest(sm._layout(), queries, k, metric, where=where)
        merged = session.run(_nearest_task, _shards(sm, bool(verify), where), q, (k, metric), S.merge_nearest)
        return S.nearest_result(merged, was_1d)
