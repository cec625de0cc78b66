"""The posterior predictive: count series simulated from posterior draws, and the observed counts.

Both are laid out over the same dim of count cells (one cell per non-blank count, with its
site, time and replicate as coordinates), the layout the run folder's schema names.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.infer.counts import CountData
from tallyfit.infer.draws import flat_draws, site_draws
from tallyfit.infer.model import ENVIRONMENTS, CountModel

__all__ = ["observed_data_group", "simulate_posterior_counts"]


class _Years:
    """Each simulated interval's conditions: an environment drawn afresh and the covariates."""

    def __init__(self, cm: CountModel, posterior: xr.Dataset, flat: np.ndarray, rng: np.random.Generator) -> None:
        from tallyfit.chain import BirthDeathChain

        self.chain_type = BirthDeathChain
        env = cm.environment
        n = flat.size
        self.sigma = flat_draws(posterior, "environment_sd")[flat] if env.varying else np.zeros(n)
        self.beta_b = flat_draws(posterior, "birth_effect")[flat] if env.births else np.zeros((n, 0))
        self.beta_d = flat_draws(posterior, "death_effect")[flat] if env.deaths else np.zeros((n, 0))
        self.death_sign = -1.0 if env.varying and ENVIRONMENTS[env.varying] == "birth_and_death" else 0.0
        specs = [env.specification([s]) for s in cm.data.series]
        self.zb = [sp["birth_covariates"] if sp["birth_covariates"] is not None else np.zeros((0, 0)) for sp in specs]
        self.zd = [sp["death_covariates"] if sp["death_covariates"] is not None else np.zeros((0, 0)) for sp in specs]
        self.rng = rng

    def chain(self, birth: np.ndarray, death: np.ndarray, k: int, site: int, interval: int, dt: float):
        """The chain of one interval of one site, for draw k."""
        st = self.sigma[k] / math.sqrt(max(dt, 1.0))
        eps = st * self.rng.standard_normal()
        lb = eps - 0.5 * st ** 2 + (self.zb[site][interval] @ self.beta_b[k] if self.beta_b.shape[1] else 0.0)
        ld = (self.death_sign * eps - 0.5 * abs(self.death_sign) * st ** 2
              + (self.zd[site][interval] @ self.beta_d[k] if self.beta_d.shape[1] else 0.0))
        b = birth[0] + (birth - birth[0]) * math.exp(lb)
        return self.chain_type(b, death * math.exp(ld))

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
        for i in np.flatnonzero(s.surveyed):
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
    0..N; with good and bad years or covariates, each interval's rates scaled by a freshly
    drawn environment and the interval's covariates, as the likelihood assumes) starts at
    the site's first count — with a detection model, at a size drawn
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
    surveyed = [s.surveyed_times for s in data.series]
    first_counts = []
    for s in data.series:
        r = s.surveyed_counts[0]
        first_counts.append(r[~np.isnan(r)])
    varying = cm.environment.active
    if cm.pooling or varying:  # each site its own rates (or its own years)
        groups = [[i] for i in range(len(data.series))]
    else:
        groups_d: dict[bytes, list[int]] = {}
        for i, t in enumerate(surveyed):
            groups_d.setdefault(np.asarray(t).tobytes(), []).append(i)
        groups = list(groups_d.values())
    occ_index = {(int(a), int(b)): k for k, (a, b) in
                 enumerate(zip(occ["site_index"], occ["time_index"]))}
    occ_time_index = [np.flatnonzero(s.surveyed) for s in data.series]
    rates_by_site: dict[int, tuple[np.ndarray, np.ndarray]] = {}
    if cm.pooling:
        for i, s in enumerate(data.series):
            d = site_draws(posterior, cm.family, s.site, pooled=True)
            rates_by_site[i] = cm.family.numpy_rates({k: v[flat] for k, v in d.items()},
                                                     cm.sizes)
    else:
        d = site_draws(posterior, cm.family)
        shared = cm.family.numpy_rates({k: v[flat] for k, v in d.items()}, cm.sizes)
    years = _Years(cm, posterior, flat, rng) if varying else None
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
                dt = float(t[i] - t[i - 1])
                step = ch if not varying else years.chain(b[k], dd[k], k, group[0], i - 1, dt)
                rows = step.transition(dt, starts=state)
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
