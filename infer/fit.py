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
import os
import time
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.infer.counts import CountData
from tallyfit.infer.diagnostics import Convergence, diagnose
from tallyfit.infer.draws import check_cap, pointwise_log_likelihood, quadrature_check, site_draws
from tallyfit.infer.errors import InputError
from tallyfit.infer.families import RateFamily, get_family
from tallyfit.infer.model import NO_ENVIRONMENT, CountModel, Environment, build_count_model
from tallyfit.infer.predictive import observed_data_group, simulate_posterior_counts
from tallyfit.infer.sampling import DEFAULT_INIT, sample_model, sample_prior, seed_streams
from tallyfit.infer.observation import default_cap, normalise_detection
from tallyfit.infer.cost import (LEAPFROG_STEPS, describe_duration, estimate_memory, estimate_sampling_time,
                                 require_memory_for_fit)
from tallyfit.infer.screening import check_changes
from tallyfit.infer.start import find_start
from tallyfit.infer.units import TimeUnit

__all__ = ["CapWarning", "ConvergenceWarning", "FitResult", "fit_counts", "compare_families"]


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
        diagnostics: the convergence diagnostics (:class:`tallyfit.infer.diagnostics.Convergence`;
            its ``table`` is the parameter summary, one row per parameter entry).
        cap_check: see :func:`check_cap`.
        messages: warnings and notes for the user (model, diagnostics, cap).
        model: the CountModel (not saved with the posterior).
        timing: wall-clock seconds of the stages (sampling, pointwise, predictive, ...).
        quadrature_check: with good and bad years, how much refining the average over
            them moves the log-likelihood of posterior draws (None otherwise).
    """

    idata: Any
    family: RateFamily
    cap: int
    detection: float | str | None
    settings: dict[str, Any]
    diagnostics: Convergence
    cap_check: dict[str, Any]
    messages: list[str] = field(default_factory=list)
    model: CountModel | None = None
    timing: dict[str, float] = field(default_factory=dict)
    quadrature_check: dict[str, Any] | None = None

    @property
    def passed(self) -> bool:
        """True when every diagnostic threshold holds."""
        return self.diagnostics.passed

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


# --------------------------------------------------------------------------- fit
def fit_counts(data: CountData, family: str | RateFamily = "logistic", *, chains: int = 4, draws: int = 1000,
               tune: int = 1000, seed: int | None = None, cap: int | None = None,
               detection: Any = None, priors: Mapping[str, Any] | None = None,
               pooling: bool = False, progressbar: bool = True, cores: int | None = None,
               n_predictive: int = 200, n_prior: int = 500,
               target_accept: float = 0.95, credible_level: float = 0.9,
               environment: Environment = NO_ENVIRONMENT, accept_jumps: bool = False,
               unit: TimeUnit | None = None, log: Callable[[str], None] | None = None) -> FitResult:
    """Fit a rate family to count data by NUTS and judge the result.

    Args:
        data: the counts (``tallyfit.inputs.counts_csv.load_counts`` reads a file).
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
        credible_level: level of the parameter summary's equal-tailed intervals.
        environment: good and bad years and covariates (exact counts only).
        accept_jumps: fit counts that no process of the family could plausibly make
            (:func:`infer.screening.check_changes`) instead of refusing them.
        unit: the time column's unit, for messages.
        log: where plain-words notes go before sampling (the memory and time a long or
            large fit will take); None: nowhere.

    Returns:
        FitResult.

    Raises:
        InputError: data that are not CountData, a bad family, settings or priors, or no
            starting point where the model's log density is finite (all before any
            sampling); a sampler that cannot start or runs out of memory.
        ImplausibleCountsError: counts the family's priors do not allow (an InputError;
            before the model is built), unless ``accept_jumps``.
        FitTooLargeError (infer.cost): the fit would not fit in memory (an InputError; before the model
            is built).
        SamplerError: any other failure inside the sampler (an internal error), in plain words.
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
        raise InputError(f"fit_counts needs CountData, not {type(data).__name__}", source="data",
                         hint="read a counts file with tallyfit.inputs.counts_csv.load_counts")
    fam = get_family(family)
    say = log or (lambda text: None)
    timing: dict[str, float] = {}
    # before anything of the cap's size exists: impossible jumps (typing slips) and the memory
    t0 = time.perf_counter()
    accepted = check_changes(data, fam, priors=priors, detection=detection, environment=environment,
                             accept=accept_jumps, unit=unit)
    processes = max(1, min(chains, cores or os.cpu_count() or 1))
    n_cap = cap if isinstance(cap, (int, np.integer)) and not isinstance(cap, bool) and cap >= 1 else (
        default_cap(data, normalise_detection(detection)))
    # the main process holds the model too while worker processes sample
    cost = estimate_memory(int(n_cap), processes=processes + (1 if processes > 1 else 0))
    require_memory_for_fit(cost, largest_count=data.max_count, where=_largest_count_place(data),
                           cap_given=cap is not None)
    if cost.needed_bytes >= 2 ** 30:
        say(f"memory: this fit will use {cost.describe()}")
    timing["screening"] = time.perf_counter() - t0
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        cm = build_count_model(data, fam, cap=cap, detection=detection, priors=priors,
                               pooling=pooling, environment=environment)
    for w in caught:
        if not issubclass(w.category, (DeprecationWarning, PendingDeprecationWarning)):
            warnings.warn_explicit(w.message, w.category, w.filename, w.lineno)
    messages = list(cm.messages)
    if accepted:
        messages.append("counts accepted deliberately although the family's priors do not allow them (--accept-jumps): "
                        + "; ".join(c.describe(unit) for c in accepted[:5]))
    timing["build"] = time.perf_counter() - t0
    sample_seed, prior_seed, rng = seed_streams(seed)
    # prior draws before sampling: priors that barely meet the family's support stop here
    t0 = time.perf_counter()
    prior = sample_prior(cm, n_prior, prior_seed)
    timing["prior"] = time.perf_counter() - t0

    # a checked, finite start from the counts before any sampling: an impossible one stops here
    t0 = time.perf_counter()
    start = find_start(cm, chains=chains, seed=sample_seed)
    timing["start"] = time.perf_counter() - t0
    low, typical, high = estimate_sampling_time(start.gradient_seconds, chains=chains, draws=draws, tune=tune,
                                                processes=min(processes, chains))
    if typical >= 60:
        say(f"time: sampling will take roughly {describe_duration(typical)} (between {describe_duration(low)} and "
            f"{describe_duration(high)}): one evaluation of the likelihood and its gradient takes "
            f"{start.gradient_seconds:.3g} s here, NUTS needs {LEAPFROG_STEPS[0]}–{LEAPFROG_STEPS[2]} of them per "
            f"draw, {chains} chain(s) × {tune + draws} draws on {min(processes, chains)} core(s); fewer draws "
            "(--draws, --tune) or a lower cap (--max-size) shorten it")

    t0 = time.perf_counter()
    idata = sample_model(cm, chains=chains, draws=draws, tune=tune, seed=sample_seed,
                         progressbar=progressbar, cores=cores, target_accept=target_accept,
                         init=DEFAULT_INIT, initvals=start.chain_points)
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
    diagnostics = diagnose(idata, cm.var_names, level=credible_level)
    cap_check = check_cap(cm, idata.posterior, predictive)
    quadrature = quadrature_check(cm, idata.posterior)
    timing["checks"] = time.perf_counter() - t0
    if not diagnostics.passed:
        msg = ("convergence diagnostics failed (" + "; ".join(diagnostics.failed[:6])
               + (" …" if len(diagnostics.failed) > 6 else "")
               + "): run longer chains (--draws, and more warm-up) before trusting the results")
        warnings.warn(msg, ConvergenceWarning, stacklevel=2)
        messages.append(msg)
    if not cap_check["ok"]:
        warnings.warn(cap_check["message"], CapWarning, stacklevel=2)
        messages.append(cap_check["message"])
    if quadrature is not None and not quadrature["ok"]:
        messages.append(quadrature["message"])

    settings = {
        "family": cm.family.name,
        "family_options": cm.family.options,
        "chains": int(chains), "draws": int(draws), "tune": int(tune), "seed": seed,
        "cores": cores, "cap": cm.cap,
        "cap_rule": ("given" if cap is not None else
                     "default: ceil(max(M' + 3 sqrt(M') + 15, 1.2 M')), M' = largest count / p"),
        "detection": cm.detection, "priors": cm.priors, "pooling": cm.pooling,
        "varying_years": environment.varying or "none", "birth_covariates": list(environment.births),
        "death_covariates": list(environment.deaths),
        "target_accept": float(target_accept), "accept_jumps": bool(accept_jumps), "init": DEFAULT_INIT, "start": start.summary(),
        "n_predictive": int(predictive.sizes["chain"] * predictive.sizes["draw"]),
        "n_prior": int(n_prior),
        "data_scale": {"time_scale": cm.scale.time_scale, "count_scale": cm.scale.count_scale,
                       "size_lo": cm.scale.size_lo, "size_hi": cm.scale.size_hi},
        "sites": list(data.sites), "n_counts": int(data.n_counts), "source": data.source,
    }
    idata.posterior.attrs["tallyfit_settings_json"] = json.dumps(settings, default=lambda v: v.item())
    idata.posterior.attrs["tallyfit_family"] = cm.family.describe(cm.priors)
    return FitResult(idata=idata, family=cm.family, cap=cm.cap, detection=cm.detection,
                     settings=settings, diagnostics=diagnostics,
                     cap_check=cap_check, messages=messages, model=cm, timing=timing,
                     quadrature_check=quadrature)


