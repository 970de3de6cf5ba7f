"""The public surface of densemem: a pinned ``__all__``, docstrings, hints and examples.

Reference: common practice of scikit-learn and SciPy (STYLE.md: a literal ``__all__`` in
``__init__`` pinned by a test; numpydoc docstrings with a tiny doctest example; type hints
on the public API, as the project rules ask).
"""

from __future__ import annotations

import dataclasses
import importlib.metadata
import inspect

import pytest

import densemem

# Pinned on purpose: a change to the public surface must change this list too.
PUBLIC = [
    "DenseMemory",
    "ShardedMemory",
    "BinaryMemory",
    "DenseBinaryMemory",
    "RetrievalResult",
    "NearestResult",
    "BinaryRetrieval",
    "tune_beta",
    "plan_duplicates",
    "estimate_capacity",
    "run_benchmark",
    "shard_memory",
    "open_sharded",
    "read_embeddings",
    "DenseMemError",
    "InputTypeError",
    "InputValueError",
    "UnknownIdError",
    "StoreFormatError",
    "MissingExtraError",
]

# Each job package exports its own option and report classes (project rule); pinned too.
JOB_PACKAGES = ["tuning", "duplicates", "capacity", "benchmark", "sharding", "store", "binary", "errors"]


def test_all_is_pinned() -> None:
    assert densemem.__all__ == PUBLIC
    assert len(set(densemem.__all__)) == len(densemem.__all__)
    assert len(PUBLIC) <= 20


@pytest.mark.parametrize("package", JOB_PACKAGES)
def test_job_packages_export_what_they_list(package: str) -> None:
    mod = importlib.import_module(f"densemem.{package}")
    names = list(mod.__all__)
    assert names and len(set(names)) == len(names)
    for name in names:
        obj = getattr(mod, name)
        if inspect.isclass(obj) or inspect.isfunction(obj):
            assert inspect.getdoc(obj), f"densemem.{package}.{name} has no docstring"


def test_star_import_gives_exactly_all() -> None:
    ns: dict[str, object] = {}
    exec("from densemem import *", ns)
    assert sorted(k for k in ns if k != "__builtins__") == sorted(PUBLIC)


def test_version_matches_installed_metadata() -> None:
    # Reference: the package metadata written from pyproject.toml (importlib.metadata).
    assert isinstance(densemem.__version__, str)
    assert densemem.__version__ == importlib.metadata.version("densemem")


@pytest.mark.parametrize("name", PUBLIC)
def test_every_public_name_has_a_docstring(name: str) -> None:
    obj = getattr(densemem, name)
    doc = inspect.getdoc(obj)
    assert doc and len(doc.strip()) > 10, name
    assert getattr(obj, "__module__", "").startswith("densemem"), name


def _public_members(cls: type) -> list[tuple[str, object]]:
    out = []
    fields = {f.name.lstrip("_") for f in dataclasses.fields(cls)} if dataclasses.is_dataclass(cls) else set()
    for name, value in vars(cls).items():
        if name.startswith("_") or name in fields:  # dataclass fields: see the Attributes test
            continue
        out.append((name, value))
    return out


def _members_of_public_classes() -> list[tuple[str, str, object]]:
    rows = []
    for cname in PUBLIC:
        obj = getattr(densemem, cname)
        if inspect.isclass(obj) and not issubclass(obj, BaseException) and not issubclass(obj, Warning):
            rows += [(cname, m, v) for m, v in _public_members(obj)]
    return rows


MEMBERS = _members_of_public_classes()
METHODS = [(c, m, v) for c, m, v in MEMBERS if not isinstance(v, property) and callable(getattr(v, "__func__", v))]


@pytest.mark.parametrize("cls,member,value", MEMBERS, ids=[f"{c}.{m}" for c, m, _ in MEMBERS])
def test_public_members_have_docstrings(cls: str, member: str, value: object) -> None:
    target = value.fget if isinstance(value, property) else getattr(value, "__func__", value)
    assert inspect.getdoc(target), f"{cls}.{member}"


@pytest.mark.parametrize("cls,member,value", METHODS, ids=[f"{c}.{m}" for c, m, _ in METHODS])
def test_public_methods_are_type_hinted(cls: str, member: str, value: object) -> None:
    func = getattr(value, "__func__", value)
    sig = inspect.signature(func)
    missing = [p for p in sig.parameters if p not in ("self", "cls") and sig.parameters[p].annotation is inspect.Parameter.empty]
    assert not missing, f"{cls}.{member}: unannotated {missing}"
    assert sig.return_annotation is not inspect.Signature.empty, f"{cls}.{member}: no return annotation"


@pytest.mark.parametrize("cls,member,value", METHODS, ids=[f"{c}.{m}" for c, m, _ in METHODS])
def test_public_methods_have_a_doctest_example(cls: str, member: str, value: object) -> None:
    # Project rule: numpydoc docstrings with a tiny doctest example.
    doc = inspect.getdoc(getattr(value, "__func__", value)) or ""
    assert ">>>" in doc, f"{cls}.{member} has no Examples section"


@pytest.mark.parametrize("cls", [densemem.RetrievalResult, densemem.NearestResult], ids=lambda c: c.__name__)
def test_result_fields_are_documented_under_attributes(cls: type) -> None:
    doc = inspect.getdoc(cls) or ""
    assert "Attributes\n----------" in doc
    attrs = doc.split("Attributes\n----------", 1)[1]
    listed = {line.split(":")[0].strip() for line in attrs.splitlines() if line and not line.startswith(" ")}
    missing = [f.name.lstrip("_") for f in dataclasses.fields(cls) if f.name.lstrip("_") not in listed]
    assert not missing, f"{cls.__name__}: undocumented fields {missing}"


def test_results_are_frozen_dataclasses_with_to_dict() -> None:
    for cls in (densemem.RetrievalResult, densemem.NearestResult):
        assert dataclasses.is_dataclass(cls)
        assert cls.__dataclass_params__.frozen  # type: ignore[attr-defined]
        assert callable(getattr(cls, "to_dict"))


def test_import_loads_no_heavy_module() -> None:
    # Project rule (fast start): `import densemem` loads neither faiss, scipy nor pydantic; they load
    # when a name that needs them is first used. Checked in a fresh interpreter.
    import subprocess
    import sys

    code = "import sys, densemem; print(sorted(m for m in ('faiss', 'scipy', 'pydantic') if m in sys.modules))"
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout
    assert out.strip() == "[]"
    code = "import densemem; densemem.DenseMemory; densemem.tune_beta; print(densemem.DenseMemory.__name__)"
    assert subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True).stdout.strip() == "DenseMemory"
