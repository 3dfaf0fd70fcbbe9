"""The shared argument checks of psiloom._validation: wrong types and ranges are refused by name."""

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from psiloom import _validation as v

_NOT_INTEGERS = st.one_of(
    st.booleans(), st.text(max_size=3), st.floats(allow_nan=True), st.complex_numbers(), st.none(),
    st.lists(st.integers(), max_size=2),
)


@settings(max_examples=60)
@given(value=_NOT_INTEGERS)
def test_integer_checks_refuse_other_types_by_name(value):
    for check in (v.positive_int, v.nonnegative_int):
        with pytest.raises(TypeError, match="my_arg"):
            check("my_arg", value)
        with pytest.raises(ValueError, match="my_arg"):  # also a ValueError, for older callers
            check("my_arg", value)


@settings(max_examples=40)
@given(value=st.integers(-10**6, 10**6))
def test_integer_ranges(value):
    if value >= 1:
        assert v.positive_int("n", np.int64(value)) == value
    else:
        with pytest.raises(ValueError, match=f"n must be a positive integer, got {value}"):
            v.positive_int("n", value)
    if value >= 0:
        assert v.nonnegative_int("n", value) == value
    else:
        with pytest.raises(ValueError, match="n must be a non-negative integer"):
            v.nonnegative_int("n", value)


def test_fractional_values_are_not_truncated():
    with pytest.raises(TypeError, match="site"):
        v.integer("site", 1.7)
    with pytest.raises(TypeError, match="site"):
        v.integer("site", 2.0)


@settings(max_examples=60)
@given(value=st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=3), st.booleans(),
                       st.complex_numbers(allow_nan=False, allow_infinity=False)))
def test_finite_real(value):
    ok = isinstance(value, float) and math.isfinite(value)
    if ok:
        assert v.finite_real("J", value) == value
    else:
        with pytest.raises(ValueError, match="J"):
            v.finite_real("J", value)


def test_finite_complex_and_probability_and_choices():
    assert v.finite_complex("c", 1 + 2j) == 1 + 2j
    assert v.finite_complex("c", np.float64(0.5)) == 0.5
    for bad in (float("nan"), complex(1, float("inf")), "1"):
        with pytest.raises(ValueError, match="c must"):
            v.finite_complex("c", bad)
    assert v.probability("p", 0.3) == 0.3
    for bad in (0.0, 1.0, -0.1, float("nan")):
        with pytest.raises(ValueError, match="p must"):
            v.probability("p", bad)
    assert v.probability("p", 1.0, closed=True) == 1.0
    assert v.one_of("solver", "cg", ("dense", "cg")) == "cg"
    with pytest.raises(ValueError, match="solver must be one of 'dense', 'cg'; got 'CG'"):
        v.one_of("solver", "CG", ("dense", "cg"))
    with pytest.raises(ValueError, match="flag"):
        v.one_of("flag", True, (1, -1))  # a bool is not the number 1


@settings(max_examples=60)
@given(value=st.one_of(st.booleans(), st.integers(), st.floats(allow_nan=True), st.text(max_size=3), st.none(),
                       st.lists(st.booleans(), max_size=2), st.sampled_from([np.True_, np.False_, np.array(True)])))
def test_boolean_takes_only_true_or_false(value):
    if isinstance(value, (bool, np.bool_)) or (isinstance(value, np.ndarray) and value.dtype == bool):
        assert v.boolean("periodic", value) is bool(value)
    else:
        with pytest.raises(TypeError, match="periodic must be True or False"):
            v.boolean("periodic", value)
