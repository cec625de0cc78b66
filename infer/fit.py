"""Fitting: NUTS sampling, convergence diagnostics, the cap check and PSIS-LOO comparison.

:func:`fit_counts` builds the model (:func:`infer.model.build_count_model`), samples it
with PyMC's NUTS, and assembles an ArviZ InferenceData with the groups DESIGN §3 asks
for: ``posterior``, ``sample_stats``, ``log_likelihood`` (one term per transition, for
PSIS-LOO), ``posterior_predictive`` (simulated count series), ``observed_data`` and
``prior``. It then judges the run:

* Diagnostics (ArviZ's implementations, never our own): rank-normalised split R-hat
  below 1.01 and bulk and tail effective sample sizes above 400 for every summarised
  parameter (Vehtari, Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis
  16(2):667–718); no divergent transitions after warm-up (common practice: any
  divergence means the sampler may have missed part of the posterior); E-BFMI above
  0.3 in every chain (common practice). ``passed`` is True only if all hold.
* The cap check: the share of simulated sizes in the top tenth of 0..N, and how
  much the log-likelihood of posterior draws moves when the cap is doubled (the
  family's formula continued). Either being non-negligible gives a warning and the
  fix (raise --max-size).

:func:`compare_families` ranks fits of the same data by PSIS-LOO (Vehtari, Gelman &
Gabry 2017, Stat. Comput. 27:1413–1432) with ArviZ, flagging Pareto k above 0.7.
"""
from __future__ import annotations

import json
import math
import os
import tempfile
import time
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.infer.data import CountData, load_counts
from tallyfit.infer.errors import InputError
from tallyfit.infer.families import RateFamily, get_family
from tallyfit.infer.model import (CountModel, build_count_model, draw_log_likelihood,
                         pointwise_log_likelihood, site_draws)

__all__ = [
    "THRESHOLDS",
    "CapWarning",
    "ConvergenceWarning",
    "FitResult",
    "fit_counts",
    "sample_model",
    "diagnose",
    "parameter_table",
    "simulate_posterior_counts",
    "check_cap",
    "compare_families",
    "save_posterior",
]

#: Pass/fail thresholds of the diagnostics, with their sources.
THRESHOLDS: dict[str, dict[str, Any]] = {
    "r_hat": {"max": 1.01, "rule": "rank-normalised split R-hat < 1.01",
              "source": "Vehtari et al. (2021), Bayesian Analysis 16(2):667-718"},
    "ess_bulk": {"min": 400.0, "rule": "bulk effective sample size > 400",
                 "source": "Vehtari et al. (2021), Bayesian Analysis 16(2):667-718"},
    "ess_tail": {"min": 400.0, "rule": "tail effective sample size > 400",
                 "source": "Vehtari et al. (2021), Bayesian Analysis 16(2):667-718"},
    "divergences": {"max": 0, "rule": "no divergent transitions after warm-up",
                    "source": "common practice"},
    "bfmi": {"min": 0.3, "rule": "E-BFMI > 0.3 in every chain", "source": "common practice"},
}
#: Cap check: share of simulated sizes allowed in the top tenth of 0..N.
NEAR_CAP_SHARE = 0.01
#: Cap check: largest tolerated change of a draw's log-likelihood when the cap is doubled.
CAP_LOGLIK_SHIFT = 0.01
#: Posterior draws whose log-likelihood is re-evaluated at twice the cap.
CAP_CHECK_DRAWS = 20


class CapWarning(UserWarning):
    """The size cap may be too low for the fitted rates."""


class ConvergenceWarning(UserWarning):
    """A diagnostic threshold failed: the posterior may not be trustworthy."""


