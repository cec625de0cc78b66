"""The report's tables, as DataFrames built from a run folder's contents.

Each function returns plain numbers (probabilities as fractions); formatting and HTML
escaping happen in :mod:`reports.html`. Differences between a scenario and the baseline
are paired: computed draw by draw on the same posterior draws, then summarised.
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .bands import SAMPLE_DIMS, band

__all__ = ["category_table", "extinction_table", "trend_table",
           "scenario_settings", "scenario_differences", "prior_posterior_table",
           "site_data_table", "flatten_settings", "environment_share", "covariate_effects"]


def category_table(derived: xr.Dataset, names: list[str]) -> pd.DataFrame:
    """Posterior probability of each criterion E category, per scenario.

    Args:
        derived: the push-forward Dataset.
        names: the category names in code order (``RunFolder.categories``).

    Returns:
        DataFrame indexed by scenario, one column per category (fractions summing to 1).
    """
    rows = {}
    for sc in derived["scenario"].values:
        code = np.asarray(derived["iucn_category"].sel(scenario=sc).values).ravel()
        rows[str(sc)] = [float(np.mean(code == i)) for i in range(len(names))]
    return pd.DataFrame.from_dict(rows, orient="index", columns=names)


def extinction_table(derived: xr.Dataset, scenario: str, level: float = 0.9,
                     site: str | None = None) -> pd.DataFrame:
    """Probability of reaching each threshold within each horizon: posterior mean and interval.

    Args:
        derived: the push-forward Dataset.
        scenario: scenario name.
        level: credible level of the interval.
        site: a site name, or None for all sites combined (every site at or below the threshold).

    Returns:
        DataFrame with columns threshold, horizon, mean, lo, hi (fractions).
    """
    d = derived.sel(scenario=scenario)
    da = d["extinction_probability_all_sites"] if site is None else d["extinction_probability"].sel(site=site)
    b = band(da, level)
    rows = []
    for k in da["threshold"].values:
        for h in da["horizon"].values:
            sel = {"threshold": k, "horizon": h}
            rows.append((int(k), float(h), float(b.mean.sel(sel)), float(b.lo.sel(sel)), float(b.hi.sel(sel))))
    return pd.DataFrame(rows, columns=["threshold", "horizon", "mean", "lo", "hi"])


def _last_counts(counts: pd.DataFrame | None, sites: list[str]) -> dict[str, tuple[float, int]]:
    out = {}
    if counts is None:
        return out
    for site in sites:
        rows = counts[(counts["site"] == site) & counts["count"].notna()]
        if rows.empty:
            continue
        t = float(rows["time"].max())
        out[site] = (t, int(rows.loc[rows["time"] == t, "count"].max()))
    return out


def trend_table(derived: xr.Dataset, counts: pd.DataFrame | None, scenario: str,
                level: float = 0.9, starts: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """Expected change per unit time at each site's present size, λ_n − μ_n, under the fitted rates.

    With λ_n = n·b(n) + ι and μ_n = n·d(n), the expected change at size n is
    n·(b(n) − d(n)) + ι. Positive means the model expects growth from there. The size n is
    the site's start size of the forecasts when given (summary.json's ``starts``: the last
    count, divided by the detection probability when counts miss animals), else the last
    count (the largest replicate at the last surveyed time).

    Args:
        derived: the push-forward Dataset.
        counts: observed counts (columns time, count, site); None gives an empty table.
        scenario: scenario name.
        level: credible level.
        starts: {site: start size} of the forecasts, or None.

    Returns:
        DataFrame with columns site, last_time, last_count, size (the n used), mean, lo,
        hi (animals per time unit) and p_increase (posterior probability that the change
        is positive).
    """
    d = derived.sel(scenario=scenario)
    sites = [str(s) for s in derived["site"].values]
    cap = int(derived["size"].max())
    rows = []
    for site, (t, last) in _last_counts(counts, sites).items():
        n = last
        if isinstance(starts, Mapping) and site in starts:
            try:
                n = int(round(float(starts[site])))
            except (TypeError, ValueError):
                n = last
        n = max(0, min(n, cap))
        iota = d["immigration"]
        if n == 0:
            drift = iota
        else:
            drift = n * (d["birth_per_capita"].sel(size=n) - d["death_per_capita"].sel(size=n)) + iota
        b = band(drift, level)
        p_up = float((drift > 0).mean())
        rows.append((site, t, last, n, float(b.mean), float(b.lo), float(b.hi), p_up))
    return pd.DataFrame(rows, columns=["site", "last_time", "last_count", "size", "mean", "lo", "hi", "p_increase"])


_NEUTRAL = {"harvest_rate": 0.0, "harvest_quota": 0.0, "death_factor": 1.0, "birth_factor": 1.0,
            "added_immigration": 0.0}
_SETTING_WORDS = {"harvest_rate": "per-capita removal rate", "harvest_quota": "animals removed per {unit}",
                  "death_factor": "per-capita death × ", "birth_factor": "per-capita birth × ",
                  "added_immigration": "animals added per {unit}"}


def scenario_settings(scenarios: list[Mapping[str, Any]], unit: str = "time unit") -> dict[str, str]:
    """What each scenario changes, in words.

    Args:
        scenarios: one dict per scenario (``RunFolder.scenario_settings``).
        unit: the time unit ("year").

    Returns:
        {scenario name: description}.
    """
    out = {}
    for item in scenarios:
        parts = []
        for key, neutral in _NEUTRAL.items():
            v = item[key]
            if v != neutral:
                word = _SETTING_WORDS[key].format(unit=unit)
                parts.append(f"{word}{v:g}" if word.endswith("× ") else f"{word} {v:g}")
        parts += [f"{name} = {value:g}" for name, value in dict(item.get("covariates") or {}).items()]
        desc = str(item["description"]).strip()
        if not parts:
            out[str(item["name"])] = desc or "no change to the fitted rates"
        else:
            out[str(item["name"])] = "; ".join(parts) + (f" ({desc})" if desc else "")
    return out


def scenario_differences(derived: xr.Dataset, level: float = 0.9) -> pd.DataFrame:
    """Paired differences (scenario − baseline, draw by draw) of the main derived quantities.

    Quantities: the probability that every site reaches each threshold within each horizon,
    the stationary mean (draws where both have one), the quasi-stationary mean, and the
    probability that a stationary distribution exists.

    Args:
        derived: the push-forward Dataset (baseline first).
        level: credible level of the difference's interval.

    Returns:
        DataFrame with columns scenario, quantity, baseline, value (posterior means),
        diff_mean, diff_lo, diff_hi and p_higher (posterior probability that the
        scenario's value is the larger); empty when there is only the baseline.
    """
    scen = [str(s) for s in derived["scenario"].values]
    base = derived.sel(scenario=scen[0])
    rows = []
    for sc in scen[1:]:
        d = derived.sel(scenario=sc)
        items: list[tuple[str, xr.DataArray, xr.DataArray]] = []
        for k in derived["threshold"].values:
            what = "extinction" if int(k) == 0 else f"falling to {int(k)} or fewer"
            for h in derived["horizon"].values:
                sel = {"threshold": k, "horizon": h}
                items.append((f"P({what} within {float(h):g})",
                              base["extinction_probability_all_sites"].sel(sel),
                              d["extinction_probability_all_sites"].sel(sel)))
        both = base["stationary_exists"] & d["stationary_exists"]
        if bool(both.any()):
            items.append(("stationary mean", base["stationary_mean"].where(both), d["stationary_mean"].where(both)))
        items.append(("quasi-stationary mean", base["quasi_mean"], d["quasi_mean"]))
        for name, a, b in items:
            diff = b - a
            bd = band(diff, level)
            valid = np.isfinite(diff)
            p_hi = float(((diff > 0) & valid).sum() / max(1, int(valid.sum()))) if bool(valid.any()) else float("nan")
            rows.append((sc, name, float(a.mean(skipna=True)), float(b.mean(skipna=True)), float(bd.mean),
                         float(bd.lo), float(bd.hi), p_hi))
        pa, pb = float(base["stationary_exists"].mean()), float(d["stationary_exists"].mean())
        rows.append((sc, "P(a stationary distribution exists)", pa, pb, pb - pa, float("nan"), float("nan"),
                     float("nan")))
    return pd.DataFrame(rows, columns=["scenario", "quantity", "baseline", "value", "diff_mean", "diff_lo",
                                       "diff_hi", "p_higher"])


def prior_posterior_table(idata: Any, level: float = 0.9) -> pd.DataFrame:
    """Prior and posterior intervals of every scalar parameter present in both groups.

    Args:
        idata: InferenceData with posterior and (optionally) prior groups.
        level: credible level.

    Returns:
        DataFrame indexed by parameter with columns prior_lo, prior_hi, post_lo, post_hi
        and sd_ratio (posterior sd / prior sd: small means the data were informative);
        empty when there is no prior group.
    """
    if "prior" not in idata.groups():
        return pd.DataFrame(columns=["prior_lo", "prior_hi", "post_lo", "post_hi", "sd_ratio"])
    rows = {}
    for name in idata.posterior.data_vars:
        if name not in idata.prior:
            continue
        post, prior = idata.posterior[name], idata.prior[name]
        if any(d not in SAMPLE_DIMS for d in post.dims) or any(d not in SAMPLE_DIMS for d in prior.dims):
            continue
        bp, bq = band(post, level), band(prior, level)
        sd_q = float(prior.std())
        rows[str(name)] = {"prior_lo": float(bq.lo), "prior_hi": float(bq.hi), "post_lo": float(bp.lo),
                           "post_hi": float(bp.hi), "sd_ratio": float(post.std()) / sd_q if sd_q > 0 else np.nan}
    return pd.DataFrame.from_dict(rows, orient="index")


def site_data_table(counts: pd.DataFrame | None) -> pd.DataFrame:
    """One row per site: surveys, time span, smallest, largest and last count.

    Args:
        counts: observed counts (columns time, count, site); None gives an empty table.

    Returns:
        DataFrame with columns site, occasions (times with a count), missing (times
        listed without a count), first, last, smallest, largest, last_count.
    """
    cols = ["site", "occasions", "missing", "first", "last", "smallest", "largest", "last_count"]
    if counts is None:
        return pd.DataFrame(columns=cols)
    rows = []
    for site, g in counts.groupby("site", sort=False):
        seen = g[g["count"].notna()]
        times_all = set(g["time"])
        times_seen = set(seen["time"])
        if seen.empty:
            rows.append((site, 0, len(times_all), np.nan, np.nan, np.nan, np.nan, np.nan))
            continue
        last_t = seen["time"].max()
        rows.append((site, len(times_seen), len(times_all - times_seen), seen["time"].min(), last_t,
                     seen["count"].min(), seen["count"].max(), seen.loc[seen["time"] == last_t, "count"].max()))
    return pd.DataFrame(rows, columns=cols)


def flatten_settings(settings: Any, prefix: str = "") -> list[tuple[str, str]]:
    """Nested settings as (dotted key, value text) rows, for the assumptions table.

    Args:
        settings: a mapping (e.g. run.toml's [settings]) or any value.
        prefix: key prefix for nested entries.

    Returns:
        list of (key, value) pairs in the mapping's order.
    """
    if isinstance(settings, Mapping):
        rows = []
        for k, v in settings.items():
            rows += flatten_settings(v, f"{prefix}.{k}" if prefix else str(k))
        return rows
    if isinstance(settings, (list, tuple)):
        if all(not isinstance(v, (Mapping, list, tuple)) for v in settings):
            return [(prefix, ", ".join(str(v) for v in settings))]
        rows = []
        for i, v in enumerate(settings):
            rows += flatten_settings(v, f"{prefix}[{i}]")
        return rows
    return [(prefix, str(settings))]


def environment_share(posterior: xr.Dataset, derived: xr.Dataset, scenario: str, size: int,
                      varying: str) -> xr.DataArray:
    """Share of the variance of one year's log growth at ``size`` that is environmental, per draw.

    In the diffusion approximation of count-based viability analysis (Lande, Engen &
    Sæther 2003, Stochastic Population Dynamics in Ecology and Conservation, ch. 1;
    Dennis, Munholland & Scott 1991) the variance of log growth per time unit at size n is
    the demographic variance (b(n) + d(n))/n plus the environmental variance. Here the
    year's factor is exp(ε − σ²/2) on births (and exp(−ε − σ²/2) on deaths with
    "births_and_deaths"), so the environmental variance of the net per-capita rate is
    b²(e^{σ²} − 1), plus d²(e^{σ²} − 1) − 2bd(e^{−σ²} − 1) when deaths move too.

    Args:
        posterior: the posterior group (with ``environment_sd``).
        derived: the push-forward Dataset (per-capita rates by size).
        scenario: scenario name.
        size: the size n.
        varying: "births" or "births_and_deaths".

    Returns:
        DataArray over (chain, draw) of the environmental share (0..1).
    """
    d = derived.sel(scenario=scenario, size=size)
    b, m = d["birth_per_capita"], d["death_per_capita"]
    # the push-forward may use a thinned subset of the draws: match them by chain and draw
    s2 = (posterior["environment_sd"] ** 2).sel(chain=b["chain"].values, draw=b["draw"].values)
    env = b ** 2 * np.expm1(s2)
    if varying == "births_and_deaths":
        env = env + m ** 2 * np.expm1(s2) - 2 * b * m * np.expm1(-s2)
    dem = (b + m) / max(size, 1)
    return env / (env + dem)


def covariate_effects(posterior: xr.Dataset, level: float = 0.9) -> pd.DataFrame:
    """Each covariate's effect as a rate ratio: exp(β) per unit of the covariate.

    Args:
        posterior: the posterior group (``birth_effect`` over ``birth_covariate``,
            ``death_effect`` over ``death_covariate``, when the fit had covariates).
        level: credible level.

    Returns:
        DataFrame with columns rate ("births" or "deaths"), covariate, ratio (posterior
        median of exp(β)), lo, hi, and p_above_1 (posterior probability that the ratio
        exceeds 1); empty without covariates.
    """
    rows = []
    for rate, var, dim in (("births", "birth_effect", "birth_covariate"), ("deaths", "death_effect", "death_covariate")):
        if var not in posterior:
            continue
        for name in posterior[dim].values:
            ratio = np.exp(posterior[var].sel({dim: name}))
            b = band(ratio, level)
            rows.append((rate, str(name), float(b.median), float(b.lo), float(b.hi), float((ratio > 1).mean())))
    return pd.DataFrame(rows, columns=["rate", "covariate", "ratio", "lo", "hi", "p_above_1"])
