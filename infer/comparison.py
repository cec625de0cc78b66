"""Which model the counts support: PSIS-LOO, stacking weights and the weighted push-forward.

:func:`loo_table` ranks posteriors of the same counts by their expected log pointwise
predictive density estimated by Pareto-smoothed importance sampling leave-one-out
(PSIS-LOO; Vehtari, Gelman & Gabry 2017, Statistics and Computing 27:1413–1432) and
gives each its stacking weight (Yao, Vehtari, Simpson & Gelman 2018, Bayesian Analysis
13:917–1007): the weights w ≥ 0, Σ w = 1 that maximise Σ_i log Σ_k w_k p(y_i | y_−i, M_k),
the predictive distribution of the mixture. Both are ArviZ's (``az.compare``,
``az.loo``), never our own.

:func:`weighed_draws` turns the weights into one set of push-forward draws: model k
contributes ``round(w_k · n)`` of the n draws (largest remainders, so they sum to n),
drawn at random from its own posterior draws, so any summary of the result is the
w-weighted mixture of the models' posteriors up to that rounding and the resampling.
"""
from __future__ import annotations

import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.infer.errors import InputError

__all__ = ["PARETO_K_LIMIT", "PER_DRAW_DIMS", "WEIGHT_FLOOR", "loo_table", "allocate_draws", "weighed_draws",
           "model_dependence"]

#: Pareto k above which the PSIS estimate of an observation's LOO density is unreliable
#: (Vehtari, Gelman & Gabry 2017, §2.1; also Vehtari et al. 2024, JMLR 25(72)).
PARETO_K_LIMIT = 0.7
#: The leading dims of a per-draw push-forward variable.
PER_DRAW_DIMS = ("scenario", "chain", "draw")


def loo_table(posteriors: Mapping[str, Any], *, variable: str = "counts") -> pd.DataFrame:
    """PSIS-LOO comparison of posteriors of the same counts, with stacking weights.

    Args:
        posteriors: {label: InferenceData with a ``log_likelihood`` group}; at least two.
        variable: the log-likelihood variable (one term per observation).

    Returns:
        az.compare's DataFrame indexed by label (rank, elpd_loo, p_loo, elpd_diff,
        weight — the stacking weight —, se, dse, warning, scale) plus max_pareto_k,
        n_pareto_k_above_0_7 and reliable (no Pareto k above PARETO_K_LIMIT).

    Raises:
        InputError: fewer than two posteriors, one without a log-likelihood, or posteriors
            of different observations (``source`` names the labels).
    """
    import arviz as az

    if len(posteriors) < 2:
        raise InputError("a comparison needs at least two fitted models", source="models")
    for label, idata in posteriors.items():
        if "log_likelihood" not in idata.groups() or variable not in idata.log_likelihood:
            raise InputError(f"model {label!r} has no pointwise log-likelihood {variable!r}", source=label)
    sizes = {label: int(idata.log_likelihood[variable].size // (idata.log_likelihood.sizes["chain"]
                                                                 * idata.log_likelihood.sizes["draw"]))
             for label, idata in posteriors.items()}
    if len(set(sizes.values())) != 1:
        raise InputError(f"the models have different numbers of observations {sizes}: compare fits of the same "
                         "counts with the same detection setting", source=", ".join(sizes))
    observed = {label: idata.observed_data[variable].values for label, idata in posteriors.items()
                if "observed_data" in idata.groups() and variable in idata.observed_data}
    first = next(iter(observed.values()), None)
    if first is not None and any(o.shape != first.shape or not np.array_equal(o, first, equal_nan=True)
                                 for o in observed.values()):
        raise InputError("the models were fitted to different counts", source=", ".join(observed))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the Pareto k warnings are columns of the table instead
        table = az.compare(dict(posteriors), ic="loo", method="stacking", var_name=variable)
        ks = {label: np.asarray(az.loo(idata, pointwise=True, var_name=variable).pareto_k.values, dtype=float)
              for label, idata in posteriors.items()}
    table["max_pareto_k"] = [float(np.max(ks[i])) for i in table.index]
    table["n_pareto_k_above_0_7"] = [int(np.sum(ks[i] > PARETO_K_LIMIT)) for i in table.index]
    table["reliable"] = table["n_pareto_k_above_0_7"] == 0
    return table


