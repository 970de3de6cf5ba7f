"""Pydantic specs for the ``densemem`` command's options (validated once, at the boundary).

Each spec names the option a field came from (``FLAGS``) so that a rejected
value is reported as ``densemem retrieve: --beta must be greater than 0; got -1.0.``.
"""

from __future__ import annotations

import math
import re
from pathlib import Path
from typing import Any, Literal

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from .._validation import SEED_MAX

__all__ = [
    "BuildSpec",
    "InfoSpec",
    "RetrieveSpec",
    "NearestSpec",
    "DemoSpec",
    "SpecError",
    "make_spec",
]

FiniteFloat = Field(allow_inf_nan=False)


class _Spec(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


class BuildSpec(_Spec):
    """``densemem build``: an embeddings file into a store folder."""

    input: Path
    store: Path
    column: str | None = None
    id_column: str | None = None
    normalize: bool = False
    beta: float = Field(1.0, gt=0, allow_inf_nan=False)
    index: Literal["hnsw", "ivf"] | None = None
    overwrite: bool = False
    shards: int | None = Field(None, ge=1)
    shard_by: Literal["round_robin", "contiguous"] = "round_robin"
    dtype: Literal["float32", "float16"] = "float32"


class InfoSpec(_Spec):
    """``densemem info``: describe a store folder."""

    store: Path
    verify: bool = True


class RebalanceSpec(_Spec):
    """``densemem rebalance``: split and merge the shards of a sharded store."""

    store: Path
    shards: int | None = Field(None, ge=1)
    rows: int | None = Field(None, ge=1)


class _QuerySpec(_Spec):
    store: Path
    queries: Path
    column: str | None = None
    id_column: str | None = None
    k: int | None = Field(None, ge=1)
    mmap: bool = False
    chunk: int = Field(4096, ge=1)
    scheduler: str | None = Field(None, pattern=r"^(tcp|tls|inproc|ws|wss|ucx)://\S+$")

    @field_validator("scheduler", mode="before")
    @classmethod
    def _address(cls, v: Any) -> Any:
        if v is not None and "://" not in str(v):
            raise ValueError("must be a Dask scheduler address such as tcp://host:8786")
        return v
    retries: int = Field(2, ge=0)
    timeout: float | None = Field(None, gt=0, allow_inf_nan=False)


class RetrieveSpec(_QuerySpec):
    """``densemem retrieve``: softmax retrieval of queries from a store."""

    beta: float | None = Field(None, gt=0, allow_inf_nan=False)
    steps: int = Field(1, ge=1)
    tol: float = Field(1e-6, ge=0, allow_inf_nan=False)
    method: Literal["auto", "exact", "certified", "index"] = "auto"
    states_out: Path | None = None
    weighting: str = "softmax"  # softmax, sparsemax, entmax15, or alpha-entmax given by its alpha in (1, 2]
    measure: bool = False

    @field_validator("states_out")
    @classmethod
    def _new_npy(cls, v: Path | None) -> Path | None:
        if v is None:
            return v
        if v.suffix != ".npy":
            raise ValueError(f"must name a .npy file; got {str(v)!r}")
        if v.exists():
            raise ValueError(f"must name a new .npy file; {str(v)!r} exists")
        if not v.parent.is_dir():
            raise ValueError(f"must be in an existing folder; the folder of {str(v)!r} does not exist")
        return v


class NearestSpec(_QuerySpec):
    """``densemem nearest``: exact (or index) nearest neighbours by faiss."""

    metric: Literal["ip", "l2"] = "ip"
    index: bool = False


class DemoSpec(_Spec):
    """``densemem demo``: the invented archive scenario, end to end."""

    out: Path = Path("densemem-demo")
    photos: int = Field(4000, ge=50, le=200_000)
    seed: int = Field(0, ge=0, le=SEED_MAX)
    plots: bool = True
    overwrite: bool = False


class SpecError(ValueError):
    """A command-line value the spec rejected (exit code 2)."""


def _flag(name: str, positional: set[str]) -> str:
    return name.upper() if name in positional else "--" + name.replace("_", "-")


def make_spec(model: type[BaseModel], values: dict[str, Any], *, positional: tuple[str, ...] = ()) -> Any:
    """Build ``model`` from parsed options, or raise :class:`SpecError` with one line."""
    fields = set(model.model_fields)
    try:
        return model(**{k: v for k, v in values.items() if k in fields})
    except ValidationError as exc:
        err = exc.errors()[0]
        name = str(err["loc"][0]) if err["loc"] else "?"
        reason = _reason(err)
        sep = " " if reason.startswith(_VERBS) else ": "
        raise SpecError(f"{_flag(name, set(positional))}{sep}{reason}") from None


_VERBS = ("must", "applies", "is ", "needs", "should", "cannot")


def _reason(err: Any) -> str:
    """What was wrong with one value, ending in "; got <value>." exactly once."""
    given = err.get("input")
    if isinstance(given, float) and not math.isfinite(given):
        return f"must be a finite number; got {given!r}."
    msg = str(err["msg"])
    msg = msg.replace("Value error, ", "").replace("Input should be", "must be")
    # a job spec's own check names itself and its field ("CapacitySpec: `model` must ..."): keep the reason
    msg = re.sub(r"^\w+Spec: (`\w+` )?", "", msg)
    msg = re.sub(r"^\w+: `\w+` ", "", msg) if msg.startswith(tuple("ABCDEFGHIJKLMNOPQRSTUVWXYZ")) else msg
    msg = msg[0].lower() + msg[1:] if msg else msg
    if "; got " in msg or (isinstance(given, str) and given and given in msg):
        return msg if msg.endswith(".") else msg + "."
    return f"{msg.rstrip('.')}; got {given!r}."