# --------------------------------------------------------------------------- result
@dataclass
class FitResult:
    """A fitted model: the draws, what they were fitted with, and how far to trust them.

    Attributes:
        idata: az.InferenceData with posterior, sample_stats, log_likelihood,
            posterior_predictive, observed_data and prior.
        family: the fitted rate family (adapted to the data: per-size knots placed).
        cap: the size cap N.
        detection: None (exact counts), the fixed p, or "estimate".
        settings: every resolved setting (family and options, chains, draws, tune,
            seed, cap and how it was chosen, detection, priors, pooling, cores, ...).
        diagnostics: per parameter r_hat, ess_bulk, ess_tail (value, threshold,
            passed), divergences, bfmi, and ``passed`` (all thresholds hold).
        parameters: DataFrame, one row per parameter (vector entries as name[coord]):
            mean, sd, q05, q50, q95, mcse_mean, r_hat, ess_bulk, ess_tail.
        cap_check: see :func:`check_cap`.
        messages: warnings and notes for the user (model, diagnostics, cap).
        model: the CountModel (not saved with the posterior).
        timing: wall-clock seconds of the stages (sampling, pointwise, predictive, ...).
    """

    idata: Any
    family: RateFamily
    cap: int
    detection: float | str | None
    settings: dict[str, Any]
    diagnostics: dict[str, Any]
    parameters: pd.DataFrame
    cap_check: dict[str, Any]
    messages: list[str] = field(default_factory=list)
    model: CountModel | None = None
    timing: dict[str, float] = field(default_factory=dict)

    @property
    def passed(self) -> bool:
        """True when every diagnostic threshold holds."""
        return bool(self.diagnostics.get("passed", False))

    def rate_draws(self, site: str | None = None) -> dict[str, np.ndarray]:
        """Posterior draws that ``family.numpy_rates`` reads, flattened over (chain, draw).

        Args:
            site: with partial pooling, the site whose rates are wanted.

        Returns:
            {name: (n_draws,) or (n_draws, length) array}.

        Raises:
            InputError: a pooled fit without a site, or an unknown site.
        """
        return site_draws(self.idata.posterior, self.family, site,
                          pooled=bool(self.settings.get("pooling")))

    def rates(self, sizes: np.ndarray, site: str | None = None) -> tuple[np.ndarray, np.ndarray]:
        """Birth and death rates of every posterior draw at ``sizes`` (any sizes, past the cap too).

        Args:
            sizes: 1-D sizes ≥ 0.
            site: with partial pooling, the site.

        Returns:
            (birth, death), each (n_draws, len(sizes)).
        """
        return self.family.numpy_rates(self.rate_draws(site), np.asarray(sizes))

    def summary(self) -> dict[str, Any]:
        """JSON-ready summary: parameters, diagnostics (with ``passed``), cap check, messages.

        Returns:
            dict with keys parameters ({name: {mean, sd, q05, q50, q95, r_hat, ess_bulk,
            ess_tail}}), diagnostics, cap_check, messages, settings.
        """
        params = {}
        for name, row in self.parameters.iterrows():
            params[str(name)] = {k: _json_number(row[k]) for k in
                                 ("mean", "sd", "q05", "q50", "q95", "r_hat", "ess_bulk",
                                  "ess_tail")}
        return {"parameters": params, "diagnostics": _jsonable(self.diagnostics),
                "cap_check": _jsonable(self.cap_check), "messages": list(self.messages),
                "settings": _jsonable(self.settings)}


def _json_number(x: Any) -> float | None:
    x = float(x)
    return x if math.isfinite(x) else None


def _jsonable(obj: Any) -> Any:
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        return _json_number(obj)
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    return obj


# --------------------------------------------------------------------------- sampling
def _seed_streams(seed: int) -> tuple[int, int, np.random.Generator]:
    ss = np.random.SeedSequence(seed)
    a, b, c = ss.spawn(3)
    return (int(a.generate_state(1)[0]), int(b.generate_state(1)[0]),
            np.random.default_rng(c))


def sample_model(cm: CountModel, *, chains: int = 4, draws: int = 1000, tune: int = 1000,
                 seed: int = 0, progressbar: bool = True, cores: int | None = None,
                 target_accept: float = 0.95, init: str = "jitter+adapt_full"):
    """Run NUTS on a built model.

    A dense mass matrix is adapted during warm-up ("jitter+adapt_full"): the rate
    parameters of a birth–death model are strongly correlated (net growth is far
    better determined than turnover), and a dense metric cuts the number of gradient
    evaluations — each one a full likelihood-and-gradient sweep — per draw. The target
    acceptance rate is 0.95 rather than PyMC's 0.8: the posteriors have curved ridges
    (immigration traded against carrying capacity, a weakly identified death rate near
    zero), and at 0.8–0.9 the demo fits still showed a few divergent transitions. A
    dense metric cannot straighten a curved ridge; a family's sampling coordinates
    (:class:`infer.families.SamplingCoordinates`) can, and the logistic family has them.

    Args:
        cm: the built model.
        chains, draws, tune: NUTS chains, kept draws per chain, warm-up draws per chain.
        seed: integer seed (the run is reproducible given the seed and the data).
        progressbar: show PyMC's progress bar.
        cores: processes (default PyMC's choice: min(chains, CPUs)).
        target_accept: NUTS target acceptance rate.
        init: PyMC initialisation method.

    Returns:
        az.InferenceData with posterior and sample_stats; sample_stats.attrs holds
        ``warmup_n_steps`` (gradient evaluations spent in warm-up) and
        ``warmup_divergences`` (the warm-up draws themselves are dropped).
    """
    import pymc as pm

    with cm.model, warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=".*BLAS.*")
        idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                          random_seed=seed, progressbar=progressbar, init=init,
                          target_accept=target_accept, compute_convergence_checks=False,
                          return_inferencedata=True, idata_kwargs={"log_likelihood": False},
                          discard_tuned_samples=False)
    # keep only the warm-up's cost (gradient evaluations, divergences), not its draws
    warm = idata.get("warmup_sample_stats") if "warmup_sample_stats" in idata.groups() else None
    idata.sample_stats.attrs["warmup_n_steps"] = (
        int(warm["n_steps"].sum()) if warm is not None and "n_steps" in warm else 0)
    idata.sample_stats.attrs["warmup_divergences"] = (
        int(warm["diverging"].sum()) if warm is not None and "diverging" in warm else 0)
    for group in ("warmup_posterior", "warmup_sample_stats"):
        if group in idata.groups():
            delattr(idata, group)
    return idata


