"""Sharded stores: one folder of ordinary stores under a ``shards.json`` manifest.

:func:`shard_memory` splits a memory into shards, :func:`open_sharded` opens
them, and :class:`ShardedMemory` retrieves over them with the same kernel,
exact merge and front door as one machine: here, or on a Dask cluster through
:meth:`ShardedMemory.on_cluster` (a :class:`ClusterShards`).
"""

from ._dask import ClusterShards
from ._memory import (
    SHARDS_FORMAT_NAME,
    SHARDS_FORMAT_VERSION,
    ShardedMemory,
    ShardedStoreInfo,
    is_sharded_store,
    open_sharded,
    open_store,
    shard_memory,
)

__all__ = [
    "SHARDS_FORMAT_NAME",
    "SHARDS_FORMAT_VERSION",
    "ClusterShards",
    "ShardedMemory",
    "ShardedStoreInfo",
    "is_sharded_store",
    "open_sharded",
    "open_store",
    "shard_memory",
]
