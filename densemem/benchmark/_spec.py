"""Pydantic models of the benchmark harness (private; re-exported by densemem.benchmark).

* :class:`BenchSpec`: what to run (data, queries, methods, settings, repeats).
* :class:`BenchRecord`: one measured row (one method, one setting, one N).
* :class:`MachineFacts`: the machine the rows were measured on.
* :class:`BenchResults`: the JSON document (spec + machine + records), schema
  ``"densemem-bench/1"``.

Records check their own arithmetic (queries/s against the time, the ratio
against the baseline time), so a hand-edited or truncated file fails to load.
"""

from __future__ import annotations

import math
from typing import Annotated, Any, Literal

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

from .._validation import SEED_MAX

__all__ = [
    "BINARY_MODELS",
    "DENSE_METHODS",
    "GENERATED",
    "LARGE_LIMIT",
    "LARGE_SIZE",
    "SCALING_SIZES",
    "SCHEMA",
    "BenchRecord",
    "BenchResults",
    "BenchSpec",
    "MachineFacts",
]

SCHEMA = "densemem-bench/1"
GENERATED = ("unit", "clustered")
#: Method families besides the binary ones: faiss baselines and densemem retrieval paths.
DENSE_METHODS = (
    "faiss-flat", "faiss-hnsw", "faiss-ivf", "exact", "certified", "auto", "index-hnsw", "index-ivf",
)
BINARY_MODELS = ("hebbian", "storkey", "pseudo_inverse", "polynomial", "exponential")
#: Every ``method`` a record may carry.
RECORD_METHODS = DENSE_METHODS + ("faiss-binary-flat",) + tuple(f"binary-{m}" for m in BINARY_MODELS)
SCALING_SIZES = (10_000, 100_000)
LARGE_SIZE = 1_000_000
LARGE_LIMIT = 200_000  # sizes above this need ``large=True``

Fraction = Annotated[float, Field(ge=0.0, le=1.0, allow_inf_nan=False)]
NonNeg = Annotated[float, Field(ge=0.0, allow_inf_nan=False)]
Positive = Annotated[float, Field(gt=0.0, allow_inf_nan=False)]
PosInt = Annotated[int, Field(ge=1)]


class _Model(BaseModel):
    model_config = ConfigDict(frozen=True, extra="forbid")


def _unique_sorted(v: list[Any], name: str) -> list[Any]:
    if not v:
        raise ValueError(f"`{name}` must list at least one value")
    return sorted(set(v))


