"""Posterior predictive bands per site, from posterior.nc's posterior_predictive group.

The schema fixes the layout (:mod:`tallyfit.runfolder.schema`): one variable
(PREDICTIVE_VARIABLE) over one dim of count cells (CELL_DIM), with each cell's site and
survey time as coordinates along it (CELL_SITE, CELL_TIME), exactly as observed_data.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from tallyfit.runfolder import schema as S

__all__ = ["PredictiveBands", "predictive_bands", "QUANTILES"]

#: Quantiles drawn: the 90% and 50% equal-tailed bands and the median.
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)


@dataclass
class PredictiveBands:
    """Posterior predictive quantiles per site.

    Attributes:
        bands: {site: DataFrame with column time and one column per quantile in
            QUANTILES, named "q05", "q25", "q50", "q75", "q95"}.
        notes: why some or all sites have no bands (empty when every site has them).
    """

    bands: dict[str, pd.DataFrame] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)


def _qname(q: float) -> str:
    return f"q{round(q * 100):02d}"


def predictive_bands(idata: Any, sites: list[str]) -> PredictiveBands:
    """Posterior predictive quantile bands per site and survey time.

    Args:
        idata: InferenceData (its posterior_predictive group is read, if any).
        sites: the site names.

    Returns:
        PredictiveBands; a missing group, variable or site is explained in ``notes``.
    """
    out = PredictiveBands()
    if "posterior_predictive" not in idata.groups():
        out.notes.append("posterior.nc has no posterior_predictive group")
        return out
    pp = idata.posterior_predictive
    if S.PREDICTIVE_VARIABLE not in pp or S.CELL_DIM not in pp[S.PREDICTIVE_VARIABLE].dims:
        out.notes.append(f"posterior_predictive has no variable {S.PREDICTIVE_VARIABLE!r} over {S.CELL_DIM!r}")
        return out
    da = pp[S.PREDICTIVE_VARIABLE]
    cell_site = np.array([str(v) for v in da[S.CELL_SITE].values])
    cell_time = np.asarray(da[S.CELL_TIME].values, dtype=float)
    samples = np.asarray(da.transpose("chain", "draw", S.CELL_DIM).values, dtype=float).reshape(-1, da.sizes[S.CELL_DIM])
    for site in sites:
        sel = cell_site == site
        if not sel.any():
            out.notes.append(f"no posterior predictive counts for site {site!r}")
            continue
        with warnings.catch_warnings():  # a cell never simulated (all NaN) gives NaN, dropped below
            warnings.simplefilter("ignore", RuntimeWarning)
            q = np.nanquantile(samples[:, sel], QUANTILES, axis=0)
        df = pd.DataFrame({"time": cell_time[sel], **{_qname(qq): q[i] for i, qq in enumerate(QUANTILES)}})
        # replicate surveys at one time share a band
        out.bands[site] = df.groupby("time", as_index=False).mean().dropna().reset_index(drop=True)
    return out
