"""Classic and dense binary associative memories (Hebbian, Storkey, pseudo-inverse; polynomial, exponential).

They sit beside the dense core, not under it: ±1 (or 0/1) patterns, threshold
updates, asynchronous or synchronous retrieval.
"""

from ._memory import BinaryMemory, BinaryRetrieval, DenseBinaryMemory

__all__ = ["BinaryMemory", "BinaryRetrieval", "DenseBinaryMemory"]