class BenchSpec(_Model):
    """What a benchmark run measures (validated once; every field has a default).

    Data: ``dataset`` is "unit" (random unit vectors), "clustered" (a Gaussian
    mixture shaped like real embeddings: uneven cluster sizes, a shared
    direction, a decaying spectrum), "digits" (scikit-learn's bundled digits) or
    the path of an embeddings file (any format :func:`densemem.read_embeddings`
    reads). Queries come from ``queries`` (a file) or are corrupted copies of
    stored rows: ``corruption="gaussian"`` adds noise of norm about
    ``level * ||x||``; ``"mask"`` zeroes a fraction ``level`` of coordinates.

    Sizes: one run at ``n`` rows, or a scaling run over ``sizes`` (``scaling=True``
    means 10k and 100k, plus 1M with ``large=True``; sizes above 200k need
    ``large=True``).

    Methods: faiss baselines ("faiss-flat", "faiss-hnsw" per ``ef_search``,
    "faiss-ivf" per ``nprobe``) and densemem retrieval ("exact", "certified",
    "auto" (the default path of ``retrieve``), "index-hnsw", "index-ivf", each
    per ``betas``). A densemem method brings
    its faiss baseline along. ``weightings`` lists the normalising maps of the
    densemem rows: "softmax" (the default), and the sparse maps "sparsemax",
    "entmax15" and "entmax" (with ``alpha`` in (1, 2]); exact, certified and auto
    rows run once per map, and sparse rows report their mean support size. ``include_binary`` adds sign-quantised data (signs
    of the rows minus their mean) with
    faiss ``IndexBinaryFlat`` and the ``binary_models``.

    Examples
    --------
    >>> from densemem.benchmark import BenchSpec
    >>> BenchSpec(n=2000, betas=[8, 64]).betas
    [8.0, 64.0]
    """

    dataset: str = "clustered"
    column: str | None = None
    queries: str | None = None
    query_column: str | None = None
    corruption: Literal["gaussian", "mask"] = "gaussian"
    level: float = Field(0.5, ge=0.0, allow_inf_nan=False)
    normalize: bool = True
    n: int | None = Field(None, ge=2)
    dim: int = Field(128, ge=2, le=4096)
    n_queries: int = Field(1000, ge=1)
    ks: list[PosInt] = [1, 10]
    betas: list[Positive] = [8.0, 64.0]
    ef_search: list[PosInt] = [16, 64, 256]
    nprobe: list[PosInt] = [4, 16, 64]
    hnsw_m: int = Field(32, ge=2)
    ef_construction: int = Field(80, ge=1)
    nlist: int | None = Field(None, ge=1)
    n_candidates: int = Field(32, ge=1)
    methods: list[Literal[DENSE_METHODS]] = list(DENSE_METHODS)  # type: ignore[valid-type]
    weightings: list[str] = ["softmax"]
    alpha: float | None = Field(None, validate_default=True)
    include_binary: bool = False
    binary_models: list[Literal[BINARY_MODELS]] = ["hebbian", "exponential"]  # type: ignore[valid-type]
    binary_sweeps: int = Field(10, ge=1)
    repeats: int = Field(5, ge=1)
    warmup: int = Field(1, ge=0)
    batch_size: int | None = Field(None, ge=1)
    seed: int = Field(0, ge=0, le=SEED_MAX)
    sizes: list[PosInt] | None = None
    scaling: bool = False
    large: bool = False

    @field_validator("ks", "ef_search", "nprobe", "betas", "methods", "binary_models")
    @classmethod
    def _nonempty(cls, v: list[Any], info: Any) -> list[Any]:
        out = _unique_sorted(v, info.field_name)
        if info.field_name == "methods":
            return [m for m in DENSE_METHODS if m in out]  # canonical order
        return out

    @field_validator("weightings")
    @classmethod
    def _weightings(cls, v: list[str]) -> list[str]:
        from ..options import WEIGHTINGS

        if not v:
            raise ValueError("`weightings` must name at least one map")
        bad = [w for w in v if w not in WEIGHTINGS]
        if bad:
            raise ValueError(f"unknown `weightings` {bad}; use {', '.join(map(repr, WEIGHTINGS))}")
        return [w for w in WEIGHTINGS if w in v]  # canonical order, each once

    @field_validator("alpha", mode="after")
    @classmethod
    def _alpha(cls, v: float | None, info: Any) -> float | None:
        from ..options import check_weighting

        maps = info.data.get("weightings") or ["softmax"]
        if v is not None and "entmax" not in maps:
            raise ValueError(f"`alpha` applies to the 'entmax' weighting only; got alpha={v!r} with weightings={maps}")
        if "entmax" in maps:
            try:
                check_weighting("entmax", v, where="BenchSpec")
            except Exception as exc:  # the library's message, as a validation error of this field
                raise ValueError(str(exc)) from None
        return v

    @field_validator("sizes")
    @classmethod
    def _sizes(cls, v: list[int] | None) -> list[int] | None:
        return None if v is None else _unique_sorted(v, "sizes")

    @model_validator(mode="after")
    def _consistent(self) -> BenchSpec:
        if self.corruption == "mask" and self.level >= 1.0:
            raise ValueError(f"`level` is the masked fraction for corruption='mask' and must be < 1; got {self.level}")
        big = [s for s in self.run_sizes() if s is not None and s > LARGE_LIMIT]
        if big and not self.large:
            raise ValueError(f"sizes above {LARGE_LIMIT:,} ({big}) need large=True (they take minutes and GBs)")
        return self

    def run_sizes(self) -> list[int | None]:
        """The N of each run: ``sizes``, the scaling sizes, or ``[n]`` (None: the dataset's default).

        Examples
        --------
        >>> from densemem.benchmark import BenchSpec
        >>> BenchSpec(scaling=True).run_sizes()
        [10000, 100000]
        """
        if self.sizes is not None:
            return list(self.sizes)
        if self.scaling:
            return list(SCALING_SIZES) + ([LARGE_SIZE] if self.large else [])
        return [self.n]

    def planned_methods(self) -> list[str]:
        """Method families to run: the chosen ones plus the faiss baselines they need.

        Examples
        --------
        >>> from densemem.benchmark import BenchSpec
        >>> BenchSpec(methods=["index-hnsw"]).planned_methods()
        ['faiss-flat', 'faiss-hnsw', 'index-hnsw']
        """
        need = set(self.methods) | {"faiss-flat"}  # faiss Flat is the ground truth
        if "index-hnsw" in need:
            need.add("faiss-hnsw")
        if "index-ivf" in need:
            need.add("faiss-ivf")
        return [m for m in DENSE_METHODS if m in need]


