"""What a family declares about its parameters: their specs and the default rate priors."""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from tallyfit.infer.families.priors import lognormal_prior
from tallyfit.infer.families.scale import DataScale

__all__ = ["ParameterSpec", "BIRTH_PER_INTERVAL", "DEATH_PER_INTERVAL", "default_rate_priors"]

#: Default prior medians of the per-capita birth and death rates, per census interval.
BIRTH_PER_INTERVAL = 0.4
DEATH_PER_INTERVAL = 0.3


@dataclass(frozen=True)
class ParameterSpec:
    """One parameter of a family: free (the model builder creates it) or derived.

    Attributes:
        name: readable name (also the variable's name in the posterior).
        support: "positive", "real" or "unit" (0..1): which prior distributions fit.
        description: one line for the report.
        length: None for a scalar, else the length of a vector parameter.
        structural: True when the prior is part of the family's definition (e.g. the
            standard-normal innovations of a random walk) and may not be overridden.
    """

    name: str
    support: str
    description: str
    length: int | None = None
    structural: bool = False


def default_rate_priors(scale: DataScale) -> dict[str, dict[str, Any]]:
    """Default priors of ``birth_rate`` and ``death_rate`` (a few tenths per census interval).

    Args:
        scale: the data's scales.

    Returns:
        {"birth_rate": lognormal(log(0.4/τ), 1.5), "death_rate": lognormal(log(0.3/τ), 1.5)}.
    """
    return {"birth_rate": lognormal_prior(BIRTH_PER_INTERVAL / scale.time_scale),
            "death_rate": lognormal_prior(DEATH_PER_INTERVAL / scale.time_scale)}
