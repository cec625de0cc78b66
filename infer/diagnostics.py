"""Convergence diagnostics and the one set of pass/fail limits every check uses.

Every statistic comes from ArviZ (never our own): rank-normalised split R-hat and bulk
and tail effective sample sizes per parameter entry (``arviz.summary``), divergent
transitions, E-BFMI per chain (``arviz.bfmi``) and PSIS-LOO Pareto k (``arviz.loo``).
The limits below are the only copy: the fit's gate, the run-folder audit and the
report all read them from here.

* R-hat below 1.01, bulk and tail ESS above 400: Vehtari, Gelman, Simpson, Carpenter &
  Bürkner (2021), Bayesian Analysis 16(2):667–718.
* No divergent transitions after warm-up (common practice: any divergence means the
  sampler may have missed part of the posterior); E-BFMI above 0.3 in every chain
  (common practice).
* Pareto k above 0.7 makes an observation's PSIS-LOO estimate unreliable: Vehtari,
  Gelman & Gabry (2017), Statistics and Computing 27:1413–1432. A warning about model
  comparison, not about the posterior, so it does not fail a run.
* Numerical limits of the push-forward (tallyfit's own tolerances, far below any figure a
  report quotes): the error bound of an extinction probability, the stationary mass
  beyond the cap, the quasi-stationary mass in the top tenth below the cap.
"""
from __future__ import annotations

import functools
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

__all__ = ["Limits", "LIMITS", "LIMIT_SOURCES", "Convergence", "diagnose", "parameter_table",
           "SpreadCheck", "spread_check", "pareto_k"]


@dataclass(frozen=True)
class Limits:
    """Pass/fail limits (see the module docstring for their sources).

    Attributes:
        r_hat: R-hat must be below this.
        ess_bulk, ess_tail: effective sample sizes must be above these.
        divergences: most divergent transitions allowed after warm-up.
        bfmi: every chain's E-BFMI must be above this.
        pareto_k: Pareto k above this flags an observation (a warning).
        extinction_error_bound: largest allowed error bound on an extinction probability.
        stationary_mass_above_cap: largest allowed stationary probability beyond the cap.
        quasi_mass_near_cap: largest allowed posterior-mean quasi-stationary probability
            at sizes of 0.9·N and above.
        predictive_near_cap: largest allowed share of simulated sizes in the top tenth of
            0..N (the fit's cap check).
        cap_loglik_shift: largest allowed change of a draw's log-likelihood when the cap
            is doubled (the fit's cap check).
    """

    r_hat: float = 1.01
    ess_bulk: float = 400.0
    ess_tail: float = 400.0
    divergences: int = 0
    bfmi: float = 0.3
    pareto_k: float = 0.7
    extinction_error_bound: float = 1e-6
    stationary_mass_above_cap: float = 1e-4
    quasi_mass_near_cap: float = 0.01
    predictive_near_cap: float = 0.01
    cap_loglik_shift: float = 0.01


#: The limits in use.
LIMITS = Limits()

_VEHTARI_2021 = "Vehtari et al. (2021), Bayesian Analysis 16(2):667-718"
#: Where each limit comes from, in words (shown in reports).
LIMIT_SOURCES: dict[str, str] = {
    "r_hat": _VEHTARI_2021, "ess_bulk": _VEHTARI_2021, "ess_tail": _VEHTARI_2021,
    "divergences": "common practice", "bfmi": "common practice",
    "pareto_k": "Vehtari, Gelman & Gabry (2017), Statistics and Computing 27:1413-1432",
    "extinction_error_bound": "tallyfit's own tolerance", "stationary_mass_above_cap": "tallyfit's own tolerance",
    "quasi_mass_near_cap": "tallyfit's own tolerance", "predictive_near_cap": "tallyfit's own tolerance",
    "cap_loglik_shift": "tallyfit's own tolerance",
}


