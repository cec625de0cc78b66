"""The linear family: constant per-capita birth and death rates."""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from tallyfit.infer.families.backend import Backend
from tallyfit.infer.families.base import RateFamily
from tallyfit.infer.families.coordinates import ImmigrationCoordinates, SamplingCoordinates
from tallyfit.infer.families.parameters import ParameterSpec, default_rate_priors
from tallyfit.infer.families.scale import DataScale

__all__ = ["Linear"]


class Linear(RateFamily):
    """Linear birth–death process (optionally with immigration).

    Per-capita rates are constant:

        b(n) = b,   d(n) = d,   so   λ_n = b·n + ι,   μ_n = d·n.

    Parameters: ``birth_rate`` b > 0, ``death_rate`` d > 0, and with
    ``immigration=True`` ``immigration`` ι > 0. Default priors (τ = median census
    interval): b ~ lognormal(log(0.4/τ), 1.5), d ~ lognormal(log(0.3/τ), 1.5),
    ι ~ lognormal(log(1/τ), 1.5).

    Beyond any cap the rates keep growing linearly, so a stationary law exists only
    with immigration and b < d (ratio λ_n/μ_{n+1} → b/d).

    With immigration the sampler works in :class:`ImmigrationCoordinates` (the births at
    the median count and the immigrants' share); the priors are still those above.

    Args:
        immigration: include ι.
    """

    name = "linear"
    formula = "b(n) = b,  d(n) = d   (constant per-capita rates)"

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive", "b, per-capita birth rate"),
                ParameterSpec("death_rate", "positive", "d, per-capita death rate")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return default_rate_priors(scale)

    def _per_capita(self, xp: Backend, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        return p["birth_rate"] + 0.0 * n, p["death_rate"] + 0.0 * n

    def sampling_coordinates(self, scale: DataScale) -> SamplingCoordinates | None:
        """:class:`ImmigrationCoordinates` at the data's median count when ι is a parameter."""
        return ImmigrationCoordinates(scale.count_scale) if self.immigration else None
