"""Every error DenseMemory raises on bad input: class, argument named, rule, value echoed.

Reference: the error voice of STYLE.md ("DenseMemory.retrieve: `beta` must be a finite
number > 0; got -1.0."), and the error classes of densemem.errors, which subclass the
matching built-ins (ValueError / TypeError / KeyError; common Python practice).
"""

from __future__ import annotations

import re

import numpy as np
import pytest

import densemem
from densemem import DenseMemory, InputTypeError, InputValueError, UnknownIdError


def lit(text: str) -> str:
    """A literal piece of an error message, as a regex."""
    return re.escape(text)


@pytest.fixture
def mem() -> DenseMemory:
    rng = np.random.default_rng(0)
    return DenseMemory.from_array(rng.standard_normal((5, 4)).astype(np.float32), beta=2.0)


@pytest.fixture
def smem() -> DenseMemory:
    return DenseMemory.from_array(np.eye(3), ids=["a", "b", "c"])


def test_error_classes_subclass_the_builtins() -> None:
    assert issubclass(InputValueError, ValueError) and issubclass(InputValueError, densemem.DenseMemError)
    assert issubclass(InputTypeError, TypeError) and issubclass(UnknownIdError, KeyError)


# ------------------------------------------------------------------------ patterns
def test_nan_names_the_first_bad_row() -> None:
    x = np.ones((6, 3))
    x[4, 1] = np.nan
    x[5, 0] = np.nan
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: `patterns` contains NaN at row 4; clean or drop it first.")):
        DenseMemory(3).add(x)


def test_inf_names_the_first_bad_row() -> None:
    x = np.ones((4, 3), dtype=np.float32)
    x[2, 2] = -np.inf
    with pytest.raises(InputValueError, match=lit("DenseMemory.from_array: `patterns` contains infinity at row 2")):
        DenseMemory.from_array(x)


def test_value_too_large_for_float32_is_named_as_such() -> None:
    # 1e39 is finite in float64 but overflows float32: the message says so (not "infinity").
    x = np.ones((3, 2))
    x[1, 0] = 1e39
    with pytest.raises(InputValueError, match=lit("`patterns` holds a value at row 1 too large for float32")):
        DenseMemory(2).add(x)


def test_wrong_number_of_columns_in_patterns(mem: DenseMemory) -> None:
    with pytest.raises(
        InputValueError, match=lit("DenseMemory.add: `patterns` have 3 features but the memory stores 4-dimensional patterns.")
    ):
        mem.add(np.ones((2, 3)))


@pytest.mark.parametrize("shape", [(2, 3, 4), (4,)])
def test_patterns_must_be_two_dimensional(shape: tuple[int, ...]) -> None:
    nd = len(shape)
    with pytest.raises(InputValueError, match=lit(f"`patterns` must be 2-D (n_rows, n_features); got {nd}-D of shape {shape}")):
        DenseMemory(4).add(np.ones(shape))


def test_from_array_rejects_three_dimensional_input() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.from_array: `patterns` must be 2-D")):
        DenseMemory.from_array(np.ones((2, 3, 4)))


def test_ragged_patterns_in_add() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: `patterns` must be a rectangular numeric array; got ragged input")):
        DenseMemory(2).add([[1.0, 2.0], [3.0]])


def test_ragged_patterns_in_from_array() -> None:
    # The same rule at the other public entry point.
    with pytest.raises(InputValueError, match=lit("DenseMemory.from_array: `patterns` must be a rectangular numeric array")):
        DenseMemory.from_array([[1.0, 2.0], [3.0]])


def test_object_input() -> None:
    with pytest.raises(InputTypeError, match=lit("`patterns` must be a rectangular numeric array; got an object array")):
        DenseMemory(2).add(np.array([[1.0, None]], dtype=object))


@pytest.mark.parametrize("bad", ["abc", b"abc", None])
def test_string_or_none_instead_of_an_array(bad: object) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.add: `patterns` must be a numeric array; got ")):
        DenseMemory(2).add(bad)


@pytest.mark.parametrize(
    "arr", [np.array([["a", "b"]]), np.array([[1 + 2j, 0j]]), np.array([[True, False]])], ids=["str", "complex", "bool"]
)
def test_non_real_dtypes(arr: np.ndarray) -> None:
    with pytest.raises(InputTypeError, match=lit(f"`patterns` must hold real numbers (float or int); got dtype {arr.dtype}.")):
        DenseMemory(2).add(arr)


