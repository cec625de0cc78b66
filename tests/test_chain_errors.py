"""Bad arguments to the chain solvers raise the documented error, naming what and where.

The rules checked are facts of the trade (common practice): rates are finite and
non-negative, a chain on the natural numbers has no downward step from 0, step
probabilities lie in [0, 1] and p + q <= 1; plus DEVELOPERS.md's contract that errors
are ChainError subclasses (ValueErrors) whose message says what is wrong and where.
"""
from __future__ import annotations

import re
import tracemalloc

import numpy as np
import pytest

from tallyfit.chain import BirthDeathChain, StepChain
from tallyfit.chain.errors import CapTooLargeError, ChainError, RateError


def names_size(message: str, size: int) -> bool:
    """True when the message mentions the size as a whole number."""
    return re.search(rf"(?<![\d.]){size}(?![\d.])", message) is not None


def rates(n_cap: int = 6) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(n_cap + 1, dtype=float)
    return 1.0 + 0.5 * n, 0.7 * n


# --------------------------------------------------------------- class hierarchy
def test_error_classes_are_value_errors():
    assert issubclass(ChainError, ValueError)
    assert issubclass(RateError, ChainError)
    assert issubclass(CapTooLargeError, ChainError)


# ----------------------------------------------------------- continuous rates
@pytest.mark.parametrize("which", ["birth", "death"])
@pytest.mark.parametrize("bad", [-0.5, np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("size", [1, 4])
def test_bad_rate_value_names_rate_and_size(which, bad, size):
    birth, death = rates()
    (birth if which == "birth" else death)[size] = bad
    with pytest.raises(RateError) as info:
        BirthDeathChain(birth, death)
    msg = str(info.value)
    assert which in msg.lower()
    assert names_size(msg, size), msg
    assert info.value.size == size
    assert info.value.name == which


def test_bad_birth_at_size_zero_is_named():
    birth, death = rates()
    birth[0] = -1.0
    with pytest.raises(RateError) as info:
        BirthDeathChain(birth, death)
    assert "birth" in str(info.value).lower() and names_size(str(info.value), 0)
    assert info.value.size == 0


def test_nonzero_death_at_zero():
    birth, death = rates()
    death[0] = 0.3
    with pytest.raises(RateError) as info:
        BirthDeathChain(birth, death)
    msg = str(info.value)
    assert "death" in msg.lower() and names_size(msg, 0), msg
    assert info.value.size == 0


def test_first_bad_size_is_reported():
    birth, death = rates(10)
    death[3] = -1.0
    death[7] = np.nan
    with pytest.raises(RateError) as info:
        BirthDeathChain(birth, death)
    assert info.value.size == 3 and names_size(str(info.value), 3)


def test_arrays_of_different_lengths():
    birth, death = rates(6)
    with pytest.raises(RateError) as info:
        BirthDeathChain(birth, death[:-1])
    msg = str(info.value)
    assert "7" in msg and "6" in msg, msg  # both lengths are named


def test_two_dimensional_rates_are_refused():
    birth, death = rates(6)
    with pytest.raises(RateError):
        BirthDeathChain(birth[None, :], death[None, :])


def test_array_and_callable_mixed():
    birth, death = rates(6)
    with pytest.raises(RateError):
        BirthDeathChain(birth, lambda n: 0.7 * n)


def test_bad_callable_rate_names_size():
    # negative birth rate from size 5 on: caught at construction or when first solved.
    with pytest.raises(RateError) as info:
        chain = BirthDeathChain(lambda n: np.where(n >= 5, -1.0, 1.0), lambda n: 1.0 * n)
        chain.stationary()
    assert info.value.size == 5 and names_size(str(info.value), 5)


def test_callable_nonzero_death_at_zero():
    with pytest.raises(RateError) as info:
        chain = BirthDeathChain(lambda n: np.ones(np.shape(n)), lambda n: 1.0 + n)
        chain.stationary()
    assert names_size(str(info.value), 0)


def test_callable_nan_rate():
    with pytest.raises(RateError) as info:
        chain = BirthDeathChain(lambda n: np.where(n == 3, np.nan, 1.0), lambda n: 1.0 * n)
        chain.stationary()
    assert info.value.size == 3


# ------------------------------------------------------------------ step chains
@pytest.mark.parametrize("which,size,value", [
    ("p", 2, -0.1), ("q", 3, -0.2), ("p", 1, 1.5), ("q", 4, 1.01),
    ("p", 2, np.nan), ("q", 5, np.inf),
])
def test_step_probability_outside_unit_interval(which, size, value):
    n_cap = 6
    p = np.full(n_cap + 1, 0.3)
    q = np.full(n_cap + 1, 0.3)
    q[0] = 0.0
    (p if which == "p" else q)[size] = value
    with pytest.raises(RateError) as info:
        StepChain(p, q)
    msg = str(info.value)
    assert which in msg.lower() and names_size(msg, size), msg
    assert info.value.size == size


def test_step_p_plus_q_above_one():
    p = np.full(7, 0.5)
    q = np.full(7, 0.4)
    q[0] = 0.0
    q[4] = 0.6
    with pytest.raises(RateError) as info:
        StepChain(p, q)
    assert names_size(str(info.value), 4), str(info.value)
    assert info.value.size == 4


def test_step_q_at_zero_must_be_zero():
    # common practice: no downward step from size 0.
    p = np.full(7, 0.3)
    q = np.full(7, 0.3)
    with pytest.raises(RateError) as info:
        StepChain(p, q)
    assert names_size(str(info.value), 0) and info.value.size == 0


def test_step_lengths_differ():
    with pytest.raises(RateError):
        StepChain(np.full(7, 0.3), np.r_[0.0, np.full(5, 0.3)])


# ------------------------------------------------------------- cap too large
BIG = 10**6


def test_transition_on_huge_cap_refuses_before_allocating():
    n = np.arange(BIG + 1, dtype=float)
    chain = BirthDeathChain(0.5 * n + 1.0, 0.6 * n)
    tracemalloc.start()
    try:
        with pytest.raises(CapTooLargeError) as info:
            chain.transition(1.0)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    err = info.value
    assert err.cap == BIG
    assert err.needed_bytes >= 8 * (BIG + 1) ** 2  # one float64 matrix (N+1)^2 at the least
    assert names_size(str(err), BIG) or "1000000" in str(err)
    # refused before allocating: nothing close to a matrix (8 TB) was ever taken; allow 200 MB of bookkeeping
    assert peak < 200 * 1024**2


def test_step_transition_on_huge_cap_refuses():
    p = np.full(BIG + 1, 0.3)
    q = np.full(BIG + 1, 0.3)
    q[0] = 0.0
    chain = StepChain(p, q)
    tracemalloc.start()
    try:
        with pytest.raises(CapTooLargeError) as info:
            chain.transition(3)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert info.value.cap == BIG
    assert peak < 200 * 1024**2


# ------------------------------------------------------- other bad arguments
def test_transition_needs_a_finite_chain():
    chain = BirthDeathChain(lambda n: np.ones(np.shape(n)), lambda n: 1.0 * n)
    with pytest.raises(ChainError):
        chain.transition(1.0)


@pytest.mark.parametrize("dt", [-1.0, np.nan, np.inf])
def test_transition_bad_dt(dt):
    with pytest.raises(ChainError):
        BirthDeathChain(*rates()).transition(dt)


@pytest.mark.parametrize("start", [-1, 7, 100])
def test_transition_start_outside_sizes(start):
    with pytest.raises(ChainError) as info:
        BirthDeathChain(*rates(6)).transition(1.0, starts=[0, start])
    assert names_size(str(info.value), start), str(info.value)


@pytest.mark.parametrize("steps", [-1, 2.5])
def test_step_transition_bad_steps(steps):
    p = np.full(7, 0.3)
    q = np.r_[0.0, np.full(6, 0.3)]
    with pytest.raises(ChainError):
        StepChain(p, q).transition(steps)


@pytest.mark.parametrize("times", [[1.0, 0.5], [-1.0, 2.0], [0.0, np.nan]])
def test_simulate_bad_times(times):
    with pytest.raises(ChainError):
        BirthDeathChain(*rates()).simulate(2, times)


@pytest.mark.parametrize("start", [-1, 7])
def test_simulate_bad_start(start):
    with pytest.raises(ChainError) as info:
        BirthDeathChain(*rates(6)).simulate(start, [0.0, 1.0])
    assert names_size(str(info.value), start)


@pytest.mark.parametrize("times", [[2.0, 1.0], [-0.5]])
def test_extinction_curve_bad_times(times):
    birth, death = rates()
    birth[0] = 0.0
    with pytest.raises(ChainError):
        BirthDeathChain(birth, death).extinction_curve(3, times)


@pytest.mark.parametrize("threshold", [-1, 7])
def test_extinction_curve_bad_threshold(threshold):
    birth, death = rates(6)
    birth[0] = 0.0
    with pytest.raises(ChainError) as info:
        BirthDeathChain(birth, death).extinction_curve(3, [1.0], threshold=threshold)
    assert names_size(str(info.value), threshold)


def test_step_extinction_curve_needs_whole_steps():
    p = np.r_[0.0, np.full(6, 0.3)]
    q = np.r_[0.0, np.full(6, 0.3)]
    with pytest.raises(ChainError):
        StepChain(p, q).extinction_curve(3, [0, 1.5])


def test_absorption_probability_needs_absorbing_top():
    p = np.r_[0.0, np.full(6, 0.3)]
    q = np.r_[0.0, np.full(6, 0.3)]
    with pytest.raises(ChainError) as info:
        StepChain(p, q).absorption_probability()
    assert names_size(str(info.value), 6)


def test_to_step_rate_below_total_rate():
    birth, death = rates(6)
    top = float(np.max(np.r_[birth[:-1], 0.0] + death))
    with pytest.raises(ChainError):
        BirthDeathChain(birth, death).to_step(rate=0.5 * top)


@pytest.mark.parametrize("rate", [0.0, -1.0, np.nan])
def test_to_continuous_bad_rate(rate):
    p = np.r_[0.0, np.full(6, 0.3)]
    q = np.r_[0.0, np.full(6, 0.3)]
    with pytest.raises(ChainError):
        StepChain(p, q).to_continuous(rate=rate)
