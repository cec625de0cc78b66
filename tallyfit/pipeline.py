"""The main job, end to end: counts → posterior → push-forward → run folder with report.

Used by ``tallyfit fit``, ``tallyfit demo`` and each site of ``tallyfit batch``.
"""
from __future__ import annotations

import os
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from tallyfit.infer.counts import CountData
from tallyfit.infer.criterion_e import criterion_e_horizons, horizons_with_criterion_e
from tallyfit.infer.errors import InputError
from tallyfit.infer.units import time_unit
from tallyfit.infer.families import get_family
from tallyfit.infer.fit import FitResult, fit_counts
from tallyfit.infer.model import Environment
from tallyfit.infer.pushforward import PushForwardSpec, push_forward, summarise
from tallyfit.infer.scenarios import BASELINE
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.inputs.covariates_csv import load_covariates
from tallyfit.inputs.settings import RunSettings
from tallyfit.runfolder.audit import derived_checks
from tallyfit.runfolder.store import claim_folder
from tallyfit.runfolder.writer import RunRecord, write_run

__all__ = ["PipelineOutcome", "run_pipeline", "start_sizes", "environment_of"]


@dataclass
class PipelineOutcome:
    """What a finished run reports back.

    Attributes:
        folder: the run folder.
        passed: whether every convergence check passed.
        warnings: messages the user must see.
        headline: a few key numbers for the terminal.
    """

    folder: Path
    passed: bool
    warnings: list[str] = field(default_factory=list)
    headline: dict[str, Any] = field(default_factory=dict)


def start_sizes(data: CountData, detection_mean: float) -> dict[str, int]:
    """Each site's start size for forecasts: its last surveyed count (the largest replicate),
    divided by the posterior mean detection probability when counts miss animals.

    Args:
        data: the counts.
        detection_mean: posterior mean detection probability (1 for exact counts).

    Returns:
        {site: size}, in site order.
    """
    out = {}
    for s in data.series:
        last = float(s.largest_counts[-1])
        out[str(s.site)] = int(round(last / detection_mean)) if detection_mean < 1 else int(last)
    return out


#: Future censuses the forecast covers.
FORECAST_STEPS = 5


def forecast_timing(data: CountData, whole: bool) -> tuple[float, tuple[float, ...]]:
    """The forecast's census interval (the data's median interval, whole time units when the
    forecast steps through good and bad years) and each site's last census time.

    Args:
        data: the counts.
        whole: round the interval to whole time units (at least 1).

    Returns:
        (interval, last times in site order).
    """
    gaps = np.concatenate([np.diff(s.surveyed_times) for s in data.series])
    interval = float(np.median(gaps)) if gaps.size else 1.0
    if whole:
        interval = float(max(1, round(interval)))
    return interval, tuple(float(s.surveyed_times[-1]) for s in data.series)


def environment_of(settings: RunSettings) -> Environment:
    """The good-and-bad-years and covariate part of the model, from the settings.

    Raises:
        InputError: an unreadable or malformed covariate file.
    """
    return Environment(varying=None if settings.varying_years == "none" else settings.varying_years,
                       covariates=load_covariates(settings.covariates_file) if settings.covariates_file else None,
                       births=settings.birth_covariates, deaths=settings.death_covariates)


