"""Posterior predictive bands per site, from whatever layout posterior.nc uses.

The posterior_predictive group holds simulated count series. Layouts recognised:

* one variable with a site dimension and a time dimension (and perhaps a replicate
  survey dimension), e.g. dims (chain, draw, site, time);
* one variable per site, named after the site (or ``<name>_<site>``, or with an
  attribute ``site``), dims (chain, draw, time[, survey]);
* one variable over observations, dims (chain, draw, obs), with coordinates along it
  naming each observation's site and time (``site`` or ``*_site``, ``time`` or ``*_time``,
  e.g. infer.fit's ``counts`` over ``count_cell`` with ``cell_site`` and ``cell_time``);
* a single site and a single variable with one dimension besides chain and draw.

Times come from the time dimension's coordinate when its values are the site's survey
times, else from a time coordinate along it, else from the site's surveyed times in
order when the lengths agree. A layout that cannot be placed is reported, not guessed.
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

__all__ = ["PredictiveBands", "predictive_bands", "QUANTILES"]

#: Quantiles drawn: the 90% and 50% equal-tailed bands and the median.
QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)

_SAMPLE_DIMS = ("chain", "draw")


@dataclass
class PredictiveBands:
    """Posterior predictive quantiles per site.

    Attributes:
        bands: {site: DataFrame with column time and one column per quantile in
            QUANTILES, named "q05", "q25", "q50", "q75", "q95"}.
        variable: the posterior_predictive variable(s) used, for the caption.
        notes: why some or all sites have no bands (empty when every site has them).
    """

    bands: dict[str, pd.DataFrame] = field(default_factory=dict)
    variable: str = ""
    notes: list[str] = field(default_factory=list)


def _qname(q: float) -> str:
    return f"q{round(q * 100):02d}"


def _survey_times(counts: pd.DataFrame | None, site: str) -> np.ndarray:
    if counts is None:
        return np.zeros(0)
    rows = counts[(counts["site"] == site)]
    surveyed = rows[rows["count"].notna()]
    return np.unique(surveyed["time"].to_numpy(dtype=float))


def _all_times(counts: pd.DataFrame | None, site: str) -> np.ndarray:
    if counts is None:
        return np.zeros(0)
    return np.unique(counts.loc[counts["site"] == site, "time"].to_numpy(dtype=float))


def _numeric(values: np.ndarray) -> np.ndarray | None:
    try:
        out = np.asarray(values, dtype=float)
    except (TypeError, ValueError):
        return None
    return out if np.all(np.isfinite(out)) else None


def _times_along(da: xr.DataArray, dim: str, counts: pd.DataFrame | None, site: str) -> np.ndarray | None:
    """The survey time of each position along ``dim``, or None when it cannot be placed."""
    known = _all_times(counts, site)
    if dim in da.coords:
        vals = _numeric(da[dim].values)
        if vals is not None and known.size and np.all(np.isin(vals, known)):
            return vals
    for name, coord in da.coords.items():
        if name != dim and coord.dims == (dim,) and "time" in str(name).lower():
            vals = _numeric(coord.values)
            if vals is not None:
                return vals
    n = da.sizes[dim]
    for candidate in (_survey_times(counts, site), known):
        if candidate.size == n:
            return candidate
    if "time" in dim.lower() and dim in da.coords:
        return _numeric(da[dim].values)
    return None


def _bands(samples: np.ndarray, times: np.ndarray) -> pd.DataFrame:
    """samples: (n_samples, n_times) possibly with NaN (no survey)."""
    with warnings.catch_warnings():  # all-NaN columns (a time never simulated) give NaN, dropped below
        warnings.simplefilter("ignore", RuntimeWarning)
        q = np.nanquantile(samples, QUANTILES, axis=0)
    df = pd.DataFrame({"time": times})
    for i, qq in enumerate(QUANTILES):
        df[_qname(qq)] = q[i]
    df = df.groupby("time", as_index=False).mean()  # replicate positions at one time share a band
    return df.dropna().reset_index(drop=True)


def _site_series(da: xr.DataArray, counts: pd.DataFrame | None, site: str) -> tuple[pd.DataFrame | None, str]:
    """Bands of one site's simulated series ``da`` (dims chain, draw, + 1 or 2 more)."""
    extra = [d for d in da.dims if d not in _SAMPLE_DIMS]
    if not extra:
        return None, f"variable {da.name!r} has no time dimension"
    time_dim, times = None, None
    for d in sorted(extra, key=lambda d: ("time" not in d.lower(), extra.index(d))):
        t = _times_along(da, d, counts, site)
        if t is not None:
            time_dim, times = d, t
            break
    if time_dim is None:
        return None, (f"cannot tell the survey times of {da.name!r} (dims {', '.join(da.dims)}) for site {site!r}")
    others = [d for d in extra if d != time_dim]
    stacked = da.transpose(*_SAMPLE_DIMS, *others, time_dim)
    arr = np.asarray(stacked.values, dtype=float).reshape(-1, stacked.sizes[time_dim])
    return _bands(arr, np.asarray(times, dtype=float)), ""


