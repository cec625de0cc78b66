"""Management scenarios: changes to the fitted rates applied before the push-forward.

With λ_n = n·b(n) + ι and μ_n = n·d(n), a scenario maps the rates of every posterior draw:

    λ'_n = birth_factor · (λ_n − ι) + ι + added_immigration
    μ'_n = death_factor · μ_n + harvest_rate · n + harvest_quota · [n ≥ 1]

harvest_rate is a per-capita removal rate; harvest_quota a fixed number removed per time
unit while any animal remains (a constant removal rate). A scenario may also state future
covariate values (``covariates``, e.g. {fenced = 0}), which replace the run's stated
future values in its forecasts. Every scenario is applied to the same draws as the
baseline, so differences are paired.
"""
from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any, Mapping

import numpy as np

from tallyfit.infer.errors import InputError

_FIELDS = {"harvest_rate": 0.0, "harvest_quota": 0.0, "death_factor": 1.0, "birth_factor": 1.0,
           "added_immigration": 0.0}


@dataclass(frozen=True)
class Scenario:
    """One scenario (the baseline has every field at its neutral value).

    Attributes:
        name: label used in tables and figures.
        harvest_rate: per-capita removal rate (per time unit), >= 0.
        harvest_quota: animals removed per time unit while any remain, >= 0.
        death_factor: multiplier on per-capita death (e.g. 0.8 for protection), >= 0.
        birth_factor: multiplier on per-capita birth, >= 0.
        added_immigration: animals added per time unit (supplementation), >= 0.
        description: free text for the report.
        covariates: future covariate values of this scenario ({name: value}), replacing
            the run's stated future values for the names given.
    """

    name: str
    harvest_rate: float = 0.0
    harvest_quota: float = 0.0
    death_factor: float = 1.0
    birth_factor: float = 1.0
    added_immigration: float = 0.0
    description: str = ""
    covariates: Mapping[str, float] = field(default_factory=dict)

    @property
    def is_baseline(self) -> bool:
        return all(getattr(self, k) == v for k, v in _FIELDS.items()) and not self.covariates

    def apply(self, birth: np.ndarray, death: np.ndarray, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Scenario rates from baseline rates (sizes on the last axis; size 0 must be included
        first, since ι = λ_0).

        Args:
            birth, death: arrays (..., len(sizes)).
            sizes: the sizes of the last axis, starting at 0.

        Returns:
            (birth, death) under the scenario.
        """
        birth = np.asarray(birth, dtype=float)
        death = np.asarray(death, dtype=float)
        sizes = np.asarray(sizes, dtype=float)
        iota = birth[..., :1]
        new_birth = self.birth_factor * (birth - iota) + iota + self.added_immigration
        new_death = self.death_factor * death + self.harvest_rate * sizes + self.harvest_quota * (sizes >= 1)
        return new_birth, new_death

    def as_dict(self) -> dict[str, Any]:
        """Plain data (for run.toml, summary.json and derived.nc's scenarios attribute)."""
        out = asdict(self)
        out["covariates"] = dict(self.covariates)
        return out


BASELINE = Scenario("baseline", description="fitted rates, no change")


def scenarios_from_table(table: Mapping[str, Any], *, source: str = "run.toml") -> list[Scenario]:
    """Read the ``[scenario.NAME]`` tables of a settings file.

    Args:
        table: mapping of scenario name -> mapping of fields (see Scenario).
        source: file name for messages.

    Returns:
        the baseline followed by the scenarios, in file order.

    Raises:
        InputError: unknown keys, non-numeric or negative values, or a name "baseline".
    """
    out = [BASELINE]
    if not isinstance(table, Mapping):
        raise InputError("the 'scenario' entry must be a table of named scenarios", source=source,
                         column="scenario", hint="write [scenario.cull] then harvest_rate = 0.05")
    for name, fields in table.items():
        where = f"scenario.{name}"
        if name == "baseline":
            raise InputError("'baseline' is reserved for the fitted rates", source=source, column=where,
                             hint="give the scenario another name")
        if not isinstance(fields, Mapping):
            raise InputError("a scenario must be a table of settings", source=source, column=where,
                             hint=f"write [scenario.{name}] followed by e.g. harvest_rate = 0.05")
        kwargs: dict[str, Any] = {}
        for key, value in fields.items():
            if key == "description":
                kwargs[key] = str(value)
                continue
            if key == "covariates":
                if not isinstance(value, Mapping) or not all(
                        isinstance(v, (int, float)) and not isinstance(v, bool) and np.isfinite(v)
                        for v in value.values()):
                    raise InputError("'covariates' must be a table of finite numbers", source=source,
                                     column=f"{where}.covariates", hint="e.g. covariates = {fenced = 0}")
                kwargs[key] = {str(k): float(v) for k, v in value.items()}
                continue
            if key not in _FIELDS:
                raise InputError(f"unknown setting '{key}'", source=source, column=f"{where}.{key}",
                                 hint="allowed: " + ", ".join(list(_FIELDS) + ["description", "covariates"]))
            if isinstance(value, bool) or not isinstance(value, (int, float)) or not np.isfinite(value):
                raise InputError(f"'{key}' must be a finite number, got {value!r}", source=source,
                                 column=f"{where}.{key}")
            if value < 0:
                raise InputError(f"'{key}' must be >= 0, got {value!r}", source=source, column=f"{where}.{key}")
            kwargs[key] = float(value)
        out.append(Scenario(str(name), **kwargs))
    return out
