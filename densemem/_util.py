"""Small shared helpers: the atomic file writer, the JSON converter, the progress bar.

One of each, used by every subpackage:

- :func:`write_atomic` / :func:`replacing` -- a temp file in the target folder,
  fsync, ``os.replace``, fsync of the folder; a reader sees the old file or the
  new one, never half. Files get the usual permissions (the user's umask), as
  :func:`open` gives them.
- :func:`fsync_dir` -- flush a folder's entries to disk (a no-op where folders
  cannot be opened).
- :func:`to_plain` -- JSON-ready copy of numpy scalars and arrays, tuples,
  dicts and paths; NaN and infinities become ``None`` (JSON has no spelling for them).
- :func:`progress_bar` / :func:`progress` -- a tqdm bar on stderr, shown only
  when stderr is a terminal (or when asked for), silent when quiet.
"""

from __future__ import annotations

import contextlib
import math
import os
import secrets
import sys
from pathlib import Path
from typing import Any, Iterable, Iterator

import numpy as np

from .errors import InputValueError, MissingExtraError

__all__ = ["write_atomic", "replacing", "fsync_dir", "to_plain", "progress_bar", "bar_factory", "progress",
           "stderr_is_tty"]


# ---------------------------------------------------------------- files
def fsync_dir(folder: Any) -> None:
    """Flush the entries of ``folder`` to disk (ignored where folders cannot be opened)."""
    try:
        fd = os.open(os.fspath(folder), os.O_RDONLY)
    except OSError:  # e.g. Windows cannot open folders
        return
    try:
        os.fsync(fd)
    except OSError:
        pass
    finally:
        os.close(fd)


def _temp_beside(path: Path) -> Path:
    return path.with_name(f".{path.stem}.tmp-{os.getpid()}-{secrets.token_hex(4)}{path.suffix}")


def _fsync_file(path: Path) -> None:
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def _move_new(tmp: Path, path: Path, where: str) -> None:
    """Move ``tmp`` to ``path`` only if ``path`` does not exist (a hard link fails if it appeared)."""
    try:
        os.link(tmp, path)
    except FileExistsError:
        raise InputValueError(f"{where}: {str(path)!r} exists; pass overwrite=True to replace it.") from None
    except OSError:  # no hard links here (some network / FAT file systems)
        if path.exists():
            raise InputValueError(f"{where}: {str(path)!r} exists; pass overwrite=True to replace it.") from None
        os.replace(tmp, path)


@contextlib.contextmanager
def replacing(path: Any, *, overwrite: bool = True, where: str = "write") -> Iterator[Path]:
    """Yield a temp path beside ``path`` (same suffix); once the body has written it,
    fsync it, move it into place and fsync the folder. On error the temp file is removed
    and ``path`` is untouched.

    With ``overwrite=False`` an existing ``path`` (even one that appears meanwhile)
    raises :class:`~densemem.errors.InputValueError` naming ``where``.

    Examples
    --------
    >>> import tempfile, os
    >>> from densemem._util import replacing
    >>> target = os.path.join(tempfile.mkdtemp(), "a.txt")
    >>> with replacing(target) as tmp:
    ...     _ = tmp.write_text("hello")
    >>> open(target).read()
    'hello'
    """
    path = Path(os.fspath(path))
    tmp = _temp_beside(path)
    try:
        yield tmp
        _fsync_file(tmp)
        if overwrite:
            os.replace(tmp, path)
        else:
            _move_new(tmp, path, where)
    finally:
        tmp.unlink(missing_ok=True)
    fsync_dir(path.parent)


def write_atomic(path: Any, data: bytes | str, *, overwrite: bool = True, where: str = "write") -> Path:
    """Write ``data`` (bytes, or str as UTF-8) to ``path`` atomically; return the path.

    Examples
    --------
    >>> import tempfile, os
    >>> from densemem._util import write_atomic
    >>> p = write_atomic(os.path.join(tempfile.mkdtemp(), "x.json"), "{}")
    >>> p.read_text()
    '{}'
    """
    raw = data.encode("utf-8") if isinstance(data, str) else bytes(data)
    path = Path(os.fspath(path))
    with replacing(path, overwrite=overwrite, where=where) as tmp:
        with open(tmp, "xb") as fh:
            fh.write(raw)
            fh.flush()
            os.fsync(fh.fileno())
    return path


