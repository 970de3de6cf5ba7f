"""Exception and warning classes raised by densemem.

Every error densemem raises on bad input subclasses both :class:`DenseMemError`
and the matching built-in (``ValueError``, ``TypeError``, ``KeyError``), so callers
can catch either.
"""

from __future__ import annotations

__all__ = [
    "DenseMemError",
    "InputValueError",
    "InputTypeError",
    "UnknownIdError",
    "StoreFormatError",
    "StoreBusyError",
    "IndexStaleError",
    "MissingExtraError",
    "DenseMemWarning",
]


class DenseMemError(Exception):
    """Base class of every error densemem raises on purpose."""


class InputValueError(DenseMemError, ValueError):
    """An argument has the right type but a value densemem cannot use."""


class InputTypeError(DenseMemError, TypeError):
    """An argument has a type densemem cannot use."""


class UnknownIdError(DenseMemError, KeyError):
    """An id was asked for that the memory does not hold."""

    def __str__(self) -> str:  # KeyError quotes its message; keep it readable
        return str(self.args[0]) if self.args else ""


class StoreFormatError(DenseMemError, ValueError):
    """A store folder on disk is missing, damaged or of an unknown format."""


class StoreBusyError(DenseMemError, RuntimeError):
    """Another save to the same store folder holds its lock; nothing was written."""


class IndexStaleError(DenseMemError, RuntimeError):
    """A candidate index no longer matches the stored patterns."""


class MissingExtraError(DenseMemError, ImportError):
    """An optional dependency is needed for this feature but is not installed."""


class DenseMemWarning(UserWarning):
    """Warnings densemem emits (for example: a fallback was taken)."""
