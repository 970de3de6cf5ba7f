"""The store folder (manifest, arrays, index file) and the readers of embedding files.

A store is a plain folder: ``manifest.json`` with the sha256 of every array,
``patterns.npy``, ``ids.npy`` and an optional ``index.faiss``. Saves are atomic;
loads never unpickle. :func:`read_embeddings` reads .npy, .npz, .parquet, .csv
and .tsv files into an :class:`EmbeddingTable`.
"""

from ._folder import FORMAT_NAME, FORMAT_VERSION, StoreInfo, describe_store
from ._readers import SUFFIXES, EmbeddingTable, read_embeddings

__all__ = [
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "SUFFIXES",
    "EmbeddingTable",
    "StoreInfo",
    "describe_store",
    "read_embeddings",
]