def _sample_prior(cm: CountModel, n: int, seed: int) -> xr.Dataset:
    """The ``prior`` group: independent draws of every summarised parameter from its prior.

    Drawn directly (the family's :meth:`~infer.families.RateFamily.draw_prior`, which
    respects the family's support, plus detection and the site offsets), not by
    forward-sampling the PyMC model: a model sampled in other coordinates holds the
    prior as a density, which cannot be forward-sampled.
    """
    from tallyfit.infer.families import scipy_prior

    rng = np.random.default_rng(seed)
    draws = cm.family.draw_prior(cm.priors, n, rng)
    if "detection" in cm.priors:
        draws["detection"] = scipy_prior(cm.priors["detection"]).rvs(size=n, random_state=rng)
    if cm.pooling:
        scale = scipy_prior(cm.priors["site_scale"]).rvs(size=n, random_state=rng)
        draws["site_scale"] = scale
        draws["site_offset"] = scale[:, None] * rng.standard_normal((n, cm.data.n_sites))
        name = cm.family.pooled_parameter
        if name in draws and np.ndim(draws[name]) == 1:
            draws[f"site_{name}"] = draws[name][:, None] * np.exp(draws["site_offset"])
    dims = cm.model.named_vars_to_dims
    out = {}
    for name, v in draws.items():
        out[name] = (("chain", "draw") + tuple(dims.get(name) or ()),
                     np.asarray(v, dtype=float)[None])
    coords = {k: list(v) for k, v in cm.model.coords.items()
              if any(k in spec[0] for spec in out.values())}
    return xr.Dataset(out, coords={"chain": [0], "draw": np.arange(n), **coords})


# --------------------------------------------------------------------------- predictive
def _count_cells(data: CountData) -> pd.DataFrame:
    rows = []
    for si, s in enumerate(data.series):
        for i in range(s.n_times):
            for j in range(s.counts.shape[1]):
                c = s.counts[i, j]
                if not np.isnan(c):
                    rows.append((si, s.site, float(s.times[i]), i, j + 1, int(c)))
    return pd.DataFrame(rows, columns=["site_index", "site", "time", "time_index", "replicate",
                                       "count"])


def _occasions(data: CountData) -> pd.DataFrame:
    rows = []
    for si, s in enumerate(data.series):
        for i in np.flatnonzero(~np.all(np.isnan(s.counts), axis=1)):
            rows.append((si, s.site, float(s.times[i]), int(i)))
    return pd.DataFrame(rows, columns=["site_index", "site", "time", "time_index"])


def observed_data_group(data: CountData) -> xr.Dataset:
    """The observed counts as an xarray Dataset (dim ``count_cell``: one per non-blank count).

    Args:
        data: count data.

    Returns:
        Dataset with variable ``counts`` and coords site, time, replicate per cell.
    """
    cells = _count_cells(data)
    return xr.Dataset(
        {"counts": ("count_cell", cells["count"].to_numpy(dtype=np.int64))},
        coords={"count_cell": np.arange(len(cells)),
                "cell_site": ("count_cell", cells["site"].astype(str).to_numpy()),
                "cell_time": ("count_cell", cells["time"].to_numpy()),
                "cell_replicate": ("count_cell", cells["replicate"].to_numpy())})


