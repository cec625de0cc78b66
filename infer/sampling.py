"""Sampling a built model: NUTS draws, independent prior draws, and the seeds behind both."""
from __future__ import annotations

import re
import warnings
from collections.abc import Sequence
from typing import Any

import numpy as np
import xarray as xr

from tallyfit.infer.errors import InputError, SamplerError
from tallyfit.infer.model import CountModel

__all__ = ["seed_streams", "sample_model", "sample_prior", "plain_sampler_error", "DEFAULT_INIT"]

#: PyMC's initialisation: a dense mass matrix adapted in warm-up, started at the checked
#: per-chain starts of :func:`tallyfit.infer.start.find_start` (their own small jitter), not
#: "jitter+adapt_full", whose U(−1, 1) jitter on every unconstrained scale can leave the region
#: where the likelihood is finite (each retry a full likelihood evaluation; after ten PyMC
#: gives up). Measured on the fast test data (pure death, linear, copper_tarn linear, heron_fen
#: logistic with immigration; seeds 1–3, 2 chains, 250–500 draws): no divergent transition
#: after warm-up under either, or from PyMC's own start; warm-up divergences 1–4 under all three.
DEFAULT_INIT = "adapt_full"
#: What to change when the model cannot be evaluated where the sampler stands.
_SETTINGS_HINT = ("change the rate family (--rates), a prior that puts the rates far from what the counts "
                  "show (priors.* in the --config file), or the maximum size (--max-size)")


def seed_streams(seed: int) -> tuple[int, int, np.random.Generator]:
    """Independent streams from one seed: the sampler's seed, the prior draws' seed and a
    generator for the posterior predictive.

    Args:
        seed: the run's seed.

    Returns:
        (sampling seed, prior seed, generator).
    """
    ss = np.random.SeedSequence(seed)
    a, b, c = ss.spawn(3)
    return (int(a.generate_state(1)[0]), int(b.generate_state(1)[0]),
            np.random.default_rng(c))


def sample_model(cm: CountModel, *, chains: int = 4, draws: int = 1000, tune: int = 1000,
                 seed: int = 0, progressbar: bool = True, cores: int | None = None,
                 target_accept: float = 0.95, init: str = DEFAULT_INIT,
                 initvals: Sequence[dict[str, Any]] | None = None):
    """Run NUTS on a built model.

    A dense mass matrix is adapted during warm-up ("adapt_full"): the rate
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
        initvals: one start per chain on the sampler's scales (:func:`tallyfit.infer.start.find_start`);
            None for PyMC's own.

    Returns:
        az.InferenceData with posterior and sample_stats; sample_stats.attrs holds
        ``warmup_n_steps`` (gradient evaluations spent in warm-up) and
        ``warmup_divergences`` (the warm-up draws themselves are dropped).

    Raises:
        InputError: the sampler cannot start, or the run does not fit in memory (data or
            settings: exit 2); the message says what to change.
        SamplerError: any other failure inside the sampler or the libraries under it
            (an internal error: exit 3), in plain words.
    """
    import pymc as pm

    try:
        with cm.model, warnings.catch_warnings():
            warnings.filterwarnings("ignore", message=".*BLAS.*")
            idata = pm.sample(draws=draws, tune=tune, chains=chains, cores=cores,
                              random_seed=seed, progressbar=progressbar, init=init,
                              initvals=None if initvals is None else [dict(p) for p in initvals],
                              target_accept=target_accept, compute_convergence_checks=False,
                              return_inferencedata=True, idata_kwargs={"log_likelihood": False},
                              discard_tuned_samples=False)
    except Exception as exc:  # every failure below the sampler, in plain words (KeyboardInterrupt passes)
        raise plain_sampler_error(exc) from exc
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


def _causes(exc: BaseException) -> list[BaseException]:
    """The error and what caused it (``raise ... from``, or raised while handling), outermost first."""
    out: list[BaseException] = []
    todo: list[BaseException | None] = [exc]
    while todo:
        e = todo.pop(0)
        if e is None or any(e is seen for seen in out):
            continue
        out.append(e)
        todo += [e.__cause__, e.__context__]
    return out


def _first_line(exc: BaseException) -> str:
    """The message without PyTensor's appendix (the Apply node, inputs, hints)."""
    text = str(exc).split("\nApply node", 1)[0].split("\nHINT:", 1)[0].strip()
    return re.sub(r"^Chain \d+ failed with: ", "", text.splitlines()[0] if text else type(exc).__name__)


def plain_sampler_error(exc: BaseException) -> Exception:
    """The plain tallyfit error for a failure inside the sampler (or the libraries under it).

    Args:
        exc: what PyMC raised (possibly wrapping a chain process's error).

    Returns:
        an InputError when it is the data or settings (the model cannot be evaluated at the
        start, an InputError from the likelihood, not enough memory), else a SamplerError.
    """
    from pymc.exceptions import SamplingError

    causes = _causes(exc)
    for e in causes:
        if isinstance(e, InputError):   # the likelihood's own plain error, without PyTensor's appendix
            plain = InputError(_first_line(e))
            plain.source, plain.row, plain.column, plain.hint = e.source, e.row, e.column, e.hint
            return plain
    for e in causes:
        if isinstance(e, MemoryError):
            return InputError("the sampler ran out of memory", source="sampling",
                              hint="lower the maximum size (--max-size) or run fewer chains at once (--chains)")
        if isinstance(e, SamplingError) and "Initial evaluation" in str(e):
            bad = re.findall(r"'([^']+)': (-?inf|nan)", str(e))
            terms = ", ".join(f"{k} {v}" for k, v in bad) or "some terms"
            return InputError(f"the sampler could not start: the model's log density is not finite at its "
                              f"starting point ({terms})", source="sampling", hint=_SETTINGS_HINT)
    root = [e for e in causes if type(e).__name__ != "RemoteTraceback"][-1]   # where it began
    numeric = (any(isinstance(e, (ArithmeticError, SamplingError)) for e in causes)
               or re.search(r"\bnan\b", str(exc), re.IGNORECASE) is not None)
    what = "a numerical failure" if numeric else "an unexpected error"
    cause = f"{type(root).__name__}: {_first_line(root)}"
    return SamplerError(f"the sampler stopped with {what} ({cause})", cause=cause,
                        hint="a different --seed, more warm-up (--tune) or a simpler rate family (--rates) may "
                             "get through")


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