class BenchRecord(_Model):
    """One measured row: a method at one setting on one dataset size.

    Quality: ``recall`` maps k to recall@k = mean over queries of
    ``|returned top-k & true top-k| / k``, the truth being faiss ``IndexFlatIP``
    on the (float) data (common practice; recall@1 is top-1 agreement). Binary
    memories return one state, so they carry recall@1 only. ``state_error_*``:
    distance ``||state - reference||_2`` to exact softmax retrieval at the same
    beta (``state_reference`` says which). Speed: ``time_s`` is the median of
    ``times_s`` (one call over all queries, in batches of ``batch_size``, after
    ``warmup`` calls); ``time_ratio = time_s / baseline_time_s``, the baseline
    being the faiss method named in ``baseline``, timed in the same run
    alternately with this row (so its median can differ a little from that
    faiss row's own ``time_s``). Memory: ``peak_python_mib`` and
    ``peak_rss_mib`` are what one search call adds (faiss allocates in C++,
    which tracemalloc does not see, and reuses freed pages, so its search rows
    are near 0); ``held_mib`` is what the searched structure holds: the
    serialised faiss index (``faiss.serialize_index``) for faiss rows, the
    float32 pattern table plus any index for densemem rows.
    """

    dataset: str
    n: PosInt
    dim: PosInt
    n_queries: PosInt
    batch_size: PosInt
    library: Literal["faiss", "densemem"]
    method: Literal[RECORD_METHODS]  # type: ignore[valid-type]
    label: str
    params: dict[str, int | float | str]
    beta: Positive | None = None
    recall: dict[PosInt, Fraction]
    state_error_max: NonNeg | None = None
    state_error_mean: NonNeg | None = None
    state_reference: str | None = None
    fell_back: Fraction | None = None
    weighting: str = "softmax"
    alpha: Positive | None = None
    support_size_mean: NonNeg | None = None
    time_s: Positive
    times_s: list[Positive]
    queries_per_s: Positive
    build_s: NonNeg
    build_peak_rss_mib: NonNeg
    peak_python_mib: NonNeg
    peak_rss_mib: NonNeg
    held_mib: NonNeg | None = None
    baseline: str | None = None
    baseline_time_s: Positive | None = None
    time_ratio: Positive | None = None
    repeats: PosInt
    warmup: Annotated[int, Field(ge=0)]

    @model_validator(mode="after")
    def _arithmetic(self) -> BenchRecord:
        if not self.recall:
            raise ValueError("`recall` must hold at least recall@1")
        if len(self.times_s) != self.repeats:
            raise ValueError(f"`times_s` holds {len(self.times_s)} times but repeats={self.repeats}")
        ts = sorted(self.times_s)
        mid = len(ts) // 2
        median = ts[mid] if len(ts) % 2 else (ts[mid - 1] + ts[mid]) / 2
        if not math.isclose(self.time_s, median, rel_tol=1e-9):
            raise ValueError(f"`time_s` ({self.time_s}) is not the median of `times_s` ({median})")
        if not math.isclose(self.queries_per_s, self.n_queries / self.time_s, rel_tol=1e-6):
            raise ValueError("`queries_per_s` must equal n_queries / time_s")
        have = [self.baseline is not None, self.baseline_time_s is not None, self.time_ratio is not None]
        if any(have) and not all(have):
            raise ValueError("`baseline`, `baseline_time_s` and `time_ratio` come together or not at all")
        if self.time_ratio is not None and not math.isclose(
            self.time_ratio, self.time_s / self.baseline_time_s, rel_tol=1e-6  # type: ignore[operator]
        ):
            raise ValueError("`time_ratio` must equal time_s / baseline_time_s")
        if self.library == "densemem" and self.method.startswith("faiss"):
            raise ValueError(f"method {self.method!r} is a faiss method, not densemem")
        return self


class MachineFacts(_Model):
    """Where the records were measured: CPUs, versions, BLAS threads, load."""

    cpu_count: int | None
    usable_cpus: int | None
    platform: str
    python: str
    numpy: str
    scipy: str
    faiss: str
    pydantic: str
    densemem: str
    blas: list[dict[str, int | str | None]]
    faiss_omp_threads: int
    openblas_coretype: str | None
    load_average_start: list[float]
    load_average_end: list[float] | None = None


class BenchResults(_Model):
    """The JSON document a benchmark run writes: schema tag, spec, machine facts, records."""

    schema_: Literal["densemem-bench/1"] = Field(SCHEMA, alias="schema")
    created: str
    spec: BenchSpec
    machine: MachineFacts
    records: list[BenchRecord]

    model_config = ConfigDict(frozen=True, extra="forbid", populate_by_name=True)
