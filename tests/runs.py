"""A genuine small run folder for the run-folder and report tests, written by the one writer.

Everything is the project's own code — the model (its pointwise log-likelihood and
posterior predictive series), the diagnostics, the cap check, the push-forward and the
run-folder writer — except the posterior draws: independent draws near the Heron Fen
demo's true rates (invented demo values, never check values) stand in for NUTS.
"""
from __future__ import annotations

from pathlib import Path

import arviz as az
import numpy as np
import xarray as xr

from tallyfit.infer.criterion_e import criterion_e_horizons, horizons_with_criterion_e
from tallyfit.infer.diagnostics import diagnose
from tallyfit.infer.families import get_family, scipy_prior
from tallyfit.infer.draws import check_cap, pointwise_log_likelihood
from tallyfit.infer.model import build_count_model
from tallyfit.infer.predictive import observed_data_group, simulate_posterior_counts
from tallyfit.infer.pushforward import PushForwardSpec, push_forward, summarise
from tallyfit.infer.scenarios import BASELINE, Scenario
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.runfolder.writer import RunRecord, write_run

ROOT = Path(__file__).resolve().parents[1]
COUNTS = ROOT / "example_counts" / "heron_fen.csv"
CAP = 150
FAMILY = get_family("logistic", immigration=True)
CENTRE = {"birth_rate": (0.9, 0.10), "death_rate": (0.3, 0.20), "carrying_capacity": (60.0, 0.05),
          "immigration": (0.5, 0.40)}
SETTINGS = {"rates": "logistic", "immigration": True, "chains": 2, "draws": 30, "tune": 0, "seed": 4242,
            "max_size": CAP, "horizons": [5.0, 50.0], "thresholds": [0, 10], "credible_level": 0.9,
            "scenarios": [{"name": "cull", "harvest_rate": 0.15, "description": "remove 15% a year"}]}
SCENARIOS = (BASELINE, Scenario("cull", harvest_rate=0.15, description="remove 15% a year"))


def samples(values: dict[str, np.ndarray]) -> xr.Dataset:
    """A (chain, draw) Dataset of the given arrays."""
    first = next(iter(values.values()))
    return xr.Dataset({k: (("chain", "draw"), v) for k, v in values.items()},
                      coords={"chain": np.arange(first.shape[0]), "draw": np.arange(first.shape[1])})


def fit_groups(chains: int, draws: int, seed: int, divergent: int = 0, n_predictive: int = 30):
    """(InferenceData, model) as the fit makes them, with invented draws instead of NUTS."""
    data = load_counts(COUNTS)
    cm = build_count_model(data, FAMILY, cap=CAP)
    rng = np.random.default_rng(seed)
    post = samples({k: m * np.exp(s * rng.standard_normal((chains, draws))) for k, (m, s) in CENTRE.items()})
    post.attrs["tallyfit_family"] = cm.family.describe(cm.priors)
    diverging = np.zeros((chains, draws), dtype=bool)
    diverging.flat[rng.choice(chains * draws, size=divergent, replace=False)] = True
    predictive = simulate_posterior_counts(cm, post, n_predictive, rng)
    prior = {k: scipy_prior(cm.priors[k]).rvs(size=(1, 400), random_state=seed + 2 + i) for i, k in enumerate(CENTRE)}
    idata = az.InferenceData(
        posterior=post,
        sample_stats=samples({"diverging": diverging, "energy": rng.normal(size=(chains, draws))}),
        log_likelihood=xr.Dataset({"counts": pointwise_log_likelihood(cm, post)}),
        posterior_predictive=predictive, observed_data=observed_data_group(data), prior=samples(prior))
    return idata, cm


def make_run_folder(folder: Path, *, chains: int = 2, draws: int = 30, seed: int = 7, divergent: int = 2,
                    warnings: tuple[str, ...] = (), report: bool = True) -> Path:
    """A complete small run folder at ``folder`` (default: 2 chains × 30 draws, two divergent)."""
    from tallyfit.reports import build_report

    idata, cm = fit_groups(chains, draws, seed, divergent=divergent, n_predictive=12 if chains > 2 else 30)
    data = cm.data
    starts = {"site": int(data.series[0].largest_counts[-1])}
    spec = PushForwardSpec(cap=CAP, sites=("site",), starts=tuple(starts.values()),
                           horizons=horizons_with_criterion_e((5.0, 50.0), None), thresholds=(0, 10),
                           forecast_steps=3, forecast_interval=1.0,
                           forecast_from=(float(data.series[0].surveyed_times[-1]),))
    ds = push_forward(FAMILY, idata.posterior, spec, SCENARIOS, workers=1)
    record = RunRecord(
        counts_bytes=COUNTS.read_bytes(), idata=idata, derived=ds, derived_summary=summarise(ds),
        convergence=diagnose(idata, list(CENTRE)), cap_check=check_cap(cm, idata.posterior, idata.posterior_predictive),
        criterion_e_horizons=criterion_e_horizons(None), generation_time=None,
        scenarios=[s.as_dict() for s in SCENARIOS], tol=spec.tol, cap=CAP,
        data={"source": str(COUNTS), "sites": ["site"], "n_counts": data.n_counts, "sha256": data.sha256},
        family={"name": FAMILY.name, "formula": FAMILY.formula, "description": cm.family.describe(cm.priors)},
        settings=SETTINGS, starts=starts, seed=SETTINGS["seed"], warnings=list(warnings))
    return write_run(folder, record, report=build_report if report else None)
