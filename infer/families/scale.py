"""The scales of a data set that default priors and per-size knots are set from."""
from __future__ import annotations

import math
from dataclasses import dataclass

from tallyfit.infer.errors import InputError

__all__ = ["DataScale"]


@dataclass(frozen=True)
class DataScale:
    """The scales of a data set that default priors (and per-size knots) are set from.

    Attributes:
        time_scale: τ, the median interval between consecutive surveyed times (> 0).
        count_scale: c, the median observed count (at least 1), divided by a fixed
            detection probability when there is one.
        size_lo: smallest plausible true size seen (at least 1).
        size_hi: largest plausible true size seen (at least size_lo).
    """

    time_scale: float = 1.0
    count_scale: float = 10.0
    size_lo: float = 1.0
    size_hi: float = 20.0

    def __post_init__(self) -> None:
        for name in ("time_scale", "count_scale", "size_lo", "size_hi"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise InputError(f"{name} must be a finite number > 0, got {value!r}",
                                 source="DataScale")
        if self.size_hi < self.size_lo:
            raise InputError(f"size_hi ({self.size_hi}) is below size_lo ({self.size_lo})",
                             source="DataScale")
