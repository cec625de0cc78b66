"""The logistic family: per-capita death rises linearly with size to balance births at K."""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from tallyfit.infer.families.backend import Backend
from tallyfit.infer.families.base import RateFamily
from tallyfit.infer.families.coordinates import RegulatedCoordinates, SamplingCoordinates
from tallyfit.infer.families.parameters import ParameterSpec, default_rate_priors
from tallyfit.infer.families.priors import lognormal_prior
from tallyfit.infer.families.scale import DataScale

__all__ = ["Logistic"]


class Logistic(RateFamily):
    """Logistic birth–death process: per-capita death rises linearly with size.

        b(n) = b,   d(n) = max(0, d + (b − d)·n/K),

    so λ_n = b·n + ι and μ_n = n·(d + (b − d)·n/K): births b·K equal deaths at the
    carrying capacity n = K (without immigration), deaths outrun births above it.
    Parameters: ``birth_rate`` b, ``death_rate`` d (the per-capita death rate of a
    small population), ``carrying_capacity`` K, optional ``immigration`` ι. Default
    priors: b ~ lognormal(log(0.4/τ), 1.5), d ~ lognormal(log(0.3/τ), 1.5),
    K ~ lognormal(log c, 1), ι ~ lognormal(log(1/τ), 1.5) (τ median census interval,
    c median count).

    The family describes a regulated population: its support is b > d (the intrinsic
    growth rate b − d is positive, so per-capita death rises with size and K is a
    stable equilibrium); the priors are those above restricted to b > d. Beyond any
    cap the quadratic deaths continue, so with immigration a stationary law always
    exists. (Evaluated at b < d the formula would describe per-capita death falling
    with size, clipped at zero; the rates functions still accept such values.)

    The sampler works in :class:`RegulatedCoordinates` (births at the median count,
    the immigrants' share, d/b and the balance of births and deaths at the median
    count), which straighten the weakly identified directions; the posterior and
    priors stay on b, d, K, ι.

    Args:
        immigration: include ι.
    """

    name = "logistic"
    formula = ("b(n) = b,  d(n) = max(0, d + (b - d)·n/K)\n"
               "at the carrying capacity n = K births equal deaths: b·K = μ_K\n"
               "support b > d (a regulated population); the priors are restricted to it")

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive", "b, per-capita birth rate"),
                ParameterSpec("death_rate", "positive",
                              "d, per-capita death rate of a small population"),
                ParameterSpec("carrying_capacity", "positive",
                              "K, the size where births balance deaths")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return {**default_rate_priors(scale),
                "carrying_capacity": lognormal_prior(scale.count_scale, 1.0)}

    def _per_capita(self, xp: Backend, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        b, d, k = p["birth_rate"], p["death_rate"], p["carrying_capacity"]
        return b + 0.0 * n, xp.maximum(d + (b - d) * n / k, 0.0)

    def admissible(self, p: Mapping[str, Any]) -> np.ndarray:
        """b > d: a regulated population (see the class docstring)."""
        return np.asarray(p["birth_rate"] > p["death_rate"], dtype=bool).reshape(-1)

    def sampling_coordinates(self, scale: DataScale) -> SamplingCoordinates:
        """:class:`RegulatedCoordinates` at the data's median count."""
        return RegulatedCoordinates(scale.count_scale, self.immigration)
