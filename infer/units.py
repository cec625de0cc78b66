"""The time unit of a counts file: what "per time unit" means in words.

Rates, horizons and mean times are in the units of the data's own time column. When the
user does not say, the unit is inferred only where the column leaves no doubt: times
that all lie between 1600 and 2200 are calendar years (whole or fractional, e.g. 2003.5
for a winter count). Anything else — day numbers, months since the start, years since
the first survey — stays a neutral "time unit" until the user names it, and the run says
so.
"""
from __future__ import annotations

from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np

__all__ = ["TimeUnit", "infer_time_unit", "time_unit", "CALENDAR_YEARS"]

#: Times in this range are read as calendar years.
CALENDAR_YEARS = (1600.0, 2200.0)
_NEUTRAL = "time unit"


@dataclass(frozen=True)
class TimeUnit:
    """A time unit in words.

    Attributes:
        name: singular noun ("year", "month", "time unit").
        reason: one sentence saying where the unit came from.
    """

    name: str
    reason: str

    @property
    def plural(self) -> str:
        """Plural noun ("years", "time units"); a name ending in "s" is kept as is."""
        return self.name if self.name.endswith("s") else self.name + "s"

    def per(self) -> str:
        """"per year", "per time unit"."""
        return f"per {self.name}"

    def count(self, value: float) -> str:
        """"1 year", "20 years", "2.5 years"."""
        return f"{value:g} {self.name if value == 1 else self.plural}"


def infer_time_unit(times: Iterable[float]) -> TimeUnit:
    """The unit of a time column, inferred only when the values leave no doubt.

    Args:
        times: the survey times of every site (NaN ignored).

    Returns:
        TimeUnit "year" for calendar years (whole or fractional), else the neutral
        "time unit", each with the reason in a sentence.
    """
    t = np.asarray(list(times), dtype=float)
    t = t[np.isfinite(t)]
    lo, hi = CALENDAR_YEARS
    if t.size and lo <= t.min() and t.max() <= hi:
        whole = bool(np.all(t == np.round(t)))
        return TimeUnit("year", f"the time column holds calendar years ({t.min():g} to {t.max():g}"
                        + ("" if whole else ", with fractions of a year") + "), so rates are per year; set "
                        "time_unit in [fit] if that is wrong")
    return TimeUnit(_NEUTRAL, "the time column does not hold calendar years, so rates are per unit of the time "
                    "column; set time_unit in [fit] (e.g. \"year\", \"month\", \"day\") to name it")


def time_unit(name: str | None, times: Iterable[float]) -> TimeUnit:
    """The unit the user named, or the inferred one when ``name`` is None or "auto".

    Args:
        name: the setting ([fit] time_unit or --time-unit); a singular noun.
        times: the survey times (for inference).

    Returns:
        TimeUnit.
    """
    if name is None or name == "auto":
        return infer_time_unit(times)
    return TimeUnit(name, f"the time unit is \"{name}\", as set")
