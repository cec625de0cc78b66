"""Known conditions of each census interval (rainfall, a 0/1 for "after the fence went up").

A covariate acts on the per-capita birth or death rate of an interval log-linearly:
births × exp(Σ_j β_j z_j), deaths × exp(Σ_l γ_l z_l), with z the covariate values of the
interval. The value used for an interval is the one recorded at its start time (the
conditions of the year that begins with that census), for the site or, when the table
has no site column, for every site. An interval with no value is an error: nothing is
filled in silently.
"""
from __future__ import annotations

from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from tallyfit.infer.errors import InputError

__all__ = ["Covariates", "interval_design"]


@dataclass(frozen=True)
class Covariates:
    """A checked covariate table.

    Attributes:
        names: the covariate columns, in table order.
        values: {(site or None, time): values in ``names`` order}; site None applies to
            every site.
        source: where the table came from (for messages).
    """

    names: tuple[str, ...]
    values: Mapping[tuple[str | None, float], np.ndarray]
    source: str

    def value(self, site: str, time: float) -> np.ndarray | None:
        """The covariate values of ``site`` at ``time`` (None when the table has none)."""
        v = self.values.get((site, float(time)))
        return self.values.get((None, float(time))) if v is None else v


def interval_design(series: Iterable, covariates: Covariates, names: Sequence[str], *, what: str) -> np.ndarray:
    """One row per transition (site by site, consecutive surveyed times) of chosen covariates.

    Args:
        series: the sites' count series (``SiteSeries``, e.g. ``CountData.series``).
        covariates: the covariate table.
        names: the covariates wanted, in order.
        what: "births" or "deaths", for messages.

    Returns:
        float array (n_transitions, len(names)).

    Raises:
        InputError: an unknown covariate name, or an interval whose start time has no value.
    """
    unknown = [n for n in names if n not in covariates.names]
    if unknown:
        raise InputError(f"no covariate {', '.join(map(repr, unknown))} on {what} in the table",
                         source=covariates.source, hint="columns: " + ", ".join(covariates.names))
    cols = [covariates.names.index(n) for n in names]
    rows = []
    for s in series:
        t = s.surveyed_times
        for t0, t1 in zip(t[:-1], t[1:]):
            v = covariates.value(s.site, float(t0))
            if v is None:
                raise InputError(f"no covariate values for site '{s.site}' at time {t0:g} (the start of the "
                                 f"interval to {t1:g})", source=covariates.source,
                                 hint="add a row for that time (and site), or remove the covariate")
            rows.append(v[cols])
    return np.asarray(rows, dtype=float).reshape(-1, len(cols))
