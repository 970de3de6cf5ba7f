"""Exact retrieval over a sharded store on a Dask distributed cluster.

:meth:`ShardedMemory.on_cluster <densemem.ShardedMemory.on_cluster>` takes a
``dask.distributed.Client`` (or a scheduler address such as
``"tcp://10.0.0.5:8786"``) and gives a :class:`ClusterShards`: the same
``retrieve``, ``energy`` and ``nearest`` as every memory (one front door), run
by the workers through one client. Dask is an optional extra: ``pip install
densemem[dist]``. Without it, the local path works unchanged and
``on_cluster`` raises :class:`~densemem.MissingExtraError`.

How one query batch runs
------------------------
1. The client scatters the batch of states to every worker once
   (``broadcast=True``: every worker holds a copy, so losing one loses none).
2. One task per shard computes that shard's partial with the single-machine
   row source (:class:`densemem.core.rows.TableRows`: exact, or certified
   with its per-query exact fallback). The shard's ids travel with its top list, so no global id table
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
gives the single-machine normalizer, state and top list up to float rounding.
Certified shards bound their own omitted mass; the merged bound is the merged
omitted mass over the merged normalizer, proved in :mod:`densemem.core.rows`.

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

and call ``open_sharded(store).on_cluster("tcp://host-a:8786").retrieve(q)``
(or pass a ``Client``). Every worker needs densemem installed. Use about one
shard per worker (or a multiple of the worker count) so the work is even.

Examples
--------
>>> import os, tempfile, numpy as np, densemem
>>> from densemem.sharding import shard_memory
>>> sm = shard_memory(densemem.DenseMemory.from_array(np.eye(4)), os.path.join(tempfile.mkdtemp(), "s"), 2)
>>> from dask.distributed import Client  # doctest: +SKIP
>>> with Client(n_workers=2, threads_per_worker=1) as client:  # doctest: +SKIP
...     res = sm.on_cluster(client).retrieve(np.eye(4), beta=20.0, method="exact")
"""

from __future__ import annotations

import functools
import threading
import time
import uuid
from collections.abc import Callable
from typing import Any, Literal

import numpy as np

from . import _ops as S
from .._front import Retriever
from ..core import sparse as SP
from ..core.candidates import CertifiedOptions
from ..core.rows import IdPartial
from ..core.rows import merge as merge_partials
from ..options import Layout, RetrievalOptions
from .._validation import check_nonneg_float, check_positive_int
from ..errors import InputTypeError, InputValueError, MissingExtraError

__all__ = ["ClusterShards"]

_CACHE: dict[str, tuple[str, Any]] = {}  # per worker process: folder -> (checksum, memory)
_LOCKS: dict[str, threading.Lock] = {}
_GUARD = threading.Lock()
_LOADS: list[str] = []  # folders loaded by this process (for tests and diagnostics)


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
    n_candidates: int = 32,
) -> IdPartial:
    return S.shard_rows(_shard(*shard), method, n_candidates).reduce(states, beta, k=k, need_acc=need_acc, cert=cert)


def _support_task(shard: tuple[str, str, int, bool, str], states: np.ndarray, beta: float, smap: Any,
                  k_start: int, cap: int, need_rows: bool) -> Any:
    return S.shard_rows(_shard(*shard), "auto").sparse_support(states, beta, smap, k_start=k_start, cap=cap,
                                                             need_rows=need_rows)


def _sums_task(shard: tuple[str, str, int, bool, str], states: np.ndarray, beta: float, alpha: float,
               tau: np.ndarray, k: int, final: bool, need_acc: bool) -> Any:
    return S.shard_rows(_shard(*shard), "auto").sparse_sums(states, beta, alpha, tau, k=k, final=final,
                                                          need_acc=need_acc)


def _index_task(shard: tuple[str, str, int, bool, str], settings: dict[str, Any]) -> dict[str, Any]:
    """Build one shard's index on a worker and write the shard as a new folder beside it: its entry."""
    from pathlib import Path

    from ._store import write_shard

    mem = _shard(*shard)
    if len(mem):
        mem.build_index(**settings)
    entry = write_shard(Path(shard[0]).parent, mem, shard[4])
    entry["index"] = dict(settings) if len(mem) else None
    return entry


