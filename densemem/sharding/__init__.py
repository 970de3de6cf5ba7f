"""Sharded stores: one folder of ordinary stores under a ``shards.json`` manifest.

:func:`shard_memory` splits a memory into shards, :func:`open_sharded` opens
them, and :class:`ShardedMemory` retrieves over them with the same kernel and
exact merge as one machine, locally or on a Dask cluster.
"""

from ._dask import SchedulerSpec, nearest, retrieve
from ._memory import (
    SHARDS_FORMAT_NAME,
    SHARDS_FORMAT_VERSION,
    ShardedMemory,
    ShardedStoreInfo,
    ShardSpec,
    open_sharded,
    shard_memory,
)

__all__ = [
    "SHARDS_FORMAT_NAME",
    "SHARDS_FORMAT_VERSION",
    "SchedulerSpec",
    "ShardSpec",
    "ShardedMemory",
    "ShardedStoreInfo",
    "nearest",
    "open_sharded",
    "retrieve",
    "shard_memory",
]