# ----------------------------------------------------------------- JSON
def to_plain(value: Any) -> Any:
    """JSON-ready copy of ``value``: numpy scalars and arrays to Python, tuples to lists,
    dict keys to str, paths to str, NaN and infinities to None. Objects with a
    ``to_dict`` method are converted through it.

    Examples
    --------
    >>> import numpy as np
    >>> from densemem._util import to_plain
    >>> to_plain({"a": np.float32(0.5), "b": np.array([1.0, np.nan]), 3: (np.int64(2),)})
    {'a': 0.5, 'b': [1.0, None], '3': [2]}
    """
    if isinstance(value, dict):
        return {str(k): to_plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [to_plain(v) for v in value]
    if isinstance(value, np.ndarray):
        return to_plain(value.tolist())
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, (str, int, bool)) or value is None:
        return value
    if hasattr(value, "__fspath__"):
        return os.fspath(value)
    if hasattr(value, "to_dict") and callable(value.to_dict):
        return to_plain(value.to_dict())
    return value


# ------------------------------------------------------------- progress
def stderr_is_tty() -> bool:
    """Whether stderr is a terminal (False when it is closed or replaced by an object without isatty)."""
    try:
        return bool(sys.stderr.isatty())
    except (AttributeError, ValueError):
        return False


class _SilentBar:
    """Stands in for a tqdm bar when none is shown (same methods, does nothing)."""

    def update(self, n: int = 1) -> None:
        pass

    def set_postfix_str(self, s: str = "") -> None:
        pass

    def set_postfix(self, *args: Any, **kwargs: Any) -> None:
        pass

    def close(self) -> None:
        pass

    def __enter__(self) -> "_SilentBar":
        return self

    def __exit__(self, *exc: Any) -> None:
        pass


def progress_bar(*, total: int | None, desc: str, show: bool | None = None, unit: str = "it",
                 where: str = "progress") -> Any:
    """A tqdm bar on stderr, or a silent stand-in with the same methods.

    ``show=None`` shows it only when stderr is a terminal and tqdm is installed;
    ``show=True`` needs tqdm (:class:`~densemem.errors.MissingExtraError` naming
    ``where`` otherwise); ``show=False`` is silent.

    Examples
    --------
    >>> from densemem._util import progress_bar
    >>> bar = progress_bar(total=3, desc="demo", show=False)
    >>> bar.update(3); bar.close()
    """
    factory = bar_factory(show, unit=unit, where=where)
    return _SilentBar() if factory is None else factory(desc, total)


def bar_factory(show: bool | None, *, unit: str = "it", where: str = "progress") -> Any:
    """A ``(desc, total) -> tqdm bar`` callable, or None when no bar is to be shown.

    The rule of :func:`progress_bar`, checked once up front (so a missing tqdm
    with ``show=True`` raises before any work starts).
    """
    if show is False or (show is None and not stderr_is_tty()):
        return None
    try:
        from tqdm import tqdm
    except ImportError:
        if show:
            raise MissingExtraError(
                f"{where}: `progress=True` needs tqdm; install it with: pip install densemem[progress]"
            ) from None
        return None
    return lambda desc, total: tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, leave=False)


def progress(items: Iterable[Any], *, total: int | None, desc: str, quiet: bool = False) -> Iterator[Any]:
    """Iterate ``items`` with a bar on stderr (only on a terminal, never when ``quiet``).

    Examples
    --------
    >>> from densemem._util import progress
    >>> list(progress(range(3), total=3, desc="demo", quiet=True))
    [0, 1, 2]
    """
    bar = progress_bar(total=total, desc=desc, show=False if quiet else None)
    try:
        for item in items:
            yield item
            bar.update(1)
    finally:
        bar.close()
