"""Sampling a built model: NUTS draws, independent prior draws, and the seeds behind both."""
from __future__ import annotations

import warnings

import numpy as np
import xarray as xr

from tallyfit.infer.model import CountModel

__all__ = ["seed_streams", "sample_model", "sample_prior"]


def seed_streams(seed: int) -> tuple[int, int, np.random.Generator]:
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


def sample_prior(cm: CountModel, n: int, seed: int) -> xr.Dataset:
    """The ``prior`` group: independent draws of every summarised parameter from its prior.

    Drawn directly (the family's :meth:`~infer.families.RateFamily.draw_prior`, which
    respects the family's support, plus detection, the environment and covariate effects
    and the site offsets), not by
    forward-sampling the PyMC model: a model sampled in other coordinates holds the
    prior as a density, which cannot be forward-sampled.
    """
    from tallyfit.infer.families import scipy_prior

    rng = np.random.default_rng(seed)
    draws = cm.family.draw_prior(cm.priors, n, rng)
    if "detection" in cm.priors:
        draws["detection"] = scipy_prior(cm.priors["detection"]).rvs(size=n, random_state=rng)
    if "environment_sd" in cm.priors:
        draws["environment_sd"] = scipy_prior(cm.priors["environment_sd"]).rvs(size=n, random_state=rng)
    for name, covs in (("birth_effect", cm.environment.births), ("death_effect", cm.environment.deaths)):
        if covs:
            draws[name] = scipy_prior(cm.priors[name]).rvs(size=(n, len(covs)), random_state=rng)
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