def allocate_draws(weights: Mapping[str, float], n: int) -> dict[str, int]:
    """How many of n draws each model gives: round(w·n) by largest remainders (Hamilton's method).

    Args:
        weights: {label: weight ≥ 0}; normalised here (they need not sum exactly to 1).
        n: total draws (≥ 1).

    Returns:
        {label: count}, counts summing to n, each within 1 of w·n.

    Raises:
        InputError: a negative or non-finite weight, or all weights zero.
    """
    labels = list(weights)
    w = np.array([float(weights[k]) for k in labels])
    if not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise InputError(f"stacking weights must be finite, ≥ 0 and not all 0: {dict(weights)}", source="weights")
    share = w / w.sum() * int(n)
    counts = np.floor(share).astype(int)
    order = np.argsort(-(share - counts), kind="stable")
    counts[order[: int(n) - int(counts.sum())]] += 1
    return {k: int(c) for k, c in zip(labels, counts)}


def _per_draw(ds: xr.Dataset) -> list[str]:
    return [v for v in ds.data_vars if tuple(ds[v].dims[:3]) == PER_DRAW_DIMS]


def weighed_draws(derived: Mapping[str, xr.Dataset], weights: Mapping[str, float], *, n_draws: int,
                  seed: int | None = None) -> xr.Dataset:
    """One push-forward Dataset whose draws come from the models in proportion to their weights.

    Model k's share of the ``n_draws`` is :func:`allocate_draws`; its draws are picked at
    random from its chains × draws (without replacement when it has enough, with
    replacement otherwise). Every per-draw variable (leading dims scenario, chain, draw)
    common to all models is kept; over ``size`` the models are padded to the largest cap
    (probabilities with 0 — a capped chain puts none above its cap —, rates with NaN).

    Args:
        derived: {label: push-forward Dataset} (same scenarios, sites, thresholds, horizons).
        weights: {label: weight}; labels missing here get weight 0.
        n_draws: draws in the result.
        seed: random seed of the resampling.

    Returns:
        Dataset over (scenario, chain=1, draw=n_draws, ...) with a ``model`` coordinate along
        ``draw`` naming where each draw came from.

    Raises:
        InputError: the models' scenarios, sites, thresholds or horizons differ.
    """
    labels = [k for k in derived if float(weights.get(k, 0.0)) > 0]
    counts = allocate_draws({k: float(weights[k]) for k in labels}, n_draws)
    first = derived[labels[0]]
    for k in labels[1:]:
        for dim in ("scenario", "site", "threshold", "horizon"):
            if dim in first.coords and not np.array_equal(derived[k][dim].values, first[dim].values):
                raise InputError(f"models {labels[0]!r} and {k!r} differ in their {dim}s; weigh models run with "
                                 "the same settings", source=dim)
    names = [v for v in _per_draw(first) if all(v in derived[k] for k in labels)]
    size = max((int(derived[k]["size"].max()) for k in labels if "size" in derived[k].coords), default=None)
    rng = np.random.default_rng(seed)
    parts, origin = [], []
    for k in labels:
        if counts[k] == 0:
            continue
        ds = derived[k][names]
        if size is not None and "size" in ds.coords:
            pads = {v: (0.0 if v.endswith("_pmf") else np.nan) for v in names if "size" in ds[v].dims}
            ds = xr.merge([ds[[v for v in names if v not in pads]]]
                          + [ds[v].reindex(size=np.arange(size + 1), fill_value=fill) for v, fill in pads.items()])
        flat = ds.stack(sample=("chain", "draw"))
        total = flat.sizes["sample"]
        pick = rng.choice(total, size=counts[k], replace=counts[k] > total)
        parts.append(flat.isel(sample=np.sort(pick)).drop_vars(["sample", "chain", "draw"]))
        origin += [k] * counts[k]
    out = xr.concat(parts, dim="sample", data_vars="all", coords="minimal", compat="override", join="outer")
    out = out.rename({"sample": "draw"}).expand_dims(chain=[0])
    out = out.assign_coords(draw=np.arange(out.sizes["draw"]), model=("draw", np.array(origin, dtype=object)))
    return out.transpose("scenario", "chain", "draw", ...)