def _nearest_task(shard: tuple[str, str, int, bool, str], q: np.ndarray, k: int, metric: str) -> S.ShardNearest:
    return S.shard_nearest(_shard(*shard), q, k, metric)


# ------------------------------------------------------------- client side
class _Session:
    """A client (ours to close when made from an address) and the call's settings."""

    def __init__(self, client: Any, *, retries: Any, timeout: Any, where: str) -> None:
        dd = _dask(where)
        self.where = where
        self.retries = check_positive_int(retries, name="retries", where=where, minimum=0)
        self.timeout = None if timeout is None else check_nonneg_float(timeout, name="timeout", where=where, strict=True)
        self.deadline: float | None = None
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

    def start_call(self, where: str) -> None:
        """A new public call: its name for errors, and its own deadline."""
        self.where = where
        self.deadline = None if self.timeout is None else time.monotonic() + self.timeout

    def close(self) -> None:
        if self.owned:
            self.client.close()
            self.owned = False

    def _left(self) -> float | None:
        if self.deadline is None:
            return None
        left = self.deadline - time.monotonic()
        if left <= 0:
            raise TimeoutError(f"{self.where}: no answer within timeout={self.timeout:g} s.")
        return left

    def placement(self, n_shards: int) -> list[str | None]:
        workers = sorted(self.client.scheduler_info().get("workers", {}))
        if not workers:  # a worker may be (re)starting: wait a little before calling the cluster empty
            try:
                self.client.wait_for_workers(1, timeout=min(10.0, self._left() or 10.0))
            except Exception:  # noqa: BLE001 - dask raises its own TimeoutError types
                pass
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


class _DaskShards:
    """Every shard reduced by a Dask task, merged on the workers: a row source."""

    def __init__(self, session: _Session, shards: list[tuple[str, str, int, bool, str]], method: str,
                 n_candidates: int = 32) -> None:
        self.session, self.shards, self.method, self.n_candidates = session, shards, method, n_candidates

    def row_blocks(self) -> Any:
        """The shards' rows, read here from the shared folders (only the tiny-beta energy needs them)."""
        from ._store import load_shard

        for folder, checksum, number, verify, where in self.shards:
            yield from S.shard_rows(load_shard(folder, checksum, verify=verify, where=where, number=number),
                                    "exact").row_blocks()

    def reduce(self, states: np.ndarray, beta: float, *, k: int, need_acc: bool, cert: CertifiedOptions) -> IdPartial:
        return self.session.run(_partial_task, self.shards, states,
                                (beta, k, self.method, need_acc, cert, self.n_candidates), merge_partials)

    def sparse_support(self, states: np.ndarray, beta: float, smap: Any, *, k_start: int, cap: int,
                       need_rows: bool) -> Any:
        """Every shard's certified support on its worker, merged by union on the workers."""
        return self.session.run(_support_task, self.shards, states, (beta, smap, k_start, cap, need_rows),
                                functools.partial(SP.merge_support, alpha=smap.alpha))

    def sparse_sums(self, states: np.ndarray, beta: float, alpha: float, tau: np.ndarray, *, k: int, final: bool,
                    need_acc: bool) -> Any:
        """Every shard's tiled sums at tau on its worker, added up on the workers."""
        return self.session.run(_sums_task, self.shards, states, (beta, alpha, tau, k, final, need_acc),
                                SP.merge_sums)


