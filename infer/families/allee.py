"""The Allee family: logistic deaths with a mate-finding Allee effect on births."""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from tallyfit.infer.families.backend import Backend
from tallyfit.infer.families.base import RateFamily
from tallyfit.infer.families.coordinates import ImmigrationCoordinates, SamplingCoordinates
from tallyfit.infer.families.parameters import ParameterSpec, default_rate_priors
from tallyfit.infer.families.priors import lognormal_prior
from tallyfit.infer.families.scale import DataScale

__all__ = ["Allee"]


class Allee(RateFamily):
    """Logistic deaths with a mate-finding (component) Allee effect on births.

    Per-capita birth is reduced at small sizes by the chance of finding a mate,
    n/(A + n) (the mate-finding form; Dennis 1989, Natural Resource Modeling
    3:481–538, and McCarthy 1997, Ecological Modelling 103:99–102 — from memory):

        b(n) = b·n/(A + n),
        d(n) = max(0, d + c·n),   c = (b·K/(A + K) − d)/K,

    so λ_n = b·n²/(A + n) + ι and μ_n = n·(d + c·n). Births equal deaths at the
    carrying capacity n = K (b(K) = d(K)); since b(n) → 0 as n → 0 while d(n) → d,
    deaths outrun births below a critical size (the strong Allee threshold, the lower
    root of b(n) = d(n)). As A → 0 the family becomes the logistic one.
    Parameters: ``birth_rate`` b (per-capita birth of a large population),
    ``death_rate`` d, ``carrying_capacity`` K, ``allee_threshold`` A (the size at which
    per-capita birth is half of b), optional ``immigration`` ι. Default priors:
    b, d, ι as for the logistic family, K ~ lognormal(log c, 1),
    A ~ lognormal(log(max(1, c/5)), 1).

    If b·K/(A + K) < d, c < 0 and per-capita death is clipped at zero as in the
    logistic family. Beyond any cap the formula continues (quadratic deaths when c > 0).

    With immigration the sampler works in :class:`ImmigrationCoordinates` (the births at
    the median count, the immigrants' share and log A); the priors are still those above.

    Args:
        immigration: include ι.
    """

    name = "allee"
    formula = ("b(n) = b·n/(A + n)   (mate-finding Allee effect)\n"
               "d(n) = max(0, d + c·n),  c = (b·K/(A + K) - d)/K   so b(K) = d(K)")

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive",
                              "b, per-capita birth rate of a large population"),
                ParameterSpec("death_rate", "positive",
                              "d, per-capita death rate of a small population"),
                ParameterSpec("carrying_capacity", "positive",
                              "K, the size where births balance deaths"),
                ParameterSpec("allee_threshold", "positive",
                              "A, the size at which per-capita birth is half of b")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return {**default_rate_priors(scale),
                "carrying_capacity": lognormal_prior(scale.count_scale, 1.0),
                "allee_threshold": lognormal_prior(max(1.0, scale.count_scale / 5.0), 1.0)}

    def _per_capita(self, xp: Backend, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        b, d, k, a = (p["birth_rate"], p["death_rate"], p["carrying_capacity"],
                      p["allee_threshold"])
        c = (b * k / (a + k) - d) / k
        return b * n / (a + n), xp.maximum(d + c * n, 0.0)

    def sampling_coordinates(self, scale: DataScale) -> SamplingCoordinates | None:
        """:class:`ImmigrationCoordinates` (with A) at the data's median count when ι is a parameter."""
        return ImmigrationCoordinates(scale.count_scale, threshold=True) if self.immigration else None
