"""The main job, end to end: counts → posterior → push-forward → run folder with report.

Used by ``tallyfit fit``, ``tallyfit demo`` and each site of ``tallyfit batch``.
"""
from __future__ import annotations

import json
import math
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable

import numpy as np
import pandas as pd

from tallyfit.inputs.settings import RunSettings
from tallyfit.infer.data import CountData, load_counts
from tallyfit.infer.derive import PushForwardSpec, horizons_with_iucn, push_forward, summarise
from tallyfit.runfolder.store import CAUTION, staged_folder, write_atomic, write_run_toml
from tallyfit.infer.scenarios import BASELINE


@dataclass
class PipelineOutcome:
    """What a finished run reports back.

    Attributes:
        folder: the run folder.
        passed: whether every diagnostic check passed.
        warnings: messages the user must see.
        headline: a few key numbers for the terminal.
    """

    folder: Path
    passed: bool
    warnings: list[str] = field(default_factory=list)
    headline: dict[str, Any] = field(default_factory=dict)


def _last_sizes(data: CountData, detection_mean: float) -> tuple[tuple[str, ...], tuple[int, ...]]:
    """Each site's start size for forecasts: its last surveyed count (the largest replicate),
    divided by the posterior mean detection probability when counts are incomplete."""
    sites, starts = [], []
    for s in data.series:
        counts = np.asarray(s.counts, dtype=float)
        seen = np.flatnonzero(np.isfinite(counts).any(axis=1))
        last = float(np.nanmax(counts[seen[-1]]))
        sites.append(str(s.site))
        starts.append(int(round(last / detection_mean)) if detection_mean < 1 else int(last))
    return tuple(sites), tuple(starts)