@dataclass
class Convergence:
    """The convergence diagnostics of one posterior.

    Attributes:
        table: one row per parameter entry (index "name" or "name[coord]") with columns
            mean, sd, q_lo, q50, q_hi (equal-tailed interval at ``level``), mcse_mean,
            mcse_sd, ess_bulk, ess_tail, r_hat (``arviz.summary``) and r_hat_ok,
            ess_bulk_ok, ess_tail_ok.
        level: credible level of q_lo and q_hi.
        divergences: divergent transitions per chain after warm-up (empty: not recorded).
        bfmi: E-BFMI per chain (empty: energy not recorded).
        limits: the limits applied.
        failed: one phrase per failed limit, e.g. "r_hat of birth_rate = 1.03".
    """

    table: pd.DataFrame
    level: float
    divergences: list[int] = field(default_factory=list)
    bfmi: list[float] = field(default_factory=list)
    limits: Limits = LIMITS
    failed: list[str] = field(default_factory=list)

    @property
    def passed(self) -> bool:
        """True when every limit holds (and the sampler recorded divergences and energy)."""
        return not self.failed

    @property
    def n_divergent(self) -> int:
        """Divergent transitions over all chains."""
        return int(sum(self.divergences))


def parameter_table(idata: Any, var_names: Sequence[str], level: float = 0.9) -> pd.DataFrame:
    """Posterior summary of every entry of the named variables (``arviz.summary``).

    Args:
        idata: InferenceData with a posterior group.
        var_names: variables to summarise (absent names are skipped).
        level: credible level of the equal-tailed interval.

    Returns:
        DataFrame indexed by label with columns mean, sd, q_lo, q50, q_hi, mcse_mean,
        mcse_sd, ess_bulk, ess_tail, r_hat (rank-normalised split R-hat).

    Raises:
        ValueError: level not in (0, 1), or none of the variables is in the posterior.
    """
    import arviz as az

    if not 0 < level < 1:
        raise ValueError(f"credible level must be in (0, 1), got {level!r}")
    names = [n for n in var_names if n in idata.posterior]
    if not names:
        raise ValueError(f"none of {list(var_names)} is in the posterior")
    a = (1 - level) / 2
    funcs = {"q_lo": functools.partial(np.quantile, q=a), "q50": np.median,
             "q_hi": functools.partial(np.quantile, q=1 - a)}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        table = az.summary(idata, var_names=names, kind="all", stat_funcs=funcs, extend=True,
                           round_to="none", hdi_prob=level)
    columns = ["mean", "sd", "q_lo", "q50", "q_hi", "mcse_mean", "mcse_sd", "ess_bulk", "ess_tail", "r_hat"]
    table = table[columns].astype(float)
    table.index.name = "parameter"
    return table


def diagnose(idata: Any, var_names: Sequence[str], *, level: float = 0.9,
             limits: Limits = LIMITS) -> Convergence:
    """Judge a posterior against the limits (ArviZ's statistics).

    Args:
        idata: InferenceData with posterior and sample_stats groups.
        var_names: posterior variables to judge (each entry of a vector on its own).
        level: credible level of the summary's interval.
        limits: the limits.

    Returns:
        Convergence (``failed`` lists every limit that does not hold; a sampler that
        recorded no divergences or no energy fails too, since nothing can be judged).

    Raises:
        ValueError: see :func:`parameter_table`.
    """
    import arviz as az

    table = parameter_table(idata, var_names, level)
    table["r_hat_ok"] = np.isfinite(table["r_hat"]) & (table["r_hat"] < limits.r_hat)
    table["ess_bulk_ok"] = np.isfinite(table["ess_bulk"]) & (table["ess_bulk"] > limits.ess_bulk)
    table["ess_tail_ok"] = np.isfinite(table["ess_tail"]) & (table["ess_tail"] > limits.ess_tail)
    failed = []
    for key in ("r_hat", "ess_bulk", "ess_tail"):
        for label, value in table.loc[~table[f"{key}_ok"], key].items():
            failed.append(f"{key} of {label} = {value:.4g}")
    ss = idata.sample_stats if "sample_stats" in idata.groups() else None
    divergences: list[int] = []
    if ss is not None and "diverging" in ss:
        divergences = [int(v) for v in np.asarray(ss["diverging"].sum("draw").values).reshape(-1)]
        if sum(divergences) > limits.divergences:
            failed.append(f"{sum(divergences)} divergent transitions")
    else:
        failed.append("the sampler recorded no divergence statistics")
    bfmi: list[float] = []
    if ss is not None and "energy" in ss:
        bfmi = [float(v) for v in np.atleast_1d(np.asarray(az.bfmi(idata), dtype=float))]
        if not all(v > limits.bfmi for v in bfmi):
            failed.append(f"E-BFMI {min(bfmi):.3g} in some chain")
    else:
        failed.append("the sampler recorded no energy, so E-BFMI cannot be checked")
    return Convergence(table=table, level=level, divergences=divergences, bfmi=bfmi, limits=limits,
                       failed=failed)