def _site_dim(da: xr.DataArray, sites: list[str]) -> str | None:
    for d in da.dims:
        if d in _SAMPLE_DIMS:
            continue
        if d == "site" or (d in da.coords and set(sites) <= {str(v) for v in da[d].values}):
            return d
    return None


def predictive_bands(idata: Any, counts: pd.DataFrame | None, sites: list[str]) -> PredictiveBands:
    """Posterior predictive quantile bands per site (see the module docstring for layouts).

    Args:
        idata: InferenceData (its posterior_predictive group is read, if any).
        counts: the observed counts (columns time, count, site), used to place times.
        sites: the site names to look for.

    Returns:
        PredictiveBands; sites that could not be placed are explained in ``notes``.
    """
    out = PredictiveBands()
    if "posterior_predictive" not in idata.groups():
        out.notes.append("posterior.nc has no posterior_predictive group")
        return out
    pp = idata.posterior_predictive
    names = [str(n) for n in pp.data_vars]
    if not names:
        out.notes.append("the posterior_predictive group is empty")
        return out
    used: list[str] = []
    problems: dict[str, str] = {}
    # 1. a variable with a site dimension
    for name in names:
        da = pp[name]
        dim = _site_dim(da, sites)
        if dim is None:
            continue
        for site in sites:
            if site in out.bands:
                continue
            sub = da.sel({dim: site}) if site in [str(v) for v in da[dim].values] else None
            if sub is None:
                continue
            df, why = _site_series(sub, counts, site)
            if df is not None:
                out.bands[site] = df
                used.append(name)
            else:
                problems[site] = why
    # 2. a variable per site
    for site in sites:
        if site in out.bands:
            continue
        for name in names:
            da = pp[name]
            if name == site or name.endswith(f"_{site}") or name.endswith(f"[{site}]") or str(da.attrs.get("site")) == site:
                df, why = _site_series(da, counts, site)
                if df is not None:
                    out.bands[site] = df
                    used.append(name)
                    break
                problems[site] = why
    # 3. one variable over observations with site and time coordinates
    for name in names:
        da = pp[name]
        extra = [d for d in da.dims if d not in _SAMPLE_DIMS]
        if len(extra) != 1:
            continue
        dim = extra[0]
        along = [str(c) for c in da.coords if da[c].dims == (dim,) and c != dim]
        site_c = next((c for c in along if c == "site" or c.endswith("_site")), None)
        time_c = next((c for c in along if c == "time" or c.endswith("_time")), None)
        if site_c is None or time_c is None:
            continue
        labels = np.array([str(v) for v in da[site_c].values])
        times = _numeric(da[time_c].values)
        if times is None:
            continue
        for site in sites:
            if site in out.bands or not (labels == site).any():
                continue
            sel = labels == site
            arr = np.asarray(da.transpose(*_SAMPLE_DIMS, dim).values, dtype=float).reshape(-1, da.sizes[dim])
            out.bands[site] = _bands(arr[:, sel], times[sel])
            used.append(name)
    # 4. a single site and a single series variable
    if len(sites) == 1 and sites[0] not in out.bands:
        candidates = [n for n in names if len([d for d in pp[n].dims if d not in _SAMPLE_DIMS]) in (1, 2)]
        if len(candidates) == 1:
            df, why = _site_series(pp[candidates[0]], counts, sites[0])
            if df is not None:
                out.bands[sites[0]] = df
                used.append(candidates[0])
            else:
                problems[sites[0]] = why
    for site in sites:
        if site not in out.bands:
            layout = "; ".join(f"{n} ({', '.join(pp[n].dims)})" for n in names)
            out.notes.append(problems.get(site) or
                             f"no posterior predictive series found for site {site!r} (variables: {layout})")
    out.variable = ", ".join(dict.fromkeys(used))
    return out