def _largest_count_place(data: CountData) -> str | None:
    """Where the largest count is in the source ("c.csv line 3"), for messages."""
    for s in data.series:
        times, counts, rows = s.observed("max")
        hit = np.flatnonzero(counts == data.max_count)
        if hit.size and rows[hit[0]] > 0:
            return f"{data.source} {s.row_kind} {int(rows[hit[0]])}"
    return None


# --------------------------------------------------------------------------- comparison
def compare_families(results: Mapping[str, FitResult] | Sequence[FitResult]) -> pd.DataFrame:
    """Rank fits of the same data by PSIS-LOO (az.compare), flagging Pareto k > 0.7.

    Args:
        results: {label: FitResult}, or a sequence (labelled by family name; repeated
            names get a suffix).

    Returns:
        az.compare's DataFrame (rank, elpd_loo, p_loo, elpd_diff, weight, se, dse,
        warning, scale) plus max_pareto_k, n_pareto_k_above_0_7 and reliable (no k
        above 0.7; Vehtari, Gelman & Gabry 2017): :func:`tallyfit.infer.comparison.loo_table`.

    Raises:
        InputError: fewer than two fits, or fits of different observations.
    """
    from tallyfit.infer.comparison import loo_table

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
    return loo_table({label: r.idata for label, r in results.items()})