def _summary_rows(parameters: pd.DataFrame, derived: dict[str, Any]) -> pd.DataFrame:
    rows = []
    for name, r in parameters.iterrows():
        rows.append({"kind": "parameter", "scenario": "", "quantity": name, **{k: r[k] for k in r.index}})
    for sc, entry in derived.items():
        if not isinstance(entry, dict):
            continue

        def add(quantity: str, st: dict[str, Any]) -> None:
            rows.append({"kind": "derived", "scenario": sc, "quantity": quantity, "mean": st.get("mean"),
                         "q05": st.get("q_lo"), "q50": st.get("q50"), "q95": st.get("q_hi")})
        rows.append({"kind": "derived", "scenario": sc, "quantity": "stationary_exists_probability",
                     "mean": entry["stationary_exists_probability"]})
        add("stationary_mean", entry["stationary_mean"])
        add("quasi_stationary_mean", entry["quasi_stationary_mean"])
        add("quasi_decay_rate", entry["quasi_decay_rate"])
        for site, st in entry["log10_mean_time_to_extinction"].items():
            add(f"log10_mean_time_to_extinction[{site}]", st)
        for thr, per_h in entry["extinction_probability_all_sites"].items():
            for h, st in per_h.items():
                add(f"extinction_probability[{thr}, horizon={h}]", st)
        for cat, p in entry["iucn_category_probability"].items():
            rows.append({"kind": "derived", "scenario": sc, "quantity": f"iucn_category_probability[{cat}]", "mean": p})
    return pd.DataFrame(rows)


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
        cores: processes for sampling chains (default: PyMC's choice; 1 inside Dask workers).
        workers: processes for the push-forward (default: the machine's cores).

    Returns:
        PipelineOutcome.

    Raises:
        InputError: bad counts or settings (nothing is written).
    """
    from tallyfit.infer.families import get_family
    from tallyfit.infer.fit import fit_counts

    import os

    if cores is None:
        cores = max(1, min(settings.chains, os.cpu_count() or 1))  # chains in parallel on every core
    data = counts if isinstance(counts, CountData) else load_counts(counts)
    family = get_family(settings.rates, immigration=settings.immigration)
    log(f"fitting the {family.name} family to {data.n_counts} counts at {len(data.sites)} site(s) "
        f"from {data.source} ({settings.chains} chains × {settings.draws} draws)")
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        result = fit_counts(data, family, chains=settings.chains, draws=settings.draws, tune=settings.tune,
                            seed=settings.seed, cap=settings.max_size, detection=settings.detection,
                            priors=settings.priors or None, pooling=settings.pooling, progressbar=progress,
                            cores=cores, target_accept=settings.target_accept)
    # our own warnings (e.g. detection estimated without replicate surveys) go to the report
    messages = [str(w.message) for w in caught if w.category.__module__.startswith("tallyfit")]
    messages += [m for m in result.messages if m not in messages]
    post = result.idata.posterior
    if settings.max_draws is not None and post.sizes["chain"] * post.sizes["draw"] > settings.max_draws:
        keep = max(1, settings.max_draws // post.sizes["chain"])
        post = post.isel(draw=np.linspace(0, post.sizes["draw"] - 1, keep).round().astype(int))
    p_mean = float(post["detection"].mean()) if "detection" in post else (
        float(result.detection) if isinstance(result.detection, (int, float)) and result.detection else 1.0)
    sites, starts = _last_sizes(data, p_mean)
    spec = PushForwardSpec(cap=int(result.cap), sites=sites, starts=starts,
                           horizons=horizons_with_iucn(settings.horizons, settings.generation_time),
                           thresholds=tuple(settings.thresholds), generation_time=settings.generation_time)
    scenarios = (BASELINE,) + tuple(settings.scenarios)
    n_draws = post.sizes["chain"] * post.sizes["draw"]
    log(f"pushing {n_draws} draws × {len(scenarios)} scenario(s) through the chain solvers")
    derived = push_forward(family, post, spec, scenarios, progress=progress, workers=workers)
    derived_summary = summarise(derived, level=settings.credible_level)

    diagnostics = dict(result.diagnostics)
    cap_check = dict(result.cap_check) if result.cap_check is not None else {}
    warn = list(messages)
    if not diagnostics.get("passed", False) and not any("convergence" in m.lower() for m in warn):
        failed = [str(f) for f in diagnostics.get("failed", [])]
        warn.append("CONVERGENCE CHECKS FAILED (" + "; ".join(failed) + "): do not use these results; "
                    "run more draws (--draws) or simplify the model")
    if cap_check.get("warning"):
        warn.append(str(cap_check["warning"]))
    base = derived_summary.get("baseline", {})
    if base.get("max_extinction_error_bound", 0) and base["max_extinction_error_bound"] > 1e-6:
        warn.append(f"extinction probabilities carry a numerical error bound up to "
                    f"{base['max_extinction_error_bound']:.1e}")
    above = base.get("max_stationary_mass_above_cap")
    if above is not None and above > 1e-6:
        warn.append(f"the stationary distribution puts up to {above:.1e} of its mass above the cap "
                    f"N={result.cap}: raise --max-size")

    parameters = result.parameters
    summary = {
        "caution": CAUTION,
        "data": {"source": str(data.source), "sites": list(data.sites), "n_counts": int(data.n_counts),
                 "sha256": data.sha256},
        "family": {"name": family.name, "formula": getattr(family, "formula", "")},
        "settings": settings.as_dict(),
        "cap": int(result.cap),
        "starts": dict(zip(sites, [int(s) for s in starts])),
        "parameters": {name: {k: (None if not np.isfinite(v) else float(v)) for k, v in row.items()}
                       for name, row in parameters.iterrows()},
        "derived": derived_summary,
        "diagnostics": diagnostics,
        "cap_check": cap_check,
        "warnings": warn,
    }
    out = Path(out)
    with staged_folder(out) as tmp:
        if isinstance(counts, (str, Path)):
            write_atomic(tmp / "counts.csv", Path(counts).read_bytes())  # the input exactly as read
        else:
            write_atomic(tmp / "counts.csv", data.to_frame().to_csv(index=False))
        result.idata.to_netcdf(str(tmp / "posterior.nc"))
        derived.to_netcdf(tmp / "derived.nc")
        write_atomic(tmp / "summary.json", json.dumps(summary, indent=2, default=_json_default))
        write_atomic(tmp / "summary.csv", _summary_rows(parameters, derived_summary).to_csv(index=False))
        write_run_toml(tmp, {**settings.as_dict(), **{k: v for k, v in result.settings.items()
                                                      if isinstance(v, (int, float, str, bool))}},
                       extra={"run": {"seed": settings.seed, "cap": int(result.cap)}})
        from tallyfit.reports import build_report

        build_report(tmp)
    base_ext = base.get("extinction_probability_all_sites", {}).get("threshold=0", {})
    headline = {"extinction": {h: st["mean"] for h, st in base_ext.items()},
                "iucn": base.get("iucn_category_probability", {}),
                "stationary_exists_probability": base.get("stationary_exists_probability")}
    return PipelineOutcome(out, bool(diagnostics.get("passed", False)), warn, headline)


def _json_default(obj: Any) -> Any:
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating,)):
        return None if not math.isfinite(float(obj)) else float(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    return str(obj)
