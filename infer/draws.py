"""Using the posterior draws of a fitted model: each draw's rates and its log-likelihood.

:func:`site_draws` is the one place that turns posterior draws into the quantities a
family's rates are computed from (applying a site's offset under partial pooling).
:func:`pointwise_log_likelihood` (one term per transition, for PSIS-LOO) and
:func:`draw_log_likelihood` (the total of chosen draws, optionally at another cap) share
one evaluator, which prepares the data once and keeps the windows warm across draws.
"""
from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from typing import Any

import numpy as np
import xarray as xr

from tallyfit.infer.diagnostics import LIMITS
from tallyfit.infer.errors import InputError
from tallyfit.infer.families import RateFamily
from tallyfit.infer.likelihood import REFUSED_ERRORS, PreparedCounts
from tallyfit.infer.model import CountModel
from tallyfit.infer.observation import observation_table

__all__ = ["flat_draws", "site_draws", "pointwise_log_likelihood", "draw_log_likelihood", "check_cap",
           "quadrature_check", "CAP_CHECK_DRAWS"]

#: Posterior draws whose log-likelihood is re-evaluated at twice the cap.
CAP_CHECK_DRAWS = 20


def flat_draws(posterior: xr.Dataset, name: str) -> np.ndarray:
    """One variable's draws flattened over (chain, draw), chain-major: shape (n_draws, ...)."""
    v = posterior[name].stack(sample=("chain", "draw")).transpose("sample", ...)
    return np.asarray(v.values, dtype=float)


def site_draws(posterior: xr.Dataset, family: RateFamily, site: str | None = None,
               *, pooled: bool = False) -> dict[str, np.ndarray]:
    """Posterior draws of the quantities ``family.numpy_rates`` reads, flattened over (chain, draw).

    Args:
        posterior: the posterior group (an xarray Dataset with chain and draw dims).
        family: the fitted (adapted) family.
        site: with pooling, the site whose rates are wanted (its offset applied).
        pooled: whether the fit used site offsets.

    Returns:
        {name: array (n_draws,) or (n_draws, length)} in chain-major order.

    Raises:
        InputError: pooled fit without a site, or an unknown site.
    """
    names = set(family.parameters) | {s.name for s in family.free_parameters}
    out = {name: flat_draws(posterior, name) for name in names if name in posterior}
    if pooled:
        if site is None:
            raise InputError("this fit has site offsets: name a site", source="site")
        sites = list(posterior["site_offset"].coords["site"].values)
        if site not in sites:
            raise InputError(f"no site {site!r}; sites are {sites}", source="site")
        off = posterior["site_offset"].sel(site=site).stack(sample=("chain", "draw")).values
        out = family.site_parameters(out, np.asarray(off, dtype=float))
    return out


class _DrawEvaluator:
    """The likelihood of single posterior draws, part by part (all sites, or each pooled site)."""

    def __init__(self, cm: CountModel, posterior: xr.Dataset, indices: np.ndarray, cap: int) -> None:
        self.cm = cm
        self.sizes = np.arange(cap + 1)
        self.indices = indices
        n = indices.size
        self.p = (flat_draws(posterior, "detection")[indices] if cm.detection == "estimate"
                  else np.full(n, np.nan if cm.detection is None else float(cm.detection)))
        env = cm.environment
        self.sigma = flat_draws(posterior, "environment_sd")[indices] if env.varying else np.zeros(n)
        self.beta_b = flat_draws(posterior, "birth_effect")[indices] if env.births else np.zeros((n, 0))
        self.beta_d = flat_draws(posterior, "death_effect")[indices] if env.deaths else np.zeros((n, 0))
        self.posterior = posterior

    def parts(self) -> Iterator[tuple[int, Any, Any]]:
        """For each part: (number of terms, evaluate(k) -> LikelihoodResult, rates)."""
        cm = self.cm
        for counts, site, spec in cm.likelihood_groups():
            prepared = (PreparedCounts(counts[0], counts[1], cm.detection, environment=spec)
                        if isinstance(counts, tuple) else PreparedCounts(counts, None, cm.detection, environment=spec))
            draws = {k: v[self.indices] for k, v in site_draws(self.posterior, cm.family, site,
                                                                pooled=cm.pooling).items()}
            birth, death = cm.family.numpy_rates(draws, self.sizes)
            n_terms = sum(max(int(np.any(~np.isnan(s.counts), axis=1).sum()) - 1, 0) for s in prepared.series)

            def evaluate(k: int, prepared=prepared, birth=birth, death=death, nodes: int | None = None):
                if spec is not None:
                    return prepared.evaluate_environment(birth[k], death[k], float(self.sigma[k]), self.beta_b[k],
                                                         self.beta_d[k], 1e-10, False, nodes)
                p = None if np.isnan(self.p[k]) else float(self.p[k])
                return prepared.evaluate(birth[k], death[k], p, 1e-10, False)

            yield n_terms, evaluate