def _thinned(result: FitResult, max_draws: int | None) -> Any:
    post = result.idata.posterior
    if max_draws is not None and post.sizes["chain"] * post.sizes["draw"] > max_draws:
        keep = max(1, max_draws // post.sizes["chain"])
        post = post.isel(draw=np.linspace(0, post.sizes["draw"] - 1, keep).round().astype(int))
    return post


def run_pipeline(counts: str | Path | CountData, settings: RunSettings, out: str | Path, *,
                 progress: bool = True, log: Callable[[str], None] = print, cores: int | None = None,
                 workers: int | None = None) -> PipelineOutcome:
    """Fit, push forward and write a complete run folder.

    Args:
        counts: path of a counts CSV (or loaded CountData).
        settings: resolved run settings.
        out: run folder to create (replaced only when the new run is complete).
        progress: show progress bars.
        log: where progress messages go.
        cores: processes for sampling chains (default: one per chain, at most the machine's
            cores; 1 inside Dask workers).
        workers: processes for the push-forward (default: the machine's cores).

    Returns:
        PipelineOutcome.

    Raises:
        InputError: bad counts or settings (nothing is written).
        FolderInUseError: another run is writing ``out`` (an InputError; refused before any work).
        OSError: the run folder cannot be written (nothing partial is left).
    """
    # one run at a time into a folder: a second one is refused at once, before it fits anything
    with claim_folder(out, log=log):
        return _fit_and_write(counts, settings, out, progress=progress, log=log, cores=cores, workers=workers)


def _fit_and_write(counts: str | Path | CountData, settings: RunSettings, out: str | Path, *, progress: bool,
                   log: Callable[[str], None], cores: int | None, workers: int | None) -> PipelineOutcome:
    """:func:`run_pipeline`'s work once the output folder is claimed (same arguments)."""
    from tallyfit.reports import build_report

    if cores is None:
        cores = max(1, min(settings.chains, os.cpu_count() or 1))  # chains in parallel on every core
    data = counts if isinstance(counts, CountData) else load_counts(counts)
    family = get_family(settings.rates, immigration=settings.immigration)
    environment = environment_of(settings)
    horizons = horizons_with_criterion_e(settings.horizons, settings.generation_time)
    if environment.varying and any(h != round(h) for h in horizons):
        raise InputError(f"with good and bad years the forecasts step one time unit at a time, so every horizon "
                         f"must be a whole number of time units; got {', '.join(f'{h:g}' for h in horizons)}",
                         source="derive.horizons",
                         hint="use whole horizons, and a generation time whose 3 and 5 generations are whole")
    unit = time_unit(settings.time_unit, np.concatenate([s.times for s in data.series]))
    log(f"time unit: {unit.reason}")
    log(f"fitting the {family.name} family to {data.n_counts} counts at {len(data.sites)} site(s) "
        f"from {data.source} ({settings.chains} chains × {settings.draws} draws)")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fit_counts(data, family, chains=settings.chains, draws=settings.draws, tune=settings.tune,
                            seed=settings.seed, cap=settings.max_size, detection=settings.detection,
                            priors=settings.priors or None, pooling=settings.pooling, progressbar=progress,
                            cores=cores, target_accept=settings.target_accept,
                            credible_level=settings.credible_level, environment=environment,
                            accept_jumps=settings.accept_jumps, unit=unit, log=log)
    # our own warnings (e.g. detection estimated without replicate surveys) go to the report
    messages = [str(w.message) for w in caught if w.category.__module__.startswith("tallyfit")]
    messages += [m for m in result.messages if m not in messages]
    post = _thinned(result, settings.max_draws)
    p_mean = float(post["detection"].mean()) if "detection" in post else (
        float(result.detection) if isinstance(result.detection, float) else 1.0)
    starts = start_sizes(data, p_mean)
    interval, last_times = forecast_timing(data, whole=environment.varying is not None)
    spec = PushForwardSpec(cap=int(result.cap), sites=tuple(starts), starts=tuple(starts.values()),
                           horizons=horizons,
                           thresholds=tuple(settings.thresholds), generation_time=settings.generation_time,
                           varying=environment.varying, birth_covariates=environment.births,
                           death_covariates=environment.deaths, forecast_steps=FORECAST_STEPS,
                           forecast_interval=interval, forecast_from=last_times,
                           future_covariates=dict(settings.future_covariates))
    scenarios = (BASELINE,) + tuple(settings.scenarios)
    log(f"pushing {post.sizes['chain'] * post.sizes['draw']} draws × {len(scenarios)} scenario(s) through the "
        "chain solvers")
    # the fitted family (adapted to the data: per-size knots placed), not a fresh one
    derived = push_forward(result.family, post, spec, scenarios, progress=progress, workers=workers)
    derived_summary = summarise(derived, level=settings.credible_level)

    warn = list(messages)
    if not result.passed and not any("convergence" in m.lower() for m in warn):
        warn.append("CONVERGENCE CHECKS FAILED (" + "; ".join(result.diagnostics.failed) + "): do not use these "
                    "results; run more draws (--draws) or simplify the model")
    warn += [f"{c.name}: {c.detail}" for c in derived_checks(derived, int(result.cap)) if c.passed is False]

    source = Path(counts) if isinstance(counts, (str, Path)) else None
    record = RunRecord(
        counts_bytes=source.read_bytes() if source is not None else data.to_frame().to_csv(index=False).encode(),
        idata=result.idata, derived=derived, derived_summary=derived_summary, convergence=result.diagnostics,
        cap_check=result.cap_check, criterion_e_horizons=criterion_e_horizons(settings.generation_time),
        generation_time=settings.generation_time, scenarios=[s.as_dict() for s in scenarios], tol=spec.tol,
        cap=int(result.cap),
        data={"source": str(data.source), "sites": list(data.sites), "n_counts": int(data.n_counts),
              "sha256": data.sha256, "time_unit": unit.name, "time_units": unit.plural, "time_unit_reason": unit.reason},
        family={"name": result.family.name, "formula": result.family.formula,
                "description": result.family.describe(result.model.priors if result.model else None)},
        settings={**settings.as_dict(), "cap": int(result.cap), "cap_rule": result.settings["cap_rule"]},
        starts=starts, seed=settings.seed, warnings=warn,
        environment={"varying_years": settings.varying_years,
                     "covariates": {"births": list(environment.births), "deaths": list(environment.deaths),
                                    "future": dict(settings.future_covariates)},
                     "quadrature_check": result.quadrature_check})
    folder = write_run(out, record, report=build_report)
    base = derived_summary["baseline"]
    headline = {"extinction": {h: st["mean"] for h, st in base["extinction_probability_all_sites"]["threshold=0"].items()}
                if "threshold=0" in base["extinction_probability_all_sites"] else {},
                "iucn": base["iucn_category_probability"],
                "stationary_exists_probability": base["stationary_exists_probability"], "time_unit": unit}
    return PipelineOutcome(folder, result.passed, warn, headline)
