"""The one validator (warmstart._checks): what it accepts, and its one error text
(name, what is allowed, value received, how to fix)."""

import math

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from warmstart._checks import check_choice, check_count, check_fraction, check_number
from warmstart.errors import WarmstartError
from warmstart.search.baselines import GPSearch, NelderMeadSearch
from warmstart.search.density import DensitySearch
from warmstart.search.kde import KDEError, MixedKDE
from warmstart.search.strategy import SearchError, run_search
from warmstart.space import Space

UNIT = Space.from_dict({"params": {"x": {"type": "real", "low": 0.0, "high": 1.0}}})


@given(st.integers(-50, 50), st.integers(-5, 5))
def test_a_count_is_any_whole_number_at_least_the_minimum(value, minimum):
    if value >= minimum:
        assert check_count("n", value, minimum=minimum) == value
        assert type(check_count("n", np.int64(value), minimum=minimum)) is int
    else:
        with pytest.raises(WarmstartError, match=rf"^n must be a whole number >= {minimum}, got {value}; "
                                                 rf"use {minimum} or more$"):
            check_count("n", value, minimum=minimum)


@pytest.mark.parametrize("value, fix", [
    (3.0, r"write it as an integer \(3\)"),  # a whole float is refused, with the integer to write
    (True, "use 1 or more"),  # a bool is not a count
    ("3", "use 1 or more"),
    (2.5, "use 1 or more"),
])
def test_a_count_refuses_floats_bools_and_text(value, fix):
    with pytest.raises(WarmstartError, match=rf"budget must be a whole number >= 1, got {value!r}; {fix}"):
        check_count("budget", value, minimum=1)


def test_a_count_with_both_bounds_and_the_callers_error_class():
    assert check_count("k", 4, 1, 4) == 4
    with pytest.raises(SearchError, match=r"k must be a whole number from 1 to 4, got 5; use a value from 1 to 4"):
        check_count("k", 5, 1, 4, error=SearchError)


@given(st.floats(allow_nan=True, allow_infinity=True))
def test_a_fraction_is_a_finite_number_in_the_half_open_unit_interval(value):
    if math.isfinite(value) and 0 < value <= 1:
        assert check_fraction("gamma", value) == value
    else:
        with pytest.raises(WarmstartError, match=r"^gamma must be a number in \(0, 1\], got .*; use a share above 0"):
            check_fraction("gamma", value)


def test_a_number_names_its_interval_and_takes_the_callers_fix():
    assert check_number("xi", 0, low=0.0) == 0.0 and isinstance(check_number("xi", 0, low=0.0), float)
    with pytest.raises(WarmstartError, match=r"^xi must be a number >= 0, got -1; it is a margin$"):
        check_number("xi", -1, low=0.0, fix="it is a margin")
    with pytest.raises(WarmstartError, match=r"step must be a number in \(0, 1\], got 0; use a number in \(0, 1\]"):
        check_number("step", 0, 0.0, 1.0, low_open=True)
    with pytest.raises(WarmstartError, match=r"t must be a number < 2, got 2"):
        check_number("t", 2, high=2.0, high_open=True)
    with pytest.raises(WarmstartError, match=r"t must be a finite number, got nan"):
        check_number("t", float("nan"))


def test_a_choice_lists_what_is_allowed():
    assert check_choice("objective", "nearest", ("nearest", "surrogate")) == "nearest"
    with pytest.raises(WarmstartError, match=r"objective must be one of 'nearest', 'surrogate', got 'table'; "
                                             r"pick one of 'nearest', 'surrogate'"):
        check_choice("objective", "table", ("nearest", "surrogate"))
    with pytest.raises(WarmstartError, match=r"got \[1\]"):
        check_choice("objective", [1], frozenset({"a"}))  # unhashable: refused, not a TypeError


@pytest.mark.parametrize("make, message", [
    (lambda: DensitySearch(UNIT, gamma=0), r"gamma must be a number in \(0, 1\], got 0; it is the share"),
    (lambda: DensitySearch(UNIT, floor=0.0), r"floor must be a number in \(0, 1\], got 0.0; it is the uniform"),
    (lambda: DensitySearch(UNIT, n_candidates=0), r"n_candidates must be a whole number >= 1, got 0; use 1"),
    (lambda: DensitySearch(UNIT, seed_radius=-1), r"seed_radius must be a number >= 0, got -1; it is a unit-cube"),
    (lambda: GPSearch(UNIT, n_startup=-1), r"n_startup must be a whole number >= 0, got -1"),
    (lambda: NelderMeadSearch(UNIT, initial_step=0), r"initial_step must be a number in \(0, 1\], got 0"),
    (lambda: DensitySearch(UNIT).propose(0), r"k must be a whole number >= 1, got 0"),
    (lambda: run_search(DensitySearch(UNIT), lambda c: 0.0, 2.0), r"budget must be a whole number >= 0, got 2.0; "
                                                                  r"write it as an integer \(2\)"),
])
def test_the_searches_use_the_one_text(make, message):
    with pytest.raises(SearchError, match=message):
        make()


def test_the_kernel_density_uses_the_one_text():
    with pytest.raises(KDEError, match=r"shrink must be a number >= 0, got -1.0; it counts pseudo-observations"):
        MixedKDE(UNIT, np.array([[0.5]]), shrink=-1.0)