def pointwise_log_likelihood(cm: CountModel, posterior: xr.Dataset, progressbar: bool = False) -> xr.DataArray:
    """Per-observation log-likelihood of every posterior draw (for PSIS-LOO).

    Args:
        cm: the built model.
        posterior: the posterior group.
        progressbar: show a tqdm bar over the draws.

    Returns:
        DataArray (chain, draw, obs), obs labelled as in ``observation_table``
        (−inf terms for a draw whose rates the likelihood refuses).

    Raises:
        RuntimeError: the likelihood returned another number of terms than there are
            transitions (a programming error).
    """
    n_chain, n_draw = posterior.sizes["chain"], posterior.sizes["draw"]
    n = n_chain * n_draw
    obs = observation_table(cm.data, cm.detection)
    ev = _DrawEvaluator(cm, posterior, np.arange(n), cm.cap)
    columns = []
    for n_terms, evaluate in ev.parts():
        iterator: Any = range(n)
        if progressbar:
            from tqdm.auto import tqdm

            iterator = tqdm(iterator, desc="pointwise log-likelihood", leave=False)
        rows = []
        for k in iterator:
            try:
                rows.append(np.concatenate(evaluate(k).pointwise))
            except REFUSED_ERRORS:
                # rates the likelihood refuses (overflow, or data too improbable to represent)
                rows.append(np.full(n_terms, -np.inf))
        columns.append(np.asarray(rows).reshape(n, n_terms))
    values = np.concatenate(columns, axis=1).reshape(n_chain, n_draw, -1)
    if values.shape[2] != len(obs):
        raise RuntimeError(f"the likelihood returned {values.shape[2]} pointwise terms, expected {len(obs)}")
    return xr.DataArray(values, dims=("chain", "draw", "obs"),
                        coords={"chain": posterior.coords["chain"].values, "draw": posterior.coords["draw"].values,
                                "obs": np.arange(len(obs)), "obs_site": ("obs", obs["site"].astype(str).values),
                                "obs_time": ("obs", obs["time_to"].values)},
                        name="counts")


def draw_log_likelihood(cm: CountModel, posterior: xr.Dataset, flat_indices: Sequence[int],
                        cap: int | None = None) -> np.ndarray:
    """Total log-likelihood of selected posterior draws, optionally at another cap.

    The rates of each draw are ``family.numpy_rates`` over 0..cap — the family's formula
    continues past the fitted cap, so a larger cap shows how much the fitted cap matters.

    Args:
        cm: the built model.
        posterior: the posterior group.
        flat_indices: draw indices into the (chain, draw) stack, chain-major.
        cap: size cap for the evaluation (default the model's).

    Returns:
        float array, one log-likelihood per selected draw (−inf where the likelihood
        refuses the rates).
    """
    idx = np.asarray(flat_indices, dtype=int)
    ev = _DrawEvaluator(cm, posterior, idx, cm.cap if cap is None else int(cap))
    total = np.zeros(idx.size)
    for _, evaluate in ev.parts():
        for k in range(idx.size):
            try:
                total[k] += evaluate(k).ll
            except REFUSED_ERRORS:
                total[k] = -np.inf
    return total


