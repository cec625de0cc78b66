"""The time unit: inferred as years only when the time column holds calendar years, named
by the user otherwise, and used in the run's words (common practice: a rate is "per year"
when the census is annual and the times are years)."""
from __future__ import annotations

import numpy as np
import pytest

from tallyfit.infer.errors import InputError
from tallyfit.infer.units import infer_time_unit, time_unit
from tallyfit.inputs.settings import RunSettings


def test_calendar_years_are_years():
    u = infer_time_unit(np.arange(1991, 2026))
    assert u.name == "year" and u.plural == "years"
    assert "calendar years (1991 to 2025)" in u.reason
    assert u.count(1) == "1 year" and u.count(20) == "20 years" and u.per() == "per year"


def test_fractional_calendar_years_are_years_and_say_so():
    u = infer_time_unit([2001.5, 2002.0, 2002.5, np.nan, 2003.5])
    assert u.name == "year"
    assert "fractions of a year" in u.reason


@pytest.mark.parametrize("times", [np.arange(0, 12), np.array([1.0, 32.0, 60.0, 91.0, 121.0]),
                                   np.arange(0, 3000, 30)])
def test_other_time_columns_stay_neutral_until_named(times):
    # years since the first survey, day numbers within a year, day numbers over several years
    u = infer_time_unit(times)
    assert u.name == "time unit" and u.plural == "time units"
    assert "set time_unit" in u.reason
    named = time_unit("day", times)
    assert named.name == "day" and named.plural == "days" and "as set" in named.reason
    assert time_unit("auto", times) == u


@pytest.mark.parametrize("bad", ["", " year", "years!", "a" * 30, "5"])
def test_a_bad_time_unit_setting_is_refused(bad):
    with pytest.raises(InputError, match="time_unit"):
        RunSettings(time_unit=bad).validate("run.toml")
