"""Push-forward: every retained posterior draw becomes a chain and goes through the solvers.

For each draw and scenario: per-capita birth and death rates by size; the stationary
distribution where one exists (decided on the family's formula continued beyond the cap)
and the probability mass it puts above the cap; the quasi-stationary distribution and
its decay rate; the mean time to extinction from each site's last count; extinction and
quasi-extinction curves over the horizons; and the IUCN criterion E category. Besides the
per-draw quantities, the forecast of the next censuses (:mod:`.forecast`): the predictive
distribution of the size at each of the next few census times, per scenario and site.

With partial pooling (a ``site_offset`` in the posterior) each site has its own rates:
the quantities indexed by site (mean time to extinction, extinction curves) use that
site's rates, and the all-sites extinction probability multiplies the sites' own
probabilities per draw. The quantities without a site (per-capita rates, stationary and
quasi-stationary laws) then describe a typical site, the one with offset 0.

Results are an xarray Dataset with dims (scenario, chain, draw, size, site, threshold,
horizon), written to derived.nc.
"""
from __future__ import annotations

import math
import os
from concurrent.futures import ProcessPoolExecutor
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np
import xarray as xr

from tallyfit.chain import BirthDeathChain, ChainError
from tallyfit.infer.criterion_e import CATEGORIES, criterion_e_category, criterion_e_horizons
from tallyfit.infer.forecast import FORECAST_QUANTILES, forecast_rows, pmf_quantiles
from tallyfit.infer.scenarios import BASELINE, Scenario

#: Key of a draw's per-site parameters under partial pooling (a list in the order of spec.sites).
_SITE_PARAMS = "_site_params"

@dataclass(frozen=True)
class PushForwardSpec:
    """What to compute for every draw.

    Attributes:
        cap: size cap N of the fitted chains.
        sites: site names; starts: each site's last observed count (in site order).
        horizons: extinction-curve horizons (time units of the data), ascending.
        thresholds: quasi-extinction thresholds (0 = extinction).
        generation_time: years per generation for criterion E (None: shortest horizons).
        tol: error bound wanted on each extinction probability.
        varying: None, "births" or "births_and_deaths": with good and bad years the draws'
            ``environment_sd`` drives the annual chain (horizons must be whole time units).
        birth_covariates, death_covariates: the covariates the fit used.
        future_covariates: their values in the forecasts (a scenario may replace some).
        forecast_steps: how many future censuses the forecast covers (0: none).
        forecast_interval: the census interval of the forecast, in time units.
        forecast_from: each site's last census time (in site order).
    """

    cap: int
    sites: tuple[str, ...]
    starts: tuple[int, ...]
    horizons: tuple[float, ...]
    thresholds: tuple[int, ...] = (0,)
    generation_time: float | None = None
    tol: float = 1e-10
    varying: str | None = None
    birth_covariates: tuple[str, ...] = ()
    death_covariates: tuple[str, ...] = ()
    future_covariates: Mapping[str, float] = field(default_factory=dict)
    forecast_steps: int = 0
    forecast_interval: float = 1.0
    forecast_from: tuple[float, ...] = ()

    @property
    def affects(self) -> str:
        """The annual chain's setting: "birth" or "birth_and_death"."""
        return "birth_and_death" if self.varying == "births_and_deaths" else "birth"