#: A model whose stacking weight is below this carries little weight in the combination.
WEIGHT_FLOOR = 0.05


def model_dependence(weights: Mapping[str, float], risk: Mapping[str, float], category: Mapping[str, str], *,
                     weighed_risk: tuple[float, float, float], what: str, level: float = 0.9) -> dict[str, Any]:
    """How much the headline answer depends on the model, in one or two sentences.

    The models that carry weight (stacking weight ≥ WEIGHT_FLOOR) are compared on one
    risk (a posterior mean probability) and on their most probable criterion E category.
    The answer "depends on the model" when their risks differ by more than 0.05 and by
    more than half the width of the weighed risk's credible interval, or when their most
    probable categories differ (common practice: model uncertainty worth reporting is one
    that moves the conclusion by more than the within-model uncertainty).

    Args:
        weights: {label: stacking weight}.
        risk: {label: posterior mean of the risk}.
        category: {label: the most probable criterion E category}.
        weighed_risk: (mean, lower, upper) of the risk over the weighed draws.
        what: the risk in words, e.g. "the probability that every site is extinct within 100 years".
        level: the credible level of the interval.

    Returns:
        {"sentence", "depends" (bool), "carrying" (labels with weight ≥ WEIGHT_FLOOR),
        "risk_range" ([min, max] over them), "categories"}.
    """
    carrying = sorted((k for k in weights if weights[k] >= WEIGHT_FLOOR), key=lambda k: -weights[k])
    values = [risk[k] for k in carrying]
    lo, hi = (min(values), max(values)) if values else (float("nan"), float("nan"))
    mean, q_lo, q_hi = weighed_risk
    pct = f"{100 * level:g}%"
    combined = f"the weighed combination gives {_p(mean)} ({pct} interval {_p(q_lo)} to {_p(q_hi)})"
    cats = {k: category[k] for k in carrying}
    depends = len(carrying) > 1 and ((hi - lo > 0.05 and hi - lo > (q_hi - q_lo) / 2) or len(set(cats.values())) > 1)
    if len(carrying) == 1:
        k = carrying[0]
        sentence = (f"The counts favour {k} (stacking weight {weights[k]:.2f}); the other models carry little "
                    f"weight, so the weighed results are essentially {k}'s: {what} is {_p(risk[k])}, and {combined}.")
    elif depends:
        parts = ", ".join(f"{_p(risk[k])} under {k} (weight {weights[k]:.2f}, most probable category {cats[k]})"
                          for k in carrying)
        sentence = (f"The answer depends on the model: {what} is {parts}; {combined}. Report the model "
                    "uncertainty together with the result.")
    else:
        sentence = (f"The answer depends little on the model: the models that carry weight "
                    f"({', '.join(carrying)}) give {_p(lo)} to {_p(hi)} for {what}, with the same most probable "
                    f"criterion E category ({next(iter(cats.values()))}); {combined}.")
    return {"sentence": sentence, "depends": bool(depends), "carrying": carrying, "risk_range": [lo, hi],
            "categories": cats}


def _p(x: float) -> str:
    """A probability as a percentage with sensible digits (e.g. "3.2%", "97.4%", "<0.1%")."""
    if not np.isfinite(x):
        return "not available"
    v = 100 * x
    if v == 0:
        return "0%"
    if v < 0.1:
        return "<0.1%"
    if v > 99.9:
        return ">99.9%"
    return f"{v:.2g}%" if v < 10 else f"{v:.1f}%"