@dataclass(frozen=True)
class SpreadCheck:
    """A posterior predictive check aimed at year-to-year swings (overdispersion).

    The statistic is the standard deviation of the one-step log changes of the counts,
    log((n_{i+1} + ½)/(n_i + ½)) over every pair of consecutive surveyed times of every
    site (the largest replicate count at each time; ½ keeps zeros finite), computed on the
    observed counts and on each simulated series of the posterior predictive (Gelman,
    Meng & Stern 1996, Statistica Sinica 6:733–807: a posterior predictive p-value; from
    memory). Counts that swing more than the model's own simulations do give a small
    p-value: the model lacks year-to-year (environmental) variation.

    Attributes:
        observed: the statistic on the counts.
        predicted: its posterior predictive median, and 5% and 95% quantiles.
        p_value: share of simulated series whose statistic is at least the observed one.
        n_series: simulated series used.
    """

    observed: float
    predicted: tuple[float, float, float]
    p_value: float
    n_series: int

    @property
    def too_calm(self) -> bool:
        """True when the model's simulations swing clearly less than the counts (p < 0.05)."""
        return self.p_value < 0.05


def _log_change_sd(values: np.ndarray, site: np.ndarray, time: np.ndarray) -> np.ndarray:
    """SD of the one-step log changes; ``values`` (n_series, n_cells) with cells' site and time."""
    changes = []
    for s in np.unique(site):
        sel = site == s
        times = np.unique(time[sel])
        # the largest replicate at each time (the minimum number known alive)
        per_time = np.stack([np.max(values[:, sel & (time == t)], axis=1) for t in times], axis=1)
        changes.append(np.diff(np.log(per_time + 0.5), axis=1))
    return np.std(np.concatenate(changes, axis=1), axis=1, ddof=1)


def spread_check(idata: Any) -> SpreadCheck:
    """The posterior predictive check of year-to-year swings (see :class:`SpreadCheck`).

    Args:
        idata: InferenceData with observed_data and posterior_predictive over count cells
            (variable ``counts`` over ``count_cell`` with ``cell_site`` and ``cell_time``).

    Returns:
        SpreadCheck.

    Raises:
        ValueError: the groups are missing, or there are fewer than two changes.
    """
    if "observed_data" not in idata.groups() or "posterior_predictive" not in idata.groups():
        raise ValueError("posterior.nc has no observed_data or posterior_predictive group")
    obs = idata.observed_data["counts"]
    pred = idata.posterior_predictive["counts"]
    site = np.asarray([str(v) for v in obs["cell_site"].values])
    time = np.asarray(obs["cell_time"].values, dtype=float)
    t_obs = float(_log_change_sd(np.asarray(obs.values, dtype=float)[None, :], site, time)[0])
    sims = np.asarray(pred.transpose("chain", "draw", "count_cell").values, dtype=float)
    t_rep = _log_change_sd(sims.reshape(-1, sims.shape[-1]), site, time)
    return SpreadCheck(observed=t_obs, predicted=tuple(float(q) for q in np.quantile(t_rep, [0.5, 0.05, 0.95])),
                       p_value=float(np.mean(t_rep >= t_obs)), n_series=int(t_rep.size))


def pareto_k(idata: Any) -> np.ndarray:
    """PSIS-LOO Pareto k of every observation (``arviz.loo``).

    Args:
        idata: InferenceData with a log_likelihood group.

    Returns:
        float array, one k per observation.

    Raises:
        ValueError: no log_likelihood group (or ArviZ cannot compute LOO).
    """
    import arviz as az

    if "log_likelihood" not in idata.groups():
        raise ValueError("posterior.nc has no log_likelihood group")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        loo = az.loo(idata, pointwise=True)
    return np.asarray(loo.pareto_k.values, dtype=float).reshape(-1)
