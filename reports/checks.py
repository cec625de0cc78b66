"""The checks a reviewer audits, recomputed from the run folder's files.

Convergence (rank-normalised split R-hat, bulk and tail effective sample size; Vehtari,
Gelman, Simpson, Carpenter & Bürkner 2021, Bayesian Analysis 16(2):667–718: R-hat below
1.01, ESS above 400), divergent transitions, the energy Bayesian fraction of missing
information (BFMI; below 0.3 is a warning sign, common practice), PSIS-LOO with Pareto k
(Vehtari, Gelman & Gabry 2017, Stat. Comput. 27:1413–1432: k above 0.7 makes the
estimate unreliable), the cap check and diagnostics recorded in summary.json, the
numerical error bounds in derived.nc and the SHA-256 hashes recorded in run.toml.

Every statistic comes from ArviZ; nothing here re-implements one. Nothing here samples.
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Mapping
from dataclasses import dataclass, field, fields, replace
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from .run_folder import RunFolder, finite_or_none, sha256_of

__all__ = ["Thresholds", "Check", "LooOutcome", "CheckReport", "thresholds_from_summary",
           "convergence_table", "divergence_counts", "bfmi_values", "loo_outcome",
           "recorded_checks", "cap_checks", "numerical_checks", "hash_checks", "run_checks"]


@dataclass(frozen=True)
class Thresholds:
    """Pass/fail limits of the checks.

    Attributes:
        r_hat: R-hat must be below this (Vehtari et al. 2021).
        ess_bulk: bulk ESS must be above this (Vehtari et al. 2021).
        ess_tail: tail ESS must be above this (Vehtari et al. 2021).
        max_divergences: most divergent transitions allowed (0: any divergence fails).
        bfmi: every chain's BFMI must be at least this (common practice).
        pareto_k: Pareto k above this flags an observation (Vehtari et al. 2017).
        error_bound: largest allowed error bound on an extinction probability (tallyfit's
            own tolerance: far below any probability the report quotes).
        mass_above_cap: largest allowed stationary probability beyond the cap (tallyfit's
            own tolerance: the cap then changes no quoted figure).
        near_cap_share: largest allowed posterior-mean quasi-stationary probability at
            sizes of 0.9·N and above (the share infer.fit's cap check allows for simulated sizes).
    """

    r_hat: float = 1.01
    ess_bulk: float = 400.0
    ess_tail: float = 400.0
    max_divergences: int = 0
    bfmi: float = 0.3
    pareto_k: float = 0.7
    error_bound: float = 1e-6
    mass_above_cap: float = 1e-4
    near_cap_share: float = 0.01


@dataclass(frozen=True)
class Check:
    """One check and its outcome.

    Attributes:
        name: short name.
        passed: True or False; None when the check could not be made (then ``detail`` says why).
        detail: what was found, in words and numbers.
        source: where it comes from ("recomputed from posterior.nc", "recorded in summary.json", …).
    """

    name: str
    passed: bool | None
    detail: str
    source: str


@dataclass
class LooOutcome:
    """PSIS-LOO of the log_likelihood group.

    Attributes:
        elpd: expected log pointwise predictive density (None when not computed).
        se: its standard error.
        p_loo: effective number of parameters.
        pareto_k: one k per observation (empty when not computed).
        labels: one label per observation (site and time when the file names them).
        error: why LOO could not be computed, or None.
    """

    elpd: float | None = None
    se: float | None = None
    p_loo: float | None = None
    pareto_k: np.ndarray = field(default_factory=lambda: np.zeros(0))
    labels: list[str] = field(default_factory=list)
    error: str | None = None


@dataclass
class CheckReport:
    """Every check of a run, and the tables behind the convergence checks.

    Attributes:
        thresholds: the limits used.
        checks: every check made, in the order the report shows them.
        convergence: per-parameter R-hat and ESS table (see :func:`convergence_table`).
        divergences: per-chain divergent transitions (empty Series when not recorded).
        bfmi: per-chain BFMI (None when energy is not recorded).
        loo: the PSIS-LOO outcome.
    """

    thresholds: Thresholds
    checks: list[Check]
    convergence: pd.DataFrame
    divergences: pd.Series
    bfmi: np.ndarray | None
    loo: LooOutcome

    @property
    def failed(self) -> list[Check]:
        """The checks that failed (passed is False)."""
        return [c for c in self.checks if c.passed is False]

    @property
    def not_made(self) -> list[Check]:
        """The checks that could not be made (passed is None)."""
        return [c for c in self.checks if c.passed is None]

    @property
    def passed(self) -> bool:
        """True when no check failed."""
        return not self.failed


_THRESHOLD_ALIASES = {"rhat": "r_hat", "r_hat_max": "r_hat", "ess": "ess_bulk", "ess_bulk_min": "ess_bulk",
                      "ess_tail_min": "ess_tail", "divergences": "max_divergences", "bfmi_min": "bfmi",
                      "k": "pareto_k", "pareto_k_max": "pareto_k"}


def thresholds_from_summary(summary: Mapping[str, Any]) -> Thresholds:
    """The limits to apply: the defaults, overridden by summary.json's ``diagnostics.thresholds`` when present.

    Each entry may be a number or a table with "max" or "min" (as infer.fit.THRESHOLDS
    writes them), e.g. ``{"r_hat": {"max": 1.01}, "ess_bulk": {"min": 400}}``.

    Args:
        summary: summary.json as a dict.

    Returns:
        Thresholds (unknown or non-numeric entries are ignored).
    """
    diag = summary.get("diagnostics") if isinstance(summary, Mapping) else None
    given = diag.get("thresholds") if isinstance(diag, Mapping) else None
    out = Thresholds()
    if not isinstance(given, Mapping):
        return out
    names = {f.name for f in fields(Thresholds)}
    changes: dict[str, Any] = {}
    for key, value in given.items():
        k = _THRESHOLD_ALIASES.get(str(key).lower(), str(key).lower())
        if isinstance(value, Mapping):
            value = value.get("max", value.get("min", value.get("value")))
        v = finite_or_none(value)
        if k in names and v is not None:
            changes[k] = int(v) if k == "max_divergences" else v
    return replace(out, **changes)


def _flat_labels(da: xr.DataArray) -> list[str]:
    extra = [d for d in da.dims if d not in ("chain", "draw")]
    if not extra:
        return [str(da.name)]
    grids = np.meshgrid(*[da[d].values for d in extra], indexing="ij")
    return [f"{da.name}[{', '.join(str(g.ravel()[i]) for g in grids)}]" for i in range(grids[0].size)]


def convergence_table(posterior: xr.Dataset, thresholds: Thresholds = Thresholds()) -> pd.DataFrame:
    """R-hat, bulk ESS and tail ESS of every posterior variable (each element of a vector).

    Args:
        posterior: the posterior group (dims chain, draw, ...).
        thresholds: limits for the pass columns.

    Returns:
        DataFrame with columns parameter, r_hat, ess_bulk, ess_tail, r_hat_ok,
        ess_bulk_ok, ess_tail_ok, ok (a value ArviZ cannot compute, NaN, fails).

    Raises:
        ValueError: the posterior has no chain/draw dims.
    """
    import arviz as az

    if "chain" not in posterior.dims or "draw" not in posterior.dims:
        raise ValueError("the posterior group has no chain and draw dimensions")
    rows = []
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        rhat = az.rhat(posterior)
        bulk = az.ess(posterior, method="bulk")
        tail = az.ess(posterior, method="tail")
    for name in posterior.data_vars:
        da = posterior[name]
        labels = _flat_labels(da)
        r = np.asarray(rhat[name].values, dtype=float).ravel()
        b = np.asarray(bulk[name].values, dtype=float).ravel()
        t = np.asarray(tail[name].values, dtype=float).ravel()
        for i, lab in enumerate(labels):
            rows.append((lab, r[i], b[i], t[i]))
    df = pd.DataFrame(rows, columns=["parameter", "r_hat", "ess_bulk", "ess_tail"])
    df["r_hat_ok"] = df["r_hat"] < thresholds.r_hat
    df["ess_bulk_ok"] = df["ess_bulk"] > thresholds.ess_bulk
    df["ess_tail_ok"] = df["ess_tail"] > thresholds.ess_tail
    df["ok"] = df["r_hat_ok"] & df["ess_bulk_ok"] & df["ess_tail_ok"]
    return df


def divergence_counts(idata: Any) -> pd.Series:
    """Divergent transitions per chain.

    Args:
        idata: InferenceData.

    Returns:
        Series indexed by chain (empty when sample_stats has no ``diverging``).
    """
    stats = getattr(idata, "sample_stats", None) if "sample_stats" in idata.groups() else None
    if stats is None or "diverging" not in stats:
        return pd.Series(dtype=int)
    div = stats["diverging"].astype(bool).sum("draw")
    return pd.Series(np.asarray(div.values, dtype=int), index=[str(c) for c in stats["chain"].values])


def bfmi_values(idata: Any) -> np.ndarray | None:
    """Energy BFMI of each chain (ArviZ ``az.bfmi``).

    Args:
        idata: InferenceData.

    Returns:
        float array (one per chain), or None when sample_stats has no ``energy``.
    """
    import arviz as az

    if "sample_stats" not in idata.groups() or "energy" not in idata.sample_stats:
        return None
    return np.asarray(az.bfmi(idata), dtype=float).ravel()


def loo_outcome(idata: Any) -> LooOutcome:
    """PSIS-LOO (``az.loo``, pointwise) of the log_likelihood group.

    Args:
        idata: InferenceData.

    Returns:
        LooOutcome; its ``error`` says why when the group is missing or ArviZ fails.
    """
    import arviz as az

    if "log_likelihood" not in idata.groups():
        return LooOutcome(error="posterior.nc has no log_likelihood group")
    ll = idata.log_likelihood
    names = list(ll.data_vars)
    if not names:
        return LooOutcome(error="the log_likelihood group is empty")
    var = "counts" if "counts" in names else names[0]
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            res = az.loo(idata, pointwise=True, var_name=var)
    except Exception as exc:  # ArviZ raises several types for unusable input
        return LooOutcome(error=f"ArviZ could not compute LOO ({type(exc).__name__}: {exc})")
    k = np.asarray(res.pareto_k.values, dtype=float).ravel()
    da = ll[var]
    obs_dims = [d for d in da.dims if d not in ("chain", "draw")]
    labels = [f"observation {i}" for i in range(k.size)]
    if len(obs_dims) == 1:
        dim = obs_dims[0]
        site = next((c for c in ("obs_site", "site") if c in da.coords and da[c].dims == (dim,)), None)
        time = next((c for c in ("obs_time", "time", "time_to") if c in da.coords and da[c].dims == (dim,)), None)
        if site or time:
            labels = []
            for i in range(k.size):
                parts = []
                if site:
                    parts.append(f"site {da[site].values[i]}")
                if time:
                    parts.append(f"to time {da[time].values[i]:g}" if np.issubdtype(da[time].dtype, np.number)
                                 else f"to time {da[time].values[i]}")
                labels.append(", ".join(parts))
    return LooOutcome(elpd=float(res.elpd_loo), se=float(res.se), p_loo=float(res.p_loo),
                      pareto_k=k, labels=labels)


def _passed_value(entry: Any) -> bool | None:
    if not isinstance(entry, Mapping):
        return None
    for key in ("passed", "ok", "pass"):
        if key in entry and isinstance(entry[key], (bool, np.bool_)):
            return bool(entry[key])
    return None


def _value_text(v: Any) -> str:
    if isinstance(v, bool) or v is None:
        return str(v)
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        return f"{float(v):.4g}"
    if isinstance(v, (list, tuple)) and all(isinstance(x, (int, float)) and not isinstance(x, bool) for x in v):
        return "[" + ", ".join(_value_text(x) for x in v) + "]"
    return str(v)[:200]


def _describe_entry(entry: Mapping[str, Any], skip: tuple[str, ...] = ("name", "passed", "ok", "pass")) -> str:
    for key in ("detail", "message"):
        if isinstance(entry.get(key), str) and entry[key]:
            return entry[key]
    return "; ".join(f"{k} = {_value_text(v)}" for k, v in entry.items() if k not in skip)


def recorded_checks(summary: Mapping[str, Any]) -> list[Check]:
    """The diagnostics summary.json records (from the fit), one Check each, plus its overall verdict.

    Reads the shape infer.fit.diagnose writes — ``parameters`` ({label: {r_hat, ess_bulk,
    ess_tail: {value, threshold, passed}, passed}}), entries such as ``divergences`` and
    ``bfmi`` ({value, threshold, passed}), ``failed`` and ``passed`` — and also a
    ``checks`` list of {name, passed, detail}. ``passed`` becomes the check
    "fit diagnostics (recorded)".

    Args:
        summary: summary.json as a dict.

    Returns:
        list of Check (empty when summary.json has no diagnostics).
    """
    diag = summary.get("diagnostics")
    src = "recorded in summary.json"
    if diag is None:
        return []
    if not isinstance(diag, Mapping):
        return [Check("fit diagnostics (recorded)", None,
                      f"summary.json's diagnostics entry is not a table: {diag!r}"[:300], src)]
    out = []
    for entry in diag.get("checks", []) or []:
        if isinstance(entry, Mapping):
            out.append(Check(str(entry.get("name", "unnamed check")), _passed_value(entry), _describe_entry(entry), src))
    params = diag.get("parameters")
    if isinstance(params, Mapping) and params:
        judged = {str(k): _passed_value(v) for k, v in params.items()}
        bad = [k for k, ok in judged.items() if ok is False]
        known = [ok for ok in judged.values() if ok is not None]
        detail = (f"all {len(known)} parameter entries pass R-hat and ESS" if not bad else
                  f"{len(bad)} of {len(judged)} parameter entries fail R-hat or ESS: " + ", ".join(bad[:8])
                  + (" …" if len(bad) > 8 else ""))
        out.append(Check("R-hat and ESS per parameter", (not bad) if known else None, detail, src))
    for key, entry in diag.items():
        if key in ("checks", "passed", "thresholds", "parameters", "failed") or not isinstance(entry, Mapping):
            continue
        if _passed_value(entry) is not None:
            out.append(Check(str(entry.get("name", key)), _passed_value(entry), _describe_entry(entry), src))
    if "passed" in diag:
        ok = bool(diag["passed"])
        failed = [str(f) for f in diag.get("failed", []) or []] if isinstance(diag.get("failed"), list) else []
        detail = ("the fit recorded that its diagnostics passed" if ok else
                  "the fit recorded that its diagnostics FAILED"
                  + (": " + "; ".join(failed[:6]) + (" …" if len(failed) > 6 else "") if failed else ""))
        out.append(Check("fit diagnostics (recorded)", ok, detail, src))
    else:
        out.append(Check("fit diagnostics (recorded)", None, "summary.json's diagnostics has no 'passed' entry", src))
    return out


def cap_checks(summary: Mapping[str, Any]) -> list[Check]:
    """The cap check recorded in summary.json (whatever its shape: a table, a list of tables or a flag).

    Args:
        summary: summary.json as a dict.

    Returns:
        list of Check (one "cap check" that could not be made when the entry is missing).
    """
    src = "recorded in summary.json"
    cap = summary.get("cap_check")
    if cap is None:
        return [Check("cap check", None, "summary.json has no cap_check entry", src)]
    if isinstance(cap, (bool, np.bool_)):
        return [Check("cap check", bool(cap), "passed" if cap else "failed", src)]
    if isinstance(cap, Mapping):
        if not cap:
            return [Check("cap check", None, "summary.json's cap_check is empty", src)]
        nested = [v for v in cap.values() if isinstance(v, Mapping) and _passed_value(v) is not None]
        if nested and _passed_value(cap) is None:
            return [Check(f"cap check: {k}", _passed_value(v), _describe_entry(v), src)
                    for k, v in cap.items() if isinstance(v, Mapping) and _passed_value(v) is not None]
        return [Check("cap check", _passed_value(cap), _describe_entry(cap), src)]
    if isinstance(cap, list):
        return [Check(f"cap check: {e.get('name', i + 1)}" if isinstance(e, Mapping) else f"cap check {i + 1}",
                      _passed_value(e) if isinstance(e, Mapping) else None,
                      _describe_entry(e) if isinstance(e, Mapping) else str(e), src) for i, e in enumerate(cap)]
    return [Check("cap check", None, str(cap), src)]


def _worst(da: xr.DataArray, mask: xr.DataArray | None = None) -> tuple[float, str | None]:
    """Largest finite value and the scenario it occurs in (NaN, None when there is none)."""
    if mask is not None:
        da = da.where(mask)
    per = da.max(dim=[d for d in da.dims if d != "scenario"], skipna=True)
    vals = np.asarray(per.values, dtype=float)
    if not np.isfinite(vals).any():
        return math.nan, None
    i = int(np.nanargmax(vals))
    return float(vals[i]), str(per["scenario"].values[i])


def numerical_checks(derived: xr.Dataset, thresholds: Thresholds = Thresholds()) -> list[Check]:
    """Numerical error bounds of the push-forward (derived.nc), each naming the scenario of its worst value.

    Args:
        derived: the push-forward Dataset.
        thresholds: limits (error_bound, mass_above_cap, near_cap_share).

    Returns:
        Checks on the largest extinction-probability error bound, the largest stationary
        probability beyond the cap, the quasi-stationary mass near the cap (sizes at or
        above 0.9·N: a sign that the cap, not the rates, shapes the distribution), and
        draws whose quasi-stationary law could not be computed.
    """
    src = "recomputed from derived.nc"
    cap = int(derived["size"].max())
    out = []
    if "extinction_error_bound" in derived:
        da = derived["extinction_error_bound"]
        missing = int(np.isnan(np.asarray(da.values, dtype=float)).sum())
        worst, sc = _worst(da)
        ok = bool(np.isfinite(worst) and worst <= thresholds.error_bound and missing == 0)
        out.append(Check("extinction error bound", ok,
                         f"largest error bound on an extinction probability: {worst:.3g}"
                         + (f" (scenario {sc})" if sc else "") + f"; limit {thresholds.error_bound:.0e}"
                         + (f"; {missing} values missing" if missing else ""), src))
    if "stationary_mass_above_cap" in derived and "stationary_exists" in derived:
        exists = derived["stationary_exists"].astype(bool)
        if not bool(exists.any()):
            out.append(Check("stationary mass above the cap", True,
                             "no draw has a stationary distribution, so the cap cuts none off", src))
        else:
            worst, sc = _worst(derived["stationary_mass_above_cap"], exists)
            ok = bool(np.isfinite(worst) and worst <= thresholds.mass_above_cap)
            out.append(Check("stationary mass above the cap", ok,
                             f"largest stationary probability beyond the cap N = {cap}: {worst:.3g}"
                             + (f" (scenario {sc})" if sc else "") + f"; limit {thresholds.mass_above_cap:.0e}"
                             + ("" if ok else "; raise the size cap (--max-size) and refit"), src))
    if "quasi_pmf" in derived:
        near = int(math.floor(0.9 * cap))
        share = derived["quasi_pmf"].sel(size=slice(near, cap)).sum("size", skipna=False)
        mean_share = share.mean(dim=["chain", "draw"], skipna=True)
        vals = np.asarray(mean_share.values, dtype=float)
        if np.isfinite(vals).any():
            i = int(np.nanargmax(vals))
            worst, sc = float(vals[i]), str(mean_share["scenario"].values[i])
            ok = worst <= thresholds.near_cap_share
            out.append(Check("quasi-stationary mass near the cap", ok,
                             f"posterior mean probability at sizes {near}..{cap} (top tenth below the cap): "
                             f"{worst:.3g} (scenario {sc}); limit {thresholds.near_cap_share:g}"
                             + ("" if ok else "; the cap shapes the distribution: raise --max-size and refit"), src))
    if "quasi_decay_rate" in derived:
        bad = int(np.isnan(np.asarray(derived["quasi_decay_rate"].values, dtype=float)).sum())
        total = int(derived["quasi_decay_rate"].size)
        out.append(Check("quasi-stationary law computed", bad == 0,
                         f"computed for every one of {total} draw-scenario pairs" if bad == 0
                         else f"could not be computed for {bad} of {total} draw-scenario pairs", src))
    return out


def hash_checks(rf: RunFolder) -> list[Check]:
    """SHA-256 of counts.csv and posterior.nc against the hashes recorded in run.toml.

    Args:
        rf: the run folder.

    Returns:
        one Check per file (None when no hash is recorded or the file is missing).
    """
    src = "recomputed from the files and run.toml"
    hashes = rf.run.get("hashes", {}) if isinstance(rf.run, Mapping) else {}
    out = []
    for name in ("counts.csv", "posterior.nc"):
        want = hashes.get(name) if isinstance(hashes, Mapping) else None
        path = rf.path / name
        if not path.is_file():
            out.append(Check(f"hash of {name}", None, f"{name} is missing", src))
            continue
        got = sha256_of(path)
        if not want:
            out.append(Check(f"hash of {name}", None, f"run.toml records no hash (file SHA-256 {got})", src))
        elif str(want).lower() == got:
            out.append(Check(f"hash of {name}", True, f"SHA-256 {got} matches run.toml", src))
        else:
            out.append(Check(f"hash of {name}", False,
                             f"SHA-256 {got} differs from {want} recorded in run.toml: the file changed after the run",
                             src))
    return out


def run_checks(rf: RunFolder) -> CheckReport:
    """Every check of a run folder, recomputed where the files allow.

    Args:
        rf: the run folder.

    Returns:
        CheckReport.
    """
    th = thresholds_from_summary(rf.summary)
    src = "recomputed from posterior.nc"
    checks: list[Check] = []
    conv = convergence_table(rf.idata.posterior, th)
    n_par = len(conv)
    bad_r = conv.loc[~conv["r_hat_ok"], "parameter"].tolist()
    bad_b = conv.loc[~conv["ess_bulk_ok"], "parameter"].tolist()
    bad_t = conv.loc[~conv["ess_tail_ok"], "parameter"].tolist()

    def listing(names: list[str]) -> str:
        return ", ".join(names[:6]) + (f" and {len(names) - 6} more" if len(names) > 6 else "")

    checks.append(Check("R-hat", not bad_r,
                        f"largest {conv['r_hat'].max():.4f} over {n_par} parameters (limit: below {th.r_hat:g})"
                        + (f"; not below the limit: {listing(bad_r)}" if bad_r else ""), src))
    checks.append(Check("bulk ESS", not bad_b,
                        f"smallest {conv['ess_bulk'].min():.0f} (limit: above {th.ess_bulk:g})"
                        + (f"; too small: {listing(bad_b)}" if bad_b else ""), src))
    checks.append(Check("tail ESS", not bad_t,
                        f"smallest {conv['ess_tail'].min():.0f} (limit: above {th.ess_tail:g})"
                        + (f"; too small: {listing(bad_t)}" if bad_t else ""), src))
    div = divergence_counts(rf.idata)
    if div.empty:
        checks.append(Check("divergences", None, "sample_stats records no 'diverging'", src))
    else:
        total = int(div.sum())
        n_draws = int(rf.idata.posterior.sizes["chain"] * rf.idata.posterior.sizes["draw"])
        checks.append(Check("divergences", total <= th.max_divergences,
                            f"{total} divergent transitions in {n_draws} draws (allowed: {th.max_divergences})", src))
    bfmi = bfmi_values(rf.idata)
    if bfmi is None:
        checks.append(Check("BFMI", None, "sample_stats records no 'energy'", src))
    else:
        low = [i for i, v in enumerate(bfmi) if not v >= th.bfmi]
        checks.append(Check("BFMI", not low,
                            f"smallest {np.nanmin(bfmi):.3f} over {bfmi.size} chains (limit: at least {th.bfmi:g})"
                            + (f"; low in chain(s) {', '.join(str(i) for i in low)}" if low else ""), src))
    loo = loo_outcome(rf.idata)
    if loo.error:
        checks.append(Check("PSIS-LOO Pareto k", None, loo.error, src))
    else:
        high = int((loo.pareto_k > th.pareto_k).sum())
        checks.append(Check("PSIS-LOO Pareto k", high == 0,
                            f"{high} of {loo.pareto_k.size} observations with k above {th.pareto_k:g} "
                            f"(largest {np.nanmax(loo.pareto_k):.2f})", src))
    checks += recorded_checks(rf.summary)
    checks += cap_checks(rf.summary)
    checks += numerical_checks(rf.derived, th)
    checks += hash_checks(rf)
    return CheckReport(thresholds=th, checks=checks, convergence=conv, divergences=div, bfmi=bfmi, loo=loo)
