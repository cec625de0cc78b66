"""Rates in, derived quantities out: ``tallyfit solve`` and ``tallyfit simulate``.

The rates file is read by :mod:`tallyfit.inputs.rates_file`; this module runs the chain
solvers on it (``solve``) or simulates counts from it (``simulate``).
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd

from tallyfit.chain import BirthDeathChain
from tallyfit.infer.criterion_e import CATEGORIES, criterion_e_category, criterion_e_horizons
from tallyfit.infer.errors import InputError
from tallyfit.inputs.rates_file import RateSpecFile

__all__ = ["solve_rates", "simulate_counts"]


def solve_rates(spec: RateSpecFile) -> dict[str, Any]:
    """Derived quantities for one set of rates (plain data, ready for JSON).

    Raises:
        RateError: a chain solver refuses the rates (they were checked when the file was read).
    """
    chain = BirthDeathChain(spec.birth, spec.death)
    out: dict[str, Any] = {"cap": int(spec.birth.size - 1), "start": spec.start}
    st = (BirthDeathChain(*spec.continuation) if spec.continuation else chain).stationary()
    out["stationary_exists"] = bool(st.exists)
    out["stationary_reason"] = st.reason
    if st.exists:
        out["stationary_mean"] = st.mean
        out["stationary_mass_above_cap"] = float(st.pmf[spec.birth.size:].sum()) + st.tail_bound
    b0 = spec.birth.copy()
    b0[0] = 0.0
    closed = BirthDeathChain(b0, spec.death)
    try:
        qs = closed.quasi_stationary()
        out["quasi_stationary_mean"] = qs.mean
        out["quasi_decay_rate"] = qs.decay_rate
    except ValueError as exc:
        out["quasi_stationary"] = f"not defined: {exc}"
    log_t = float(chain.mean_time_to_extinction([spec.start], log=True)[0])
    out["log10_mean_time_to_extinction"] = log_t / np.log(10)
    out["mean_time_to_extinction"] = float(np.exp(log_t)) if log_t < 700 else "inf (beyond float range)"
    hz = criterion_e_horizons(spec.generation_time)
    times = sorted(set(spec.horizons) | set(hz.values()))
    curves = {}
    for k in spec.thresholds:
        c = closed.extinction_curve(spec.start, times, threshold=k)
        curves[f"threshold={k}"] = {f"{t:g}": float(p) for t, p in zip(times, c.probability)}
        curves[f"threshold={k} error_bound"] = float(c.error_bound.max())
    out["extinction_probability"] = curves
    if 0 in spec.thresholds:
        ext = closed.extinction_curve(spec.start, [hz["CR"], hz["EN"], hz["VU"]]).probability
        out["iucn_criterion_e"] = CATEGORIES[int(criterion_e_category(ext[0], ext[1], ext[2]))]
        out["iucn_horizons_years"] = hz
    return out


def simulate_counts(spec: RateSpecFile, times: list[float], *, sites: int = 1, seed: int | None = None) -> pd.DataFrame:
    """Exact simulated counts (columns time, count[, site]) from the rates' start size at time 0
    (binomially thinned when the file gives a detection probability below 1).

    Raises:
        InputError: bad times or number of sites.
    """
    t = np.asarray(times, dtype=float)
    if t.size == 0 or np.any(~np.isfinite(t)) or np.any(t < 0) or np.any(np.diff(t) <= 0):
        raise InputError("--times must be increasing, finite and >= 0", source="--times")
    if sites < 1:
        raise InputError("--sites must be >= 1", source="--sites")
    chain = BirthDeathChain(spec.birth, spec.death)
    rng = np.random.default_rng(seed)
    paths = chain.simulate(spec.start, t, n_paths=sites, seed=rng)
    if spec.detection < 1:
        paths = rng.binomial(paths, spec.detection)
    tvals = [int(v) for v in t] if np.all(t == np.round(t)) else list(t)  # keep whole times whole
    rows = [{"site": f"site {i + 1}", "time": tt, "count": int(c)} for i in range(sites)
            for tt, c in zip(tvals, paths[i])]
    table = pd.DataFrame(rows)
    return table if sites > 1 else table.drop(columns="site")