class ClusterShards(Retriever):
    """A sharded store on a Dask cluster: ``retrieve``, ``energy`` and ``nearest`` run by the workers.

    Made by :meth:`densemem.ShardedMemory.on_cluster`; the calls and their
    options are those of :class:`densemem.DenseMemory` (``method="index"`` is
    not available on shards). Every call uses the one client; the top manifest
    is read once, and each worker checks a shard's manifest once, when it
    first loads the shard. Use it as a context manager (a client made from an
    address is closed at the end).

    Examples
    --------
    >>> import numpy as np
    >>> from densemem.sharding import open_sharded
    >>> cluster = open_sharded("/shared/shards").on_cluster("tcp://10.0.0.5:8786")  # doctest: +SKIP
    >>> cluster.nearest(np.ones(64), k=3).ids  # doctest: +SKIP
    """

    _methods = S.SHARD_METHODS
    _name = "ClusterShards"
    _lazy_energy = False  # the client may be closed by the time a result is read

    def __init__(self, store: Any, client: Any, *, retries: Any = 2, timeout: Any = None, verify: Any = True) -> None:
        where = "ShardedMemory.on_cluster"
        self._store = store
        self._layout_ = store._layout()
        self._session = _Session(client, retries=retries, timeout=timeout, where=where)
        self._shards = _shards(store, bool(verify), where)

    def __enter__(self) -> "ClusterShards":
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the client if this object made it (from a scheduler address)."""
        self._session.close()

    @property
    def client(self) -> Any:
        """The dask.distributed client every call uses."""
        return self._session.client

    def __repr__(self) -> str:
        return f"ClusterShards(store={str(self._store.path)!r}, n_shards={len(self._shards)})"

    def _layout(self) -> Layout:
        return self._layout_

    def _source(self, opts: RetrievalOptions, *, where: str) -> _DaskShards:
        if opts.method == "index":
            for i, entry in enumerate(self._store._man["shards"]):
                if int(entry["count"]) and not entry.get("index"):
                    raise InputValueError(
                        f"{where}: shard {i} at {self._store.shard_folders[i]!r} has no candidate index; "
                        "call build_index('hnsw') or build_index('ivf') on the sharded store first.")
        self._session.start_call(where)
        shards = [(f, c, i, v, where) for f, c, i, v, _ in self._shards]
        return _DaskShards(self._session, shards, opts.method, opts.n_candidates)

    def build_index(self, kind: Literal["hnsw", "ivf"] = "hnsw", **params: Any) -> dict[str, Any]:
        """Build every shard's candidate index on the workers (persisted beside each shard).

        As :meth:`densemem.ShardedMemory.build_index`, with one task per shard:
        each worker writes its shard as a new folder with the index, and this
        process then replaces ``shards.json`` once. Settings are checked here first.

        Examples
        --------
        >>> import numpy as np
        >>> from densemem.sharding import open_sharded
        >>> with open_sharded("/shared/shards").on_cluster("tcp://10.0.0.5:8786") as c:  # doctest: +SKIP
        ...     c.build_index("hnsw", M=32)["kind"]
        'hnsw'
        """
        from ..core.index import default_settings
        from ._store import tidy

        where = f"{self._name}.build_index"
        settings = {"kind": kind, **params}
        default_settings(kind, max(1, max(self._store.counts)), **params)  # bad settings fail before any task
        store = self._store
        tidy(store.path, store._man)
        self._session.start_call(where)
        c = self._session.client
        shards = [(f, cs, i, v, where) for f, cs, i, v, _ in self._shards]
        futs = [c.submit(_index_task, sh, settings, pure=False, retries=self._session.retries) for sh in shards]
        entries = c.gather(futs)
        man = store._next_manifest()
        man["shards"] = entries
        store._commit(man)
        self._shards = _shards(store, self._shards[0][3] if self._shards else True, "ShardedMemory.on_cluster")
        return dict(settings)

    def _nearest_batch(self, q: np.ndarray, k: int, metric: str, index: bool, *, where: str) -> tuple[np.ndarray, np.ndarray]:
        if index:
            raise InputValueError(f"{where}: the candidate index is not available on a sharded store; "
                                  "shards use faiss exact search.")
        self._session.start_call(where)
        shards = [(f, c, i, v, where) for f, c, i, v, _ in self._shards]
        merged = self._session.run(_nearest_task, shards, q, (k, metric), S.merge_nearest)
        return merged.ids, merged.scores