def test_zero_row_cannot_be_normalized() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: `patterns` row 1 has zero norm and cannot be normalized")):
        DenseMemory(2, normalize=True).add([[1.0, 0.0], [0.0, 0.0]])


# ------------------------------------------------------------------------- queries
def test_wrong_number_of_columns_in_queries(mem: DenseMemory) -> None:
    with pytest.raises(
        InputValueError, match=lit("DenseMemory.retrieve: `queries` have 3 features but the memory stores 4-dimensional patterns.")
    ):
        mem.retrieve(np.ones((2, 3)), method="exact")


def test_queries_three_dimensional(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `queries` must be 1-D or 2-D; got 3-D of shape (1, 2, 4).")):
        mem.retrieve(np.ones((1, 2, 4)), method="exact")


def test_queries_with_no_rows(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `queries` is empty (0 rows); pass at least one query.")):
        mem.retrieve(np.ones((0, 4)), method="exact")


def test_queries_nan_row(mem: DenseMemory) -> None:
    q = np.ones((3, 4))
    q[2, 0] = np.nan
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `queries` contains NaN at row 2")):
        mem.retrieve(q, method="exact")


def test_nearest_queries_inf_row(mem: DenseMemory) -> None:
    q = np.ones((3, 4))
    q[1, 3] = np.inf
    with pytest.raises(InputValueError, match=lit("DenseMemory.nearest: `queries` contains infinity at row 1")):
        mem.nearest(q)


def test_energy_states_nan_row(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.energy: `states` contains NaN at row 0")):
        mem.energy([np.nan, 0.0, 0.0, 0.0])


def test_ragged_queries(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `queries` must be a rectangular numeric array; got ragged")):
        mem.retrieve([[1.0, 2.0, 3.0, 4.0], [1.0]], method="exact")


def test_string_query(mem: DenseMemory) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.retrieve: `queries` must be a numeric array; got str 'abcd'.")):
        mem.retrieve("abcd", method="exact")


def test_zero_query_cannot_be_normalized() -> None:
    m = DenseMemory.from_array(np.eye(2), normalize=True)
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: query row 1 has zero norm and cannot be normalized (normalize=True); drop it first.")):
        m.retrieve([[1.0, 0.0], [0.0, 0.0]], method="exact")


@pytest.mark.parametrize("call", ["retrieve", "energy", "nearest"])
def test_empty_memory(call: str) -> None:
    m = DenseMemory(3)
    with pytest.raises(InputValueError, match=lit(f"DenseMemory.{call}: the memory is empty; add patterns first.")):
        getattr(m, call)(np.ones((1, 3)))


def test_empty_after_removing_everything() -> None:
    m = DenseMemory.from_array(np.eye(2))
    m.remove([0, 1])
    with pytest.raises(InputValueError, match=lit("the memory is empty")):
        m.retrieve([1.0, 0.0], method="exact")


# ---------------------------------------------------------------------------- beta
@pytest.mark.parametrize("bad", [0, 0.0, -1.0, float("inf"), float("nan"), -np.inf])
def test_beta_non_positive_or_non_finite(mem: DenseMemory, bad: float) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `beta` must be a finite number > 0; got ")):
        mem.retrieve(np.ones(4), beta=bad, method="exact")


@pytest.mark.parametrize("bad", ["2.0", True, [1.0], 1 + 0j])  # None means "the default"
def test_beta_not_a_number(mem: DenseMemory, bad: object) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.energy: `beta` must be a finite number > 0; got ")):
        mem.energy(np.ones(4), beta=bad)


def test_beta_echoes_a_numpy_scalar_as_a_plain_number(mem: DenseMemory) -> None:
    # e.g. a beta taken from np.linspace(0, ...): the message echoes 0.0, not numpy's repr.
    with pytest.raises(InputValueError, match=lit("`beta` must be a finite number > 0; got 0.0.")):
        mem.retrieve(np.ones(4), beta=np.linspace(0.0, 1.0, 3)[0], method="exact")


def test_beta_in_constructor_and_setter(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory: `beta` must be a finite number > 0; got -2.0.")):
        DenseMemory(3, beta=-2.0)
    with pytest.raises(InputValueError, match=lit("DenseMemory.beta: `beta` must be a finite number > 0; got 0.")):
        mem.beta = 0
    assert mem.beta == 2.0  # unchanged


# ------------------------------------------------------------------ k, steps, tol
@pytest.mark.parametrize("call", ["retrieve", "nearest"])
def test_k_below_one(mem: DenseMemory, call: str) -> None:
    with pytest.raises(InputValueError, match=lit(f"DenseMemory.{call}: `k` must be an integer >= 1; got 0.")):
        getattr(mem, call)(np.ones(4), k=0)


@pytest.mark.parametrize("call", ["retrieve", "nearest"])
def test_k_above_n_patterns(mem: DenseMemory, call: str) -> None:
    with pytest.raises(
        InputValueError, match=lit(f"DenseMemory.{call}: `k` must be at most the number of stored patterns (5); got 6.")
    ):
        getattr(mem, call)(np.ones(4), k=6)


@pytest.mark.parametrize("bad", [2.5, "3", True])
def test_k_not_an_integer(mem: DenseMemory, bad: object) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.retrieve: `k` must be an integer >= 1; got ")):
        mem.retrieve(np.ones(4), k=bad, method="exact")


def test_steps_below_one(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `steps` must be an integer >= 1; got 0.")):
        mem.retrieve(np.ones(4), steps=0, method="exact")


def test_steps_not_an_integer(mem: DenseMemory) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.retrieve: `steps` must be an integer >= 1; got float 2.0.")):
        mem.retrieve(np.ones(4), steps=2.0, method="exact")


@pytest.mark.parametrize("bad", [-1e-3, float("inf"), float("nan")])
def test_tol_negative_or_non_finite(mem: DenseMemory, bad: float) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `tol` must be a finite number >= 0; got ")):
        mem.retrieve(np.ones(4), tol=bad, method="exact")


def test_tol_not_a_number(mem: DenseMemory) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.retrieve: `tol` must be a finite number; got str 'small'.")):
        mem.retrieve(np.ones(4), tol="small", method="exact")


def test_bad_method_name(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: unknown `method` 'fastest'; use one of ")):
        mem.retrieve(np.ones(4), method="fastest")  # type: ignore[arg-type]


def test_bad_metric(mem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.nearest: `metric` must be 'ip' or 'l2'; got 'cosine'.")):
        mem.nearest(np.ones(4), metric="cosine")  # type: ignore[arg-type]


# ----------------------------------------------------------------- constructor args
def test_dim_below_one() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory: `dim` must be an integer >= 1; got 0.")):
        DenseMemory(0)


def test_dim_not_an_integer() -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory: `dim` must be an integer >= 1; got str '3'.")):
        DenseMemory("3")  # type: ignore[arg-type]


def test_tile_mib_must_be_positive() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory: `tile_mib` must be a finite number > 0; got 0.")):
        DenseMemory(3, tile_mib=0)


def test_n_threads_below_one() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory: `n_threads` must be an integer >= 1; got 0.")):
        DenseMemory(3, n_threads=0)


# ---------------------------------------------------------------------------- ids
def test_ids_wrong_count() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.from_array: `ids` has 3 entries for 2 patterns.")):
        DenseMemory.from_array(np.eye(2), ids=[1, 2, 3])


def test_ids_two_dimensional() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: `ids` must be a flat list of ids (1-D); got shape (1, 2).")):
        DenseMemory(2).add(np.eye(2), ids=np.array([[1, 2]]))


def test_ids_of_float_dtype() -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.add: every entry of `ids` must be an int or a str; entry 0 is float")):
        DenseMemory(2).add(np.eye(2), ids=[1.5, 2.5])


def test_ids_mixing_int_and_str_in_one_call() -> None:
    # [1, "a"] is mixed input; it must not silently become the str ids "1" and "a".
    with pytest.raises(InputTypeError, match=lit("DenseMemory.add: `ids` must be all integers or all strings; got a mix of ints and strings.")):
        DenseMemory(2).add(np.eye(2), ids=[1, "a"])


@pytest.mark.parametrize("ids,shown", [(["q", "q"], "'q'"), ([7, 7], "7")])
def test_ids_repeated_in_one_call(ids: list, shown: str) -> None:
    with pytest.raises(InputValueError, match=lit(f"DenseMemory.add: `ids` repeats the id {shown}; ids must be unique.")):
        DenseMemory(2).add(np.eye(2), ids=ids)


def test_id_already_stored(smem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: id 'b' is already stored; ids must be unique.")):
        smem.add(np.ones((1, 3)), ids=["b"])


def test_str_memory_needs_ids(smem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.add: the memory uses str ids, so `ids` must be given for new patterns.")):
        smem.add(np.ones((1, 3)))


def test_id_kind_must_match_the_memory(smem: DenseMemory) -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.add: the memory uses str ids; got `ids` of dtype int64.")):
        smem.add(np.ones((1, 3)), ids=[4])


def test_remove_unknown_id(smem: DenseMemory) -> None:
    with pytest.raises(UnknownIdError, match=lit("DenseMemory.remove: unknown id 'zz'; the memory holds no pattern with it.")):
        smem.remove(["a", "zz"])
    assert len(smem) == 3


def test_remove_same_id_twice(smem: DenseMemory) -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.remove: `ids` lists an id more than once.")):
        smem.remove(["a", "a"])
    assert len(smem) == 3


def test_positions_unknown_id(mem: DenseMemory) -> None:
    with pytest.raises(UnknownIdError, match=lit("DenseMemory.positions: unknown id 99;")):
        mem.positions([1, 99])


def test_beta_too_large_for_float32_scores() -> None:
    # float32 overflows near 3.4e38 (IEEE 754 single precision, common practice): a beta whose
    # scores beta * |q| * M pass 1e37 is refused instead of returning NaN.
    m = DenseMemory.from_array(np.eye(3))
    for call in (lambda: m.retrieve([1.0, 0.0, 0.0], beta=1e300), lambda: m.energy([1.0, 0.0, 0.0], beta=1e300)):
        with pytest.raises(InputValueError, match=r"`beta` = 1e\+300 is beyond the float32 score range; use beta <= 1e\+37\."):
            call()
    m10 = DenseMemory.from_array(10 * np.eye(3))
    for call in (lambda: m10.retrieve([1.0, 0.0, 0.0], beta=2e36), lambda: m10.energy([1.0, 0.0, 0.0], beta=2e36)):
        with pytest.raises(InputValueError, match=r"`beta` = 2e\+36 times the largest query norm \(1\) and stored norm \(10\) exceeds the float32 score range; use beta <= 1e\+36\."):
            call()


def test_normalize_huge_rows_are_not_zeroed() -> None:
    # Norms of rows with entries near 1e20 overflow in float32 (max 3.4e38, common practice);
    # they are computed in float64, so normalizing keeps the direction (reference: numpy float64).
    x = np.array([[3e20, 4e20], [1.0, 0.0]])
    m = DenseMemory.from_array(x, normalize=True)
    np.testing.assert_allclose(m.patterns[0], [0.6, 0.8], rtol=1e-6)
    res = m.retrieve([[4e20, 3e20]], beta=50.0, k=2, method="exact")
    np.testing.assert_allclose(np.linalg.norm(res.states[0]), 1.0, rtol=1e-3)


def test_tol_mass_must_be_a_fraction() -> None:
    m = DenseMemory.from_array(np.eye(3))
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `tol_mass` must be a number in (0, 1); got 2.")):
        m.retrieve([1.0, 0.0, 0.0], tol_mass=2)


def test_from_array_unknown_option() -> None:
    with pytest.raises(InputTypeError, match=lit("DenseMemory.from_array: unknown option(s) ['foo']; use normalize, beta, tile_mib or n_threads.")):
        DenseMemory.from_array(np.eye(2), foo=1)


def test_measure_must_be_bool_or_int() -> None:
    m = DenseMemory.from_array(np.eye(3))
    m.build_index("hnsw", M=4)
    with pytest.raises(InputTypeError, match=lit("DenseMemory.retrieve: `measure` must be True/False or a number of queries; got 'yes'.")):
        m.retrieve([1.0, 0.0, 0.0], method="index", measure="yes")
    with pytest.raises(InputValueError, match=lit("DenseMemory.retrieve: `measure` applies to method='index' only; got method='exact'.")):
        m.retrieve([1.0, 0.0, 0.0], method="exact", measure=True)


def test_from_array_zero_columns() -> None:
    with pytest.raises(InputValueError, match=lit("DenseMemory.from_array: `patterns` must have at least one column; got shape (3, 0).")):
        DenseMemory.from_array(np.zeros((3, 0)))