def _stationary_beyond_cap(family: Any, params: Mapping[str, np.ndarray],
                           transform: Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]],
                           cap: int) -> tuple[bool, float, np.ndarray | None]:
    """Existence of the stationary law of the family continued beyond the cap, the mass it puts
    above the cap, and its pmf on 0..cap (renormalised within the cap) when it exists."""

    def rates(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        sizes = np.concatenate([[0], np.asarray(n).ravel()])  # size 0 first: scenarios read ι = λ_0
        b, d = family.numpy_rates(params, sizes)
        b, d = transform(b[0], d[0], sizes)
        return b[1:].reshape(np.shape(n)), d[1:].reshape(np.shape(n))

    # one evaluation of the formula well past the cap serves every truncation the series tries
    reach = max(256, 4 * cap)
    table = rates(np.arange(reach + 1))

    def cached(n: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        if int(n.max()) <= reach:
            return table[0][n], table[1][n]
        return rates(n)

    chain = BirthDeathChain(lambda n: cached(n)[0], lambda n: cached(n)[1])
    st = chain.stationary()
    if not st.exists:
        return False, float("nan"), None
    above = float(st.pmf[cap + 1:].sum()) if st.pmf.size > cap + 1 else 0.0
    pmf = np.zeros(cap + 1)
    pmf[: min(cap + 1, st.pmf.size)] = st.pmf[: cap + 1]  # beyond the series' end the mass is below its bound
    return True, above + st.tail_bound, pmf


def _one_draw(birth: np.ndarray, death: np.ndarray, spec: PushForwardSpec,
              starts: Sequence[int] | None = None, sigma: float = 0.0) -> dict[str, Any]:
    """All derived quantities of one chain (capped rates over 0..cap), from ``starts``
    (default: every site's last count); with σ > 0 those of the annual chain."""
    starts = spec.starts if starts is None else starts
    if sigma > 0:
        return _one_annual_draw(birth, death, spec, starts, sigma)
    chain = BirthDeathChain(birth, death)
    out: dict[str, Any] = _quasi(chain, spec.cap)
    out["log10_mean_time"] = np.zeros(0)
    if len(starts):
        with np.errstate(over="ignore"):
            out["log10_mean_time"] = chain.mean_time_to_extinction(np.array(starts), log=True) / math.log(10)
    times = np.asarray(spec.horizons, dtype=float)
    prob = np.empty((len(starts), len(spec.thresholds), times.size))
    bound = np.empty_like(prob)
    b0 = birth.copy()
    b0[0] = 0.0  # extinction curves: first passage to the threshold, with 0 absorbing
    absorbing = BirthDeathChain(b0, death)
    top = None
    if np.isfinite(out["quasi_decay_rate"]):
        # paths rarely go beyond the far upper tail of the quasi-stationary law: start the window there
        tail = np.cumsum(out["quasi_pmf"][::-1])[::-1]
        top = int(np.searchsorted(-tail, -1e-13)) + 5
    for i, start in enumerate(starts):
        for j, k in enumerate(spec.thresholds):
            curve = absorbing.extinction_curve(int(start), times, threshold=int(k), tol=spec.tol,
                                               window_top=top)
            prob[i, j], bound[i, j] = curve.probability, curve.error_bound
    out["extinction_probability"], out["extinction_error_bound"] = prob, bound
    return out


def _quasi(chain: Any, cap: int) -> dict[str, Any]:
    """The quasi-stationary law, decay rate and mean of a chain (NaN where it has none)."""
    try:
        qs = chain.quasi_stationary()
        return {"quasi_pmf": qs.pmf, "quasi_decay_rate": qs.decay_rate, "quasi_mean": qs.mean}
    except ChainError:
        return {"quasi_pmf": np.full(cap + 1, np.nan), "quasi_decay_rate": np.nan, "quasi_mean": np.nan}


def _one_annual_draw(birth: np.ndarray, death: np.ndarray, spec: PushForwardSpec, starts: Sequence[int],
                     sigma: float) -> dict[str, Any]:
    """The annual chain's quantities (good and bad years, chain.environment), from ``starts``."""
    from tallyfit.chain.environment import EnvironmentalChain

    b0 = birth.copy()
    b0[0] = 0.0  # extinction: 0 absorbing
    closed = EnvironmentalChain(b0, death, sigma, affects=spec.affects)
    out: dict[str, Any] = _quasi(closed, spec.cap)
    out["log10_mean_time"] = np.zeros(0)
    years = np.asarray(spec.horizons, dtype=float)
    shape = (len(starts), len(spec.thresholds), years.size)
    out["extinction_probability"], out["extinction_error_bound"] = np.empty(shape), np.empty(shape)
    if len(starts):
        st = np.asarray(starts, dtype=np.int64)
        out["log10_mean_time"] = closed.mean_time_to_extinction(st).log_mean / math.log(10)
        curves = closed.extinction_curves(st, years, thresholds=spec.thresholds, tol=spec.tol)
        # (threshold, start, year) -> (start, threshold, year)
        out["extinction_probability"] = np.transpose(curves.probability, (1, 0, 2))
        out["extinction_error_bound"] = np.transpose(curves.error_bound, (1, 0, 2))
    return out


def _annual_stationary(birth: np.ndarray, death: np.ndarray, spec: PushForwardSpec,
                       sigma: float) -> tuple[bool, float, np.ndarray | None]:
    """The annual chain's long-run law on 0..N, and its mass in the top tenth below the cap
    (under good and bad years there is no product form to continue past the cap)."""
    from tallyfit.chain.environment import EnvironmentalChain

    if birth[0] <= 0:
        return False, float("nan"), None
    lr = EnvironmentalChain(birth, death, sigma, affects=spec.affects).long_run(tol=spec.tol)
    return bool(lr.exists), float(lr.top_mass + lr.leaked), lr.pmf


_SITE_KEYS = ("log10_mean_time", "extinction_probability", "extinction_error_bound")
#: Posterior variables of the environment and the covariate effects.
_ENVIRONMENT_VARS = ("environment_sd", "birth_effect", "death_effect")


def _conditions(params: Mapping[str, np.ndarray], scenario: Scenario, spec: PushForwardSpec
                ) -> tuple[float, Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]]:
    """A draw's environment σ and the map from its fitted rates to the forecast's rates: the
    future covariate values (the scenario's where it states them), then the scenario."""
    sigma = float(np.ravel(params["environment_sd"])[0]) if "environment_sd" in params else 0.0
    future = {**spec.future_covariates, **dict(scenario.covariates)}
    shift = []
    for name, covs in (("birth_effect", spec.birth_covariates), ("death_effect", spec.death_covariates)):
        beta = np.ravel(params[name]) if covs else np.zeros(0)
        shift.append(float(beta @ np.array([future[c] for c in covs])) if covs else 0.0)

    def transform(b: np.ndarray, d: np.ndarray, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        iota = b[..., :1]
        return scenario.apply(iota + (b - iota) * math.exp(shift[0]), d * math.exp(shift[1]), sizes)

    return sigma, transform


def _work(args: tuple) -> list[dict[str, Any]]:
    family, params_list, scenario, spec = args
    results = []
    sizes = np.arange(spec.cap + 1)
    for params in params_list:
        per_site = params.get(_SITE_PARAMS)
        params = {k: v for k, v in params.items() if k != _SITE_PARAMS}
        sigma, transform = _conditions(params, scenario, spec)
        b, d = family.numpy_rates(params, sizes)
        b, d = transform(b[0], d[0], sizes)
        res = _one_draw(b, d, spec, starts=() if per_site is not None else None, sigma=sigma)
        if per_site is not None:
            # partial pooling: each site's own rates for what is indexed by site
            parts = []
            for own, start in zip(per_site, spec.starts):
                bi, di = family.numpy_rates(own, sizes)
                bi, di = transform(bi[0], di[0], sizes)
                parts.append(_one_draw(bi, di, spec, starts=(start,), sigma=sigma))
            for key in _SITE_KEYS:
                res[key] = np.concatenate([part[key] for part in parts])
        exists, above, pmf = (_annual_stationary(b, d, spec, sigma) if sigma > 0
                              else _stationary_beyond_cap(family, params, transform, spec.cap))
        res["stationary_exists"] = exists
        res["stationary_mass_above_cap"] = above
        res["stationary_pmf"] = pmf if pmf is not None else np.full(spec.cap + 1, np.nan)
        res["birth"], res["death"] = b, d
        results.append(res)
    return results


def _draw_params(posterior: xr.Dataset, names: Sequence[str]) -> tuple[list[dict[str, np.ndarray]], int, int]:
    n_chain, n_draw = posterior.sizes["chain"], posterior.sizes["draw"]
    flat = {}
    for name in names:
        if name in posterior:
            v = posterior[name].transpose("chain", "draw", ...).values
            flat[name] = v.reshape((n_chain * n_draw,) + v.shape[2:])
    params = [{k: v[i:i + 1] for k, v in flat.items()} for i in range(n_chain * n_draw)]
    return params, n_chain, n_draw


def push_forward(family: Any, posterior: xr.Dataset, spec: PushForwardSpec,
                 scenarios: Sequence[Scenario] = (BASELINE,), *, workers: int | None = None,
                 progress: bool = False) -> xr.Dataset:
    """Derived quantities for every posterior draw and scenario.

    Args:
        family: a rate family with ``numpy_rates(draws, sizes)`` and ``parameters``.
        posterior: the posterior group (dims chain, draw, ...); with partial pooling it
            holds ``site_offset`` (dims chain, draw, site) and each site gets its own rates.
        spec: what to compute (cap, sites and their last counts, horizons, thresholds).
        scenarios: baseline first, then the scenarios; all use the same draws.
        workers: processes to use (default: the machine's cores, at most 2 per 1000 draws).
        progress: show a progress bar.

    Returns:
        xarray Dataset (see the module docstring for variables and dims).

    Raises:
        InputError: a pooled posterior without an offset for one of ``spec.sites``
            (from :func:`infer.model.site_draws`).
    """
    names = list(getattr(family, "parameters", [])) + [s.name for s in getattr(family, "free_parameters", [])]
    names += [n for n in _ENVIRONMENT_VARS if n in posterior]
    params, n_chain, n_draw = _draw_params(posterior, list(dict.fromkeys(names)) or list(posterior.data_vars))
    if "site_offset" in posterior:
        # draws.site_draws is the one place that applies site offsets (imported here only:
        # it loads the model and PyTensor, which a push-forward without pooling does not need)
        from tallyfit.infer.draws import site_draws

        by_site = [site_draws(posterior, family, site, pooled=True) for site in spec.sites]
        for i, p in enumerate(params):
            p[_SITE_PARAMS] = [{k: v[i:i + 1] for k, v in sd.items()} for sd in by_site]
    n_total = len(params)
    if workers is None:
        workers = max(1, min(os.cpu_count() or 1, math.ceil(n_total / 500)))
    chunk = max(1, math.ceil(n_total / (4 * workers)))
    jobs = [(family, params[i:i + chunk], sc, spec) for sc in scenarios for i in range(0, n_total, chunk)]
    bar = None
    if progress:
        from tqdm.auto import tqdm
        bar = tqdm(total=len(jobs), desc="push-forward", unit="chunk")
    results: list[list[dict[str, Any]]] = []
    if workers == 1:
        for job in jobs:
            results.append(_work(job))
            if bar:
                bar.update()
    else:
        with ProcessPoolExecutor(max_workers=workers) as pool:
            for res in pool.map(_work, jobs):
                results.append(res)
                if bar:
                    bar.update()
    if bar:
        bar.close()
    flat = [r for chunk_res in results for r in chunk_res]
    n_sc = len(scenarios)

    def gather(key: str) -> np.ndarray:
        arr = np.stack([np.asarray(r[key]) for r in flat])
        return arr.reshape((n_sc, n_chain, n_draw) + arr.shape[1:])

    sizes = np.arange(spec.cap + 1)
    birth, death = gather("birth"), gather("death")
    with np.errstate(divide="ignore", invalid="ignore"):
        per_birth = np.where(sizes > 0, (birth - birth[..., :1]) / sizes, np.nan)
        per_death = np.where(sizes > 0, death / sizes, np.nan)
    prob = gather("extinction_probability")  # (sc, chain, draw, site, threshold, horizon)
    coords = {"scenario": [s.name for s in scenarios], "chain": posterior["chain"].values,
              "draw": posterior["draw"].values, "size": sizes, "site": list(spec.sites),
              "threshold": list(spec.thresholds), "horizon": list(spec.horizons)}
    dims_s = ("scenario", "chain", "draw")
    ds = xr.Dataset(
        {
            "birth_per_capita": (dims_s + ("size",), per_birth),
            "death_per_capita": (dims_s + ("size",), per_death),
            "immigration": (dims_s, birth[..., 0]),
            "stationary_exists": (dims_s, gather("stationary_exists").astype(bool)),
            "stationary_pmf": (dims_s + ("size",), gather("stationary_pmf")),
            "stationary_mass_above_cap": (dims_s, gather("stationary_mass_above_cap")),
            "quasi_pmf": (dims_s + ("size",), gather("quasi_pmf")),
            "quasi_decay_rate": (dims_s, gather("quasi_decay_rate")),
            "quasi_mean": (dims_s, gather("quasi_mean")),
            "log10_mean_time_to_extinction": (dims_s + ("site",), gather("log10_mean_time")),
            "extinction_probability": (dims_s + ("site", "threshold", "horizon"), prob),
            "extinction_error_bound": (dims_s + ("site", "threshold", "horizon"), gather("extinction_error_bound")),
            # given the parameters the sites are independent: all are extinct only if each is
            "extinction_probability_all_sites": (dims_s + ("threshold", "horizon"), prob.prod(axis=3)),
        },
        coords=coords,
    )
    pmf = ds["stationary_pmf"]
    ds["stationary_mean"] = (pmf * ds["size"]).sum("size", skipna=False)
    hz = criterion_e_horizons(spec.generation_time)
    ext = ds["extinction_probability_all_sites"].sel(threshold=0 if 0 in spec.thresholds else spec.thresholds[0])
    p = {k: ext.interp(horizon=v).values if v not in spec.horizons else ext.sel(horizon=v).values
         for k, v in hz.items()}
    ds["iucn_category"] = (dims_s, criterion_e_category(p["CR"], p["EN"], p["VU"]))
    if spec.forecast_steps:
        ds = ds.assign(_forecast(family, params, scenarios, spec)).assign_coords(
            step=np.arange(1, spec.forecast_steps + 1))
    return ds


#: Draws the forecast averages over at most (evenly spread): a mixture's quantiles settle
#: long before this; an annual matrix (good and bad years) costs far more than a row.
FORECAST_DRAWS, FORECAST_DRAWS_ANNUAL = 1000, 200


def _forecast(family: Any, params: Sequence[Mapping[str, Any]], scenarios: Sequence[Scenario],
              spec: PushForwardSpec) -> dict[str, tuple[tuple[str, ...], np.ndarray]]:
    """The next censuses' predictive distribution per scenario and site: each draw's rows of
    P(k·Δ) from the site's last count (the annual chain's with good and bad years), averaged."""
    from tallyfit.chain.environment import EnvironmentalChain

    n = len(params)
    idx = np.unique(np.round(np.linspace(0, n - 1, min(n, FORECAST_DRAWS_ANNUAL if spec.varying else FORECAST_DRAWS)))
                    .astype(int))
    sizes = np.arange(spec.cap + 1)
    starts = np.asarray(spec.starts, dtype=np.int64)
    out = np.zeros((len(scenarios), starts.size, spec.forecast_steps, spec.cap + 1))
    used = np.zeros((len(scenarios), starts.size))
    for i, scenario in enumerate(scenarios):
        for j in idx:
            shared = {k: v for k, v in params[j].items() if k != _SITE_PARAMS}
            sigma, transform = _conditions(shared, scenario, spec)
            own = params[j].get(_SITE_PARAMS)
            parts = [(own[s], [s]) for s in range(starts.size)] if own is not None else [(shared, list(range(starts.size)))]
            for p, which in parts:
                b, d = family.numpy_rates(p, sizes)
                b, d = transform(b[0], d[0], sizes)
                try:
                    annual = EnvironmentalChain(b, d, sigma, affects=spec.affects) if sigma > 0 else None
                    out[i, which] += forecast_rows(b, d, starts[which], spec.forecast_steps, spec.forecast_interval,
                                                   annual)
                except ChainError:  # rates a solver refuses: this draw is left out of the average
                    continue
                used[i, which] += 1
    with np.errstate(invalid="ignore", divide="ignore"):
        out /= used[:, :, None, None]
    times = np.asarray(spec.forecast_from, dtype=float)[:, None] + spec.forecast_interval * np.arange(
        1, spec.forecast_steps + 1)
    return {"forecast_pmf": (("scenario", "site", "step", "size"), out), "forecast_time": (("site", "step"), times)}


def _forecast_summary(d: xr.Dataset) -> dict[str, list[dict[str, float | None]]]:
    """{site: one entry per future census (time, mean, q05, q25, q50, q75, q95)} of one scenario
    (None where no draw could be forecast)."""
    pmf = d["forecast_pmf"].transpose("site", "step", "size").values
    mean = (pmf * d["size"].values).sum(axis=-1)
    out = {}
    for a, site in enumerate(d["site"].values):
        rows = []
        for k in range(pmf.shape[1]):
            ok = bool(np.isfinite(pmf[a, k]).all())
            qs = pmf_quantiles(pmf[a, k]) if ok else [None] * len(FORECAST_QUANTILES)
            rows.append({"time": float(d["forecast_time"].values[a, k]), "mean": float(mean[a, k]) if ok else None,
                         **{f"q{round(100 * q):02d}": (None if v is None else int(v))
                            for q, v in zip(FORECAST_QUANTILES, qs)}})
        out[str(site)] = rows
    return out


def summarise(ds: xr.Dataset, *, level: float = 0.9) -> dict[str, Any]:
    """Posterior summaries (mean, equal-tailed interval) of the derived scalars, per scenario.

    Args:
        ds: the push-forward Dataset.
        level: credible level of the equal-tailed interval.

    Returns:
        nested dict {scenario: {quantity: {...}}} ready for summary.json.
    """
    lo_q, hi_q = (1 - level) / 2, 1 - (1 - level) / 2

    def stats(da: xr.DataArray) -> dict[str, float]:
        v = np.asarray(da.values, dtype=float).ravel()
        v = v[np.isfinite(v)]
        if v.size == 0:
            return {"mean": None, "q_lo": None, "q50": None, "q_hi": None, "n": 0}
        return {"mean": float(v.mean()), "q_lo": float(np.quantile(v, lo_q)), "q50": float(np.median(v)),
                "q_hi": float(np.quantile(v, hi_q)), "n": int(v.size)}

    out: dict[str, Any] = {"credible_level": level}
    for sc in ds["scenario"].values:
        d = ds.sel(scenario=sc)
        entry: dict[str, Any] = {
            "stationary_exists_probability": float(d["stationary_exists"].mean()),
            "stationary_mean": stats(d["stationary_mean"].where(d["stationary_exists"])),
            "quasi_stationary_mean": stats(d["quasi_mean"]),
            "quasi_decay_rate": stats(d["quasi_decay_rate"]),
            "log10_mean_time_to_extinction": {str(s): stats(d["log10_mean_time_to_extinction"].sel(site=s))
                                              for s in d["site"].values},
            "extinction_probability_all_sites": {
                f"threshold={int(k)}": {f"{float(h):g}": stats(d["extinction_probability_all_sites"].sel(threshold=k, horizon=h))
                                        for h in d["horizon"].values}
                for k in d["threshold"].values},
            "iucn_category_probability": {c: float((d["iucn_category"] == i).mean()) for i, c in enumerate(CATEGORIES)},
            "max_extinction_error_bound": float(d["extinction_error_bound"].max()),
            "max_stationary_mass_above_cap": float(d["stationary_mass_above_cap"].max(skipna=True))
            if bool(d["stationary_exists"].any()) else None,
        }
        if "forecast_pmf" in d:
            entry["forecast"] = _forecast_summary(d)
        out[str(sc)] = entry
    return out