def quadrature_check(cm: CountModel, posterior: xr.Dataset, *, n_draws: int = 10) -> dict[str, Any] | None:
    """How much the log-likelihood of posterior draws moves when the quadrature over good and
    bad years is refined (K nodes per transition against 2K+1): the measured quadrature error.

    Args:
        cm: the built model.
        posterior: the posterior group.
        n_draws: draws re-evaluated (spread evenly).

    Returns:
        None without year-to-year variation; else {nodes, draws_checked, loglik_shift,
        limit, ok, message}.
    """
    from tallyfit.infer.likelihood.environment import DEFAULT_NODES

    if cm.environment.varying is None:
        return None
    n_total = posterior.sizes["chain"] * posterior.sizes["draw"]
    idx = np.unique(np.round(np.linspace(0, n_total - 1, min(n_draws, n_total))).astype(int))
    ev = _DrawEvaluator(cm, posterior, idx, cm.cap)
    shift = 0.0
    for _, evaluate in ev.parts():
        for k in range(idx.size):
            try:
                shift = max(shift, abs(evaluate(k, nodes=2 * DEFAULT_NODES + 1).ll - evaluate(k).ll))
            except REFUSED_ERRORS:
                continue
    ok = shift <= LIMITS.cap_loglik_shift
    message = (f"the average over good and bad years ({DEFAULT_NODES} quadrature nodes per transition) moves the "
               f"log-likelihood of {idx.size} posterior draws by at most {shift:.2g} when refined to "
               f"{2 * DEFAULT_NODES + 1} nodes" + ("" if ok else ": the quadrature is too coarse for these data; "
                                                   "report this run"))
    return {"nodes": DEFAULT_NODES, "draws_checked": int(idx.size), "loglik_shift": shift,
            "limit": LIMITS.cap_loglik_shift, "ok": bool(ok), "message": message}


def check_cap(cm: CountModel, posterior: xr.Dataset, predictive: xr.Dataset,
              *, n_draws: int = CAP_CHECK_DRAWS) -> dict[str, Any]:
    """Is the size cap N high enough for the fitted rates?

    Two measures: (1) of the simulated sizes in the posterior predictive, the share in
    the top tenth of 0..N (sizes ≥ 0.9·N) — not negligible when above LIMITS.predictive_near_cap
    (1%); (2) for up to ``n_draws`` posterior draws, the largest change of the
    log-likelihood when it is recomputed with the cap doubled (the family's formula
    continued past N) — not negligible when above LIMITS.cap_loglik_shift (0.01).

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
    ok = share <= LIMITS.predictive_near_cap and (shift <= LIMITS.cap_loglik_shift)
    suggestion = int(math.ceil(max(2 * N, sizes.max() * 1.5 if sizes.size else 0)))
    if ok:
        message = (f"cap N = {N} is adequate: {share:.2%} of simulated sizes reach {near_from} "
                   f"or more, and doubling the cap moves the log-likelihood by at most "
                   f"{shift:.2g}")
    else:
        message = (f"the size cap N = {N} may be too low: {share:.2%} of simulated sizes "
                   f"reach {near_from} or more (threshold {LIMITS.predictive_near_cap:.1%}), and doubling "
                   f"the cap moves the log-likelihood by up to {shift:.3g} (threshold "
                   f"{LIMITS.cap_loglik_shift}); raise --max-size (e.g. to {suggestion}) and refit")
    return {"cap": N, "max_simulated_size": int(sizes.max()) if sizes.size else None,
            "near_cap_from": near_from, "share_near_cap": share,
            "share_threshold": LIMITS.predictive_near_cap, "loglik_shift": shift,
            "loglik_shift_threshold": LIMITS.cap_loglik_shift, "draws_checked": int(idx.size),
            "ok": bool(ok), "message": message}