def _sample_rows(rows: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    rows = np.clip(rows, 0.0, None)
    cdf = np.cumsum(rows, axis=1)
    cdf /= cdf[:, -1:]
    u = rng.random(rows.shape[0])
    return np.minimum((cdf < u[:, None]).sum(axis=1), rows.shape[1] - 1)


def _first_sizes(first_counts: list[np.ndarray], p: float | None, cap: int,
                 rng: np.random.Generator) -> np.ndarray:
    """Start sizes: the first count (exact), or a draw from P(n | first counts, p), flat prior."""
    from scipy.stats import binom

    out = np.empty(len(first_counts), dtype=np.int64)
    for k, y in enumerate(first_counts):
        if p is None:
            out[k] = int(y.max())
            continue
        n = np.arange(int(y.max()), cap + 1)
        logw = np.sum(binom.logpmf(y[:, None], n[None, :], p), axis=0)
        w = np.exp(logw - logw.max())
        out[k] = n[_sample_rows(w[None, :], rng)[0]]
    return out


def simulate_posterior_counts(cm: CountModel, posterior: xr.Dataset, n_draws: int,
                              rng: np.random.Generator) -> xr.Dataset:
    """Simulated count series for a thinned set of posterior draws (posterior predictive).

    For each selected draw and site the chain (BirthDeathChain of that draw's rates on
    0..N) starts at the site's first count — with a detection model, at a size drawn
    from its posterior given the first occasion's counts and p under a flat prior — and
    moves from survey to survey by sampling the exact transition row P(Δt) of the
    chain (chain.BirthDeathChain.transition, uniformization on 0..N): the same law as
    event-by-event simulation, at a cost independent of the number of events. Each
    replicate count is then the size (exact counts) or Binomial(size, p).

    Args:
        cm: the built model.
        posterior: the posterior group.
        n_draws: about how many draws to use (spread evenly over each chain).
        rng: numpy Generator.

    Returns:
        Dataset with ``counts`` (chain, draw, count_cell) and ``size``
        (chain, draw, occasion); draw coords are the selected draw numbers.
    """
    from tallyfit.chain import BirthDeathChain

    n_chain = posterior.sizes["chain"]
    n_draw = posterior.sizes["draw"]
    per_chain = max(1, min(n_draw, int(math.ceil(n_draws / n_chain))))
    sel = np.unique(np.round(np.linspace(0, n_draw - 1, per_chain)).astype(int))
    flat = (np.arange(n_chain)[:, None] * n_draw + sel[None, :]).reshape(-1)
    data = cm.data
    cells = _count_cells(data)
    occ = _occasions(data)
    sizes_out = np.zeros((flat.size, len(occ)), dtype=np.int64)
    counts_out = np.zeros((flat.size, len(cells)), dtype=np.int64)
    if cm.detection == "estimate":
        p_all = posterior["detection"].stack(sample=("chain", "draw")).values[flat]
    else:
        p_all = np.full(flat.size, np.nan if cm.detection is None else float(cm.detection))
    # sites that share survey times are stepped together (one transition call per interval)
    surveyed = [s.times[~np.all(np.isnan(s.counts), axis=1)] for s in data.series]
    first_counts = []
    for s in data.series:
        keep = np.flatnonzero(~np.all(np.isnan(s.counts), axis=1))
        r = s.counts[keep[0]]
        first_counts.append(r[~np.isnan(r)])
    if cm.pooling:
        groups = [[i] for i in range(len(data.series))]
    else:
        groups_d: dict[bytes, list[int]] = {}
        for i, t in enumerate(surveyed):
            groups_d.setdefault(np.asarray(t).tobytes(), []).append(i)
        groups = list(groups_d.values())
    occ_index = {(int(a), int(b)): k for k, (a, b) in
                 enumerate(zip(occ["site_index"], occ["time_index"]))}
    occ_time_index = [np.flatnonzero(~np.all(np.isnan(s.counts), axis=1)) for s in data.series]
    rates_by_site: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    if cm.pooling:
        for i, s in enumerate(data.series):
            d = site_draws(posterior, cm.family, s.site, pooled=True)
            rates_by_site[i] = cm.family.numpy_rates({k: v[flat] for k, v in d.items()},
                                                     cm.sizes)
    else:
        d = site_draws(posterior, cm.family)
        shared = cm.family.numpy_rates({k: v[flat] for k, v in d.items()}, cm.sizes)
    for k in range(flat.size):
        p = None if cm.detection is None else float(p_all[k])
        chains: dict[int, Any] = {}
        for group in groups:
            b, dd = rates_by_site[group[0]] if cm.pooling else shared
            key = group[0] if cm.pooling else -1
            if key not in chains:
                chains[key] = BirthDeathChain(b[k], dd[k])
            ch = chains[key]
            t = surveyed[group[0]]
            state = _first_sizes([first_counts[i] for i in group], p, cm.cap, rng)
            path = np.empty((len(group), t.size), dtype=np.int64)
            path[:, 0] = state
            for i in range(1, t.size):
                rows = ch.transition(float(t[i] - t[i - 1]), starts=state)
                state = _sample_rows(rows, rng)
                path[:, i] = state
            for g, si in enumerate(group):
                for i, ti in enumerate(occ_time_index[si]):
                    sizes_out[k, occ_index[(si, int(ti))]] = path[g, i]
    cell_occ = np.array([occ_index[(int(a), int(b))] for a, b in
                         zip(cells["site_index"], cells["time_index"])], dtype=np.int64)
    true = sizes_out[:, cell_occ]
    if cm.detection is None:
        counts_out[:] = true
    else:
        counts_out[:] = rng.binomial(true, p_all[:, None])
    shape = (n_chain, sel.size)
    return xr.Dataset(
        {"counts": (("chain", "draw", "count_cell"), counts_out.reshape(shape + (len(cells),))),
         "size": (("chain", "draw", "occasion"), sizes_out.reshape(shape + (len(occ),)))},
        coords={"chain": posterior.coords["chain"].values,
                "draw": posterior.coords["draw"].values[sel],
                "count_cell": np.arange(len(cells)),
                "cell_site": ("count_cell", cells["site"].astype(str).to_numpy()),
                "cell_time": ("count_cell", cells["time"].to_numpy()),
                "cell_replicate": ("count_cell", cells["replicate"].to_numpy()),
                "occasion": np.arange(len(occ)),
                "occasion_site": ("occasion", occ["site"].astype(str).to_numpy()),
                "occasion_time": ("occasion", occ["time"].to_numpy())})


# --------------------------------------------------------------------------- checks
def check_cap(cm: CountModel, posterior: xr.Dataset, predictive: xr.Dataset,
              *, n_draws: int = CAP_CHECK_DRAWS) -> dict[str, Any]:
    """Is the size cap N high enough for the fitted rates?

    Two measures: (1) of the simulated sizes in the posterior predictive, the share in
    the top tenth of 0..N (sizes ≥ 0.9·N) — not negligible when above NEAR_CAP_SHARE
    (1%); (2) for up to ``n_draws`` posterior draws, the largest change of the
    log-likelihood when it is recomputed with the cap doubled (the family's formula
    continued past N) — not negligible when above CAP_LOGLIK_SHIFT (0.01).

    Args:
        cm: the built model.
        posterior: the posterior group.
        predictive: the posterior predictive group (with ``size``).
        n_draws: draws re-evaluated at twice the cap.

    Returns:
        dict: cap, max_simulated_size, near_cap_from, share_near_cap, share_threshold,
        loglik_shift, loglik_shift_threshold, ok, message (the fix when not ok).
    """
    N = cm.cap
    sizes = np.asarray(predictive["size"].values)
    near_from = int(math.floor(0.9 * N))
    share = float(np.mean(sizes >= near_from)) if sizes.size else 0.0
    n_total = posterior.sizes["chain"] * posterior.sizes["draw"]
    idx = np.unique(np.round(np.linspace(0, n_total - 1, min(n_draws, n_total))).astype(int))
    ll_n = draw_log_likelihood(cm, posterior, idx)
    ll_2n = draw_log_likelihood(cm, posterior, idx, cap=2 * N)
    both = np.isfinite(ll_n) & np.isfinite(ll_2n)
    shift = float(np.max(np.abs(ll_2n[both] - ll_n[both]))) if both.any() else float("nan")
    if np.any(np.isfinite(ll_n) != np.isfinite(ll_2n)):
        shift = float("inf")
    ok = share <= NEAR_CAP_SHARE and (shift <= CAP_LOGLIK_SHIFT)
    suggestion = int(math.ceil(max(2 * N, sizes.max() * 1.5 if sizes.size else 0)))
    if ok:
        message = (f"cap N = {N} is adequate: {share:.2%} of simulated sizes reach {near_from} "
                   f"or more, and doubling the cap moves the log-likelihood by at most "
                   f"{shift:.2g}")
    else:
        message = (f"the size cap N = {N} may be too low: {share:.2%} of simulated sizes "
                   f"reach {near_from} or more (threshold {NEAR_CAP_SHARE:.1%}), and doubling "
                   f"the cap moves the log-likelihood by up to {shift:.3g} (threshold "
                   f"{CAP_LOGLIK_SHIFT}); raise --max-size (e.g. to {suggestion}) and refit")
    return {"cap": N, "max_simulated_size": int(sizes.max()) if sizes.size else None,
            "near_cap_from": near_from, "share_near_cap": share,
            "share_threshold": NEAR_CAP_SHARE, "loglik_shift": shift,
            "loglik_shift_threshold": CAP_LOGLIK_SHIFT, "draws_checked": int(idx.size),
            "ok": bool(ok), "message": message}


def _labels(ds: xr.Dataset, names: Sequence[str]) -> list[tuple[str, str, dict[str, Any]]]:
    """(label, variable, selection) for every scalar entry of the named variables."""
    out = []
    for name in names:
        if name not in ds:
            continue
        da = ds[name]
        extra = [d for d in da.dims if d not in ("chain", "draw")]
        if not extra:
            out.append((name, name, {}))
            continue
        grids = np.meshgrid(*[da.coords[d].values if d in da.coords else np.arange(da.sizes[d])
                              for d in extra], indexing="ij")
        for combo in zip(*[g.reshape(-1) for g in grids]):
            sel = dict(zip(extra, combo))
            label = f"{name}[{', '.join(_fmt(v) for v in combo)}]"
            out.append((label, name, sel))
    return out


def _fmt(v: Any) -> str:
    if isinstance(v, (float, np.floating)):
        return f"{float(v):g}"
    return str(v)


def diagnose(idata: Any, var_names: Sequence[str]) -> dict[str, Any]:
    """Convergence diagnostics with pass/fail (see THRESHOLDS), computed by ArviZ.

    Args:
        idata: InferenceData with posterior and sample_stats.
        var_names: posterior variables to judge (vector entries judged one by one).

    Returns:
        dict with ``parameters`` ({label: {r_hat, ess_bulk, ess_tail: {value,
        threshold, passed}, passed}}), ``divergences`` ({value, threshold, passed,
        rule}), ``bfmi`` ({value: per chain, min, threshold, passed}), ``thresholds``,
        ``failed`` (list of what failed) and ``passed``.
    """
    import arviz as az

    names = [n for n in var_names if n in idata.posterior]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        rhat = az.rhat(idata, var_names=names, method="rank")
        ess_b = az.ess(idata, var_names=names, method="bulk")
        ess_t = az.ess(idata, var_names=names, method="tail")
    params: dict[str, Any] = {}
    failed: list[str] = []
    for label, name, sel in _labels(idata.posterior, names):
        r = float(rhat[name].sel(sel).values)
        eb = float(ess_b[name].sel(sel).values)
        et = float(ess_t[name].sel(sel).values)
        entry = {
            "r_hat": {"value": r, "threshold": THRESHOLDS["r_hat"]["max"],
                      "passed": bool(np.isfinite(r) and r < THRESHOLDS["r_hat"]["max"])},
            "ess_bulk": {"value": eb, "threshold": THRESHOLDS["ess_bulk"]["min"],
                         "passed": bool(np.isfinite(eb) and eb > THRESHOLDS["ess_bulk"]["min"])},
            "ess_tail": {"value": et, "threshold": THRESHOLDS["ess_tail"]["min"],
                         "passed": bool(np.isfinite(et) and et > THRESHOLDS["ess_tail"]["min"])},
        }
        entry["passed"] = all(entry[k]["passed"] for k in ("r_hat", "ess_bulk", "ess_tail"))
        for k in ("r_hat", "ess_bulk", "ess_tail"):
            if not entry[k]["passed"]:
                failed.append(f"{k} of {label} = {entry[k]['value']:.4g}")
        params[label] = entry
    ss = idata.sample_stats
    div = int(np.asarray(ss["diverging"].values).sum()) if "diverging" in ss else 0
    div_entry = {"value": div, "threshold": THRESHOLDS["divergences"]["max"],
                 "passed": div <= THRESHOLDS["divergences"]["max"],
                 "rule": THRESHOLDS["divergences"]["rule"]}
    if not div_entry["passed"]:
        failed.append(f"{div} divergent transitions")
    bfmi = np.atleast_1d(np.asarray(az.bfmi(idata), dtype=float))
    bfmi_entry = {"value": bfmi.tolist(), "min": float(np.min(bfmi)),
                  "threshold": THRESHOLDS["bfmi"]["min"],
                  "passed": bool(np.all(bfmi > THRESHOLDS["bfmi"]["min"]))}
    if not bfmi_entry["passed"]:
        failed.append(f"E-BFMI {float(np.min(bfmi)):.3g} in some chain")
    passed = (all(e["passed"] for e in params.values()) and div_entry["passed"]
              and bfmi_entry["passed"])
    return {"parameters": params, "divergences": div_entry, "bfmi": bfmi_entry,
            "thresholds": THRESHOLDS, "failed": failed, "passed": bool(passed)}


def parameter_table(idata: Any, var_names: Sequence[str],
                    diagnostics: Mapping[str, Any] | None = None) -> pd.DataFrame:
    """Posterior summary, one row per parameter entry.

    Args:
        idata: InferenceData with a posterior.
        var_names: variables to summarise.
        diagnostics: output of :func:`diagnose` (computed when None).

    Returns:
        DataFrame indexed by label with columns mean, sd, q05, q50, q95 (equal-tailed
        90% interval and median), mcse_mean (az.mcse), r_hat, ess_bulk, ess_tail.
    """
    import arviz as az

    diagnostics = diagnose(idata, var_names) if diagnostics is None else diagnostics
    names = [n for n in var_names if n in idata.posterior]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        mcse = az.mcse(idata, var_names=names, method="mean")
    rows = []
    for label, name, sel in _labels(idata.posterior, names):
        x = np.asarray(idata.posterior[name].sel(sel).values, dtype=float).reshape(-1)
        q = np.quantile(x, [0.05, 0.5, 0.95])
        d = diagnostics["parameters"][label]
        rows.append({"parameter": label, "mean": float(x.mean()), "sd": float(x.std(ddof=1)),
                     "q05": q[0], "q50": q[1], "q95": q[2],
                     "mcse_mean": float(mcse[name].sel(sel).values),
                     "r_hat": d["r_hat"]["value"], "ess_bulk": d["ess_bulk"]["value"],
                     "ess_tail": d["ess_tail"]["value"]})
    return pd.DataFrame(rows).set_index("parameter")


# --------------------------------------------------------------------------- fit
def fit_counts(data: CountData | str | os.PathLike[str] | pd.DataFrame,
               family: str | RateFamily = "logistic", *, chains: int = 4, draws: int = 1000,
               tune: int = 1000, seed: int | None = None, cap: int | None = None,
               detection: Any = None, priors: Mapping[str, Any] | None = None,
               pooling: bool = False, progressbar: bool = True, cores: int | None = None,
               n_predictive: int = 200, n_prior: int = 500,
               target_accept: float = 0.95) -> FitResult:
    """Fit a rate family to count data by NUTS and judge the result.

    Args:
        data: CountData, or a CSV path / DataFrame for :func:`infer.data.load_counts`.
        family: registry name ("linear", "logistic", "allee", "per-size") or a
            RateFamily (e.g. ``get_family("logistic", immigration=True)``).
        chains, draws, tune: NUTS chains, draws kept per chain, warm-up per chain.
        seed: integer seed; None draws one (recorded in ``settings["seed"]``).
        cap: size cap N (default :func:`infer.model.default_cap`).
        detection: None/1.0 (exact counts), a probability in (0, 1), or "estimate".
        priors: {parameter: prior spec} overrides (a TOML [priors] table).
        pooling: partial pooling of site-level growth.
        progressbar: show progress bars.
        cores: sampling processes (default min(chains, CPUs)).
        n_predictive: about how many posterior draws get simulated count series.
        n_prior: prior draws kept in the ``prior`` group.
        target_accept: NUTS target acceptance rate (see :func:`sample_model`).

    Returns:
        FitResult.

    Raises:
        InputError: bad data, family, settings or priors (before any sampling).
    """
    for name, value, least in (("chains", chains, 1), ("draws", draws, 1), ("tune", tune, 0),
                               ("n_predictive", n_predictive, 1), ("n_prior", n_prior, 1)):
        if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < least:
            raise InputError(f"{name} must be a whole number >= {least}, got {value!r}",
                             source=f"--{name}")
    if seed is None:
        seed = int(np.random.SeedSequence().generate_state(1)[0])
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed must be a whole number >= 0, got {seed!r}", source="--seed")
    seed = int(seed)
    if not isinstance(data, CountData):
        data = load_counts(data)
    fam = get_family(family)
    timing: dict[str, float] = {}
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cm = build_count_model(data, fam, cap=cap, detection=detection, priors=priors,
                               pooling=pooling)
    for w in caught:
        if not issubclass(w.category, (DeprecationWarning, PendingDeprecationWarning)):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    messages = list(cm.messages)
    timing["build"] = time.perf_counter() - t0
    sample_seed, prior_seed, rng = _seed_streams(seed)
    # prior draws before sampling: priors that barely meet the family's support stop here
    t0 = time.perf_counter()
    prior = _sample_prior(cm, n_prior, prior_seed)
    timing["prior"] = time.perf_counter() - t0

    import arviz as az

    t0 = time.perf_counter()
    idata = sample_model(cm, chains=chains, draws=draws, tune=tune, seed=sample_seed,
                         progressbar=progressbar, cores=cores, target_accept=target_accept)
    timing["sampling"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    loglik = pointwise_log_likelihood(cm, idata.posterior, progressbar=progressbar)
    idata.add_groups(log_likelihood=xr.Dataset({"counts": loglik}))
    timing["pointwise"] = time.perf_counter() - t0

    t0 = time.perf_counter()
    predictive = simulate_posterior_counts(cm, idata.posterior, n_predictive, rng)
    idata.add_groups(posterior_predictive=predictive, observed_data=observed_data_group(data))
    timing["predictive"] = time.perf_counter() - t0

    idata.add_groups(prior=prior)

    t0 = time.perf_counter()
    diagnostics = diagnose(idata, cm.var_names)
    table = parameter_table(idata, cm.var_names, diagnostics)
    cap_check = check_cap(cm, idata.posterior, predictive)
    timing["checks"] = time.perf_counter() - t0
    if not diagnostics["passed"]:
        msg = ("convergence diagnostics failed (" + "; ".join(diagnostics["failed"][:6])
               + (" …" if len(diagnostics["failed"]) > 6 else "")
               + "): run longer chains (--draws, and more warm-up) before trusting the results")
        warnings.warn(msg, ConvergenceWarning, stacklevel=2)
        messages.append(msg)
    if not cap_check["ok"]:
        warnings.warn(cap_check["message"], CapWarning, stacklevel=2)
        messages.append(cap_check["message"])

    settings = {
        "family": cm.family.name,
        "family_options": cm.family.options,
        "chains": int(chains), "draws": int(draws), "tune": int(tune), "seed": seed,
        "cores": cores, "cap": cm.cap,
        "cap_rule": ("given" if cap is not None else
                     "default: ceil(max(M' + 3 sqrt(M') + 15, 1.2 M')), M' = largest count / p"),
        "detection": cm.detection, "priors": cm.priors, "pooling": cm.pooling,
        "target_accept": float(target_accept), "init": "jitter+adapt_full",
        "n_predictive": int(predictive.sizes["chain"] * predictive.sizes["draw"]),
        "n_prior": int(n_prior),
        "data_scale": {"time_scale": cm.scale.time_scale, "count_scale": cm.scale.count_scale,
                       "size_lo": cm.scale.size_lo, "size_hi": cm.scale.size_hi},
        "sites": list(data.sites), "n_counts": int(data.n_counts), "source": data.source,
    }
    idata.posterior.attrs["tallyfit_settings"] = json.dumps(_jsonable(settings))
    idata.posterior.attrs["tallyfit_family"] = cm.family.describe(cm.priors)
    return FitResult(idata=idata, family=cm.family, cap=cm.cap, detection=cm.detection,
                     settings=settings, diagnostics=diagnostics, parameters=table,
                     cap_check=cap_check, messages=messages, model=cm, timing=timing)


# --------------------------------------------------------------------------- comparison
def compare_families(results: Mapping[str, FitResult] | Sequence[FitResult]) -> pd.DataFrame:
    """Rank fits of the same data by PSIS-LOO (az.compare), flagging Pareto k > 0.7.

    Args:
        results: {label: FitResult}, or a sequence (labelled by family name; repeated
            names get a suffix).

    Returns:
        az.compare's DataFrame (rank, elpd_loo, p_loo, elpd_diff, weight, se, dse,
        warning, scale) plus max_pareto_k, n_pareto_k_above_0_7 and reliable (no k
        above 0.7; Vehtari, Gelman & Gabry 2017).

    Raises:
        InputError: fewer than two fits, or fits of different observations.
    """
    import arviz as az

    if not isinstance(results, Mapping):
        named: dict[str, FitResult] = {}
        for r in results:
            label = r.family.name
            k = 2
            while label in named:
                label = f"{r.family.name}_{k}"
                k += 1
            named[label] = r
        results = named
    if len(results) < 2:
        raise InputError("compare_families needs at least two fits", source="results")
    shapes = {label: r.idata.log_likelihood["counts"].sizes["obs"] for label, r in results.items()}
    if len(set(shapes.values())) != 1:
        raise InputError(f"the fits have different numbers of observations {shapes}: "
                         "compare fits of the same data with the same detection model",
                         source="results")
    obs = [r.idata.observed_data["counts"].values for r in results.values()]
    if any(o.shape != obs[0].shape or np.any(o != obs[0]) for o in obs[1:]):
        raise InputError("the fits are of different data", source="results")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = az.compare({k: r.idata for k, r in results.items()}, ic="loo")
        ks = {}
        for label, r in results.items():
            loo = az.loo(r.idata, pointwise=True)
            ks[label] = np.asarray(loo.pareto_k.values, dtype=float)
    table["max_pareto_k"] = [float(np.max(ks[i])) for i in table.index]
    table["n_pareto_k_above_0_7"] = [int(np.sum(ks[i] > 0.7)) for i in table.index]
    table["reliable"] = table["n_pareto_k_above_0_7"] == 0
    return table


def save_posterior(result: FitResult, path: str | os.PathLike[str]) -> Path:
    """Write the InferenceData to netCDF (idata.to_netcdf), via a temporary file and a rename.

    Args:
        result: a FitResult.
        path: destination, e.g. run/posterior.nc.

    Returns:
        the path written.

    Raises:
        OSError: the folder does not exist or is not writable.
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=".posterior-", suffix=".nc.tmp", dir=path.parent)
    os.close(fd)
    try:
        result.idata.to_netcdf(tmp)
        os.replace(tmp, path)
    except BaseException:
        if os.path.exists(tmp):
            os.unlink(tmp)
        raise
    return path
