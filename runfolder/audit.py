"""The one audit of a run folder: what ``tallyfit audit`` prints and the report shows.

Every check is recomputed from the files where the files allow (ArviZ for the
statistics, with the limits of :mod:`tallyfit.infer.diagnostics`); where summary.json
records a verdict on the same thing, the one line says whether the two agree, so a
problem is listed once and names both sources. Checks:

* every file of the schema present, and the SHA-256 of counts.csv and posterior.nc as
  run.toml recorded them;
* R-hat, bulk ESS, tail ESS, divergent transitions and E-BFMI recomputed from
  posterior.nc, against summary.json's recorded verdict;
* PSIS-LOO Pareto k (a warning: it speaks of model comparison, not of the posterior);
* year-to-year swings of the counts against the posterior predictive (a warning: a
  model without good and bad years that cannot swing as much as the counts);
* the fit's cap check and, with good and bad years, its quadrature check, as recorded
  (they need the model, which a run folder does not hold);
* the push-forward's numerical bounds in derived.nc.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import xarray as xr

from tallyfit.infer.diagnostics import LIMITS, Convergence, Limits, SpreadCheck, diagnose, pareto_k, spread_check

from . import schema as S
from .reader import RunFolder, RunFolderError, open_run, read_run_toml
from .store import sha256_file

__all__ = ["Check", "Audit", "audit_folder", "audit_run", "derived_checks"]

_POSTERIOR = "recomputed from posterior.nc"
_DERIVED = "recomputed from derived.nc"


@dataclass(frozen=True)
class Check:
    """One check and its outcome.

    Attributes:
        name: short name.
        passed: True or False; None when the check could not be made (``detail`` says why).
        detail: what was found, in words and numbers.
        source: where it comes from ("recomputed from posterior.nc; summary.json agrees", ...).
        blocking: a failure fails the run (False: a warning, e.g. Pareto k).
    """

    name: str
    passed: bool | None
    detail: str
    source: str
    blocking: bool = True


@dataclass
class Audit:
    """Every check of a run folder.

    Attributes:
        checks: in the order shown.
        convergence: the recomputed diagnostics (None when posterior.nc could not be judged).
        pareto_k: one Pareto k per observation (empty when LOO could not be computed).
        limits: the limits applied.
        spread: the posterior predictive check of year-to-year swings (None when not computed).
    """

    checks: list[Check] = field(default_factory=list)
    convergence: Convergence | None = None
    pareto_k: np.ndarray = field(default_factory=lambda: np.zeros(0))
    limits: Limits = LIMITS
    spread: SpreadCheck | None = None

    @property
    def failed(self) -> list[Check]:
        """Blocking checks that failed."""
        return [c for c in self.checks if c.passed is False and c.blocking]

    @property
    def warnings(self) -> list[Check]:
        """Non-blocking checks that failed."""
        return [c for c in self.checks if c.passed is False and not c.blocking]

    @property
    def not_made(self) -> list[Check]:
        """Checks that could not be made."""
        return [c for c in self.checks if c.passed is None]

    @property
    def passed(self) -> bool:
        """True when no blocking check failed and none of them could not be made."""
        return not self.failed and not any(c.blocking for c in self.not_made)


def _listing(names: list[str]) -> str:
    return ", ".join(names[:6]) + (f" and {len(names) - 6} more" if len(names) > 6 else "")


def _file_checks(rf_path: Path, skip: tuple[str, ...] = ()) -> list[Check]:
    missing = [n for n in S.RUN_FILES if n not in skip and not (rf_path / n).is_file()]
    return [Check("files", not missing, "every file of a run folder is present" if not missing
                  else f"missing: {', '.join(missing)}", "the run folder")]


def _hash_checks(folder: Path, run: dict | None) -> list[Check]:
    src = "recomputed from the files, against run.toml"
    out = []
    hashes = run["hashes"] if run is not None else {}
    for name in S.HASHED_FILES:
        path = folder / name
        if not path.is_file():
            out.append(Check(f"hash of {name}", False, f"{name} is missing", src))
        elif name not in hashes:
            out.append(Check(f"hash of {name}", None, "run.toml records no hash for it", src))
        else:
            try:
                got = sha256_file(path)
            except OSError as exc:  # unreadable (permissions, a failing disk): a failed check, not a crash
                out.append(Check(f"hash of {name}", False, f"{name} cannot be read ({exc.strerror or exc})", src))
                continue
            ok = got == str(hashes[name]).lower()
            out.append(Check(f"hash of {name}", ok, f"SHA-256 {got} matches run.toml" if ok else
                             f"SHA-256 {got} differs from {hashes[name]} recorded in run.toml: the file "
                             "changed after the run", src))
    return out


def _convergence_checks(rf: RunFolder, limits: Limits) -> tuple[list[Check], Convergence | None]:
    names = [str(v) for v in rf.idata.posterior.data_vars]
    try:
        conv = diagnose(rf.idata, names, level=rf.credible_level, limits=limits)
    except (ValueError, KeyError) as exc:
        return [Check("convergence", None, f"posterior.nc cannot be judged ({exc})", _POSTERIOR)], None
    t = conv.table
    bad = {k: t.index[~t[f"{k}_ok"]].tolist() for k in ("r_hat", "ess_bulk", "ess_tail")}
    out = [
        Check("R-hat", not bad["r_hat"], f"largest {t['r_hat'].max():.4f} over {len(t)} parameter entries "
              f"(limit: below {limits.r_hat:g})" + (f"; not below it: {_listing(bad['r_hat'])}" if bad["r_hat"] else ""),
              _POSTERIOR),
        Check("bulk ESS", not bad["ess_bulk"], f"smallest {t['ess_bulk'].min():.0f} (limit: above {limits.ess_bulk:g})"
              + (f"; too small: {_listing(bad['ess_bulk'])}" if bad["ess_bulk"] else ""), _POSTERIOR),
        Check("tail ESS", not bad["ess_tail"], f"smallest {t['ess_tail'].min():.0f} (limit: above {limits.ess_tail:g})"
              + (f"; too small: {_listing(bad['ess_tail'])}" if bad["ess_tail"] else ""), _POSTERIOR),
    ]
    n_draws = int(rf.idata.posterior.sizes["chain"] * rf.idata.posterior.sizes["draw"])
    if conv.divergences:
        out.append(Check("divergences", conv.n_divergent <= limits.divergences,
                         f"{conv.n_divergent} divergent transitions in {n_draws} draws (allowed: {limits.divergences})",
                         _POSTERIOR))
    else:
        out.append(Check("divergences", None, "sample_stats records no 'diverging'", _POSTERIOR))
    if conv.bfmi:
        low = [i for i, v in enumerate(conv.bfmi) if not v > limits.bfmi]
        out.append(Check("E-BFMI", not low, f"smallest {min(conv.bfmi):.3f} over {len(conv.bfmi)} chains (limit: "
                         f"above {limits.bfmi:g})" + (f"; low in chain(s) {', '.join(map(str, low))}" if low else ""),
                         _POSTERIOR))
    else:
        out.append(Check("E-BFMI", None, "sample_stats records no 'energy'", _POSTERIOR))
    # one line per finding: the recorded verdict is named beside the recomputed one
    recorded = rf.summary["diagnostics"]["passed"] if rf.summary is not None else None
    if recorded is None:
        agree = "summary.json is not available"
    elif bool(recorded) == conv.passed:
        agree = "summary.json records the same verdict"
    else:
        agree = f"summary.json records the fit's diagnostics as {'passed' if recorded else 'failed'}: it disagrees"
    out = [Check(c.name, c.passed, c.detail, f"{c.source}; {agree}") for c in out]
    if recorded is not None and bool(recorded) != conv.passed:
        out.append(Check("recorded verdict", False, "summary.json's diagnostics.passed is "
                         f"{bool(recorded)}, the files give {conv.passed}", "summary.json against posterior.nc"))
    return out, conv


def _loo_check(rf: RunFolder, limits: Limits) -> tuple[Check, np.ndarray]:
    try:
        k = pareto_k(rf.idata)
    except Exception as exc:  # ArviZ raises many types for a log_likelihood it cannot use
        return Check("PSIS-LOO Pareto k", None, f"not computed ({type(exc).__name__}: {exc})", _POSTERIOR,
                     blocking=False), np.zeros(0)
    high = int((k > limits.pareto_k).sum())
    return Check("PSIS-LOO Pareto k", high == 0, f"{high} of {k.size} observations with k above {limits.pareto_k:g} "
                 f"(largest {np.nanmax(k):.2f}); LOO comparisons involving them are unreliable", _POSTERIOR,
                 blocking=False), k


def _spread_check(rf: RunFolder) -> tuple[Check, SpreadCheck | None]:
    name = "year-to-year swings (posterior predictive)"
    try:
        sc = spread_check(rf.idata)
    except (ValueError, KeyError) as exc:
        return Check(name, None, f"not computed ({exc})", _POSTERIOR, blocking=False), None
    detail = (f"SD of one-step log changes: counts {sc.observed:.3g}, simulated {sc.predicted[0]:.3g} "
              f"(90% {sc.predicted[1]:.3g} to {sc.predicted[2]:.3g}); p = {sc.p_value:.3f}")
    if sc.too_calm:
        detail += ("; the counts swing more from one census to the next than the model allows: good and bad "
                   "years (--varying-years births) may fit better")
    return Check(name, not sc.too_calm, detail, _POSTERIOR, blocking=False), sc


def _cap_check(rf: RunFolder) -> Check:
    src = "recorded in summary.json (the fit's own check)"
    cap = rf.summary_section("cap_check")
    if cap is None:
        return Check("cap check", None, "summary.json is not available", src)
    return Check("cap check", bool(cap["ok"]), str(cap["message"]), src)


def _quadrature_check(rf: RunFolder) -> Check | None:
    """The fit's own measurement of the quadrature over good and bad years, as recorded."""
    env = rf.summary_section("environment")
    quad = None if env is None else env.get("quadrature_check")
    if quad is None:
        return None
    return Check("quadrature over good and bad years", bool(quad["ok"]), str(quad["message"]),
                 "recorded in summary.json (the fit's own check)")


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


def derived_checks(derived: xr.Dataset, cap: int, limits: Limits = LIMITS) -> list[Check]:
    """The push-forward's numerical bounds, each naming the scenario of its worst value.

    Args:
        derived: the push-forward Dataset.
        cap: the size cap N.
        limits: the limits.

    Returns:
        Checks on the largest extinction-probability error bound, the largest stationary
        probability beyond the cap, the quasi-stationary mass at sizes of 0.9·N and
        above (the cap, not the rates, then shapes the distribution), and draws whose
        quasi-stationary law could not be computed.
    """
    da = derived["extinction_error_bound"]
    missing = int(np.isnan(np.asarray(da.values, dtype=float)).sum())
    worst, sc = _worst(da)
    out = [Check("extinction error bound", bool(np.isfinite(worst) and worst <= limits.extinction_error_bound
                                                 and missing == 0),
                 f"largest error bound on an extinction probability: {worst:.3g}" + (f" (scenario {sc})" if sc else "")
                 + f"; limit {limits.extinction_error_bound:.0e}" + (f"; {missing} values missing" if missing else ""),
                 _DERIVED)]
    exists = derived["stationary_exists"].astype(bool)
    if not bool(exists.any()):
        out.append(Check("stationary mass above the cap", True,
                         "no draw has a stationary distribution, so the cap cuts none off", _DERIVED))
    else:
        worst, sc = _worst(derived["stationary_mass_above_cap"], exists)
        ok = bool(np.isfinite(worst) and worst <= limits.stationary_mass_above_cap)
        out.append(Check("stationary mass above the cap", ok,
                         f"largest stationary probability beyond the cap N = {cap}: {worst:.3g}"
                         + (f" (scenario {sc})" if sc else "") + f"; limit {limits.stationary_mass_above_cap:.0e}"
                         + ("" if ok else "; raise the size cap (--max-size) and refit"), _DERIVED))
    near = int(math.floor(0.9 * cap))
    share = derived["quasi_pmf"].sel(size=slice(near, cap)).sum("size", skipna=False).mean(["chain", "draw"],
                                                                                           skipna=True)
    vals = np.asarray(share.values, dtype=float)
    if np.isfinite(vals).any():
        i = int(np.nanargmax(vals))
        ok = bool(vals[i] <= limits.quasi_mass_near_cap)
        out.append(Check("quasi-stationary mass near the cap", ok,
                         f"posterior mean probability at sizes {near}..{cap} (top tenth below the cap): {vals[i]:.3g} "
                         f"(scenario {share['scenario'].values[i]}); limit {limits.quasi_mass_near_cap:g}"
                         + ("" if ok else "; the cap shapes the distribution: raise --max-size and refit"), _DERIVED))
    bad = int(np.isnan(np.asarray(derived["quasi_decay_rate"].values, dtype=float)).sum())
    total = int(derived["quasi_decay_rate"].size)
    out.append(Check("quasi-stationary law computed", bad == 0, f"computed for every one of {total} draw-scenario "
                     "pairs" if bad == 0 else f"could not be computed for {bad} of {total} draw-scenario pairs",
                     _DERIVED))
    return out


def audit_folder(rf: RunFolder, limits: Limits = LIMITS, *, report_written: bool = True) -> Audit:
    """Every check of an opened run folder.

    Args:
        rf: the run folder (:func:`~tallyfit.runfolder.reader.open_run`).
        limits: the limits.
        report_written: False while the report itself is being built (report.html is
            then not expected yet).

    Returns:
        Audit.
    """
    audit = Audit(limits=limits)
    audit.checks += _file_checks(rf.path, () if report_written else ("report.html",))
    audit.checks += _hash_checks(rf.path, rf.run)
    conv_checks, audit.convergence = _convergence_checks(rf, limits)
    audit.checks += conv_checks
    loo, audit.pareto_k = _loo_check(rf, limits)
    audit.checks.append(loo)
    spread, audit.spread = _spread_check(rf)
    audit.checks.append(spread)
    audit.checks.append(_cap_check(rf))
    quad = _quadrature_check(rf)
    if quad is not None:
        audit.checks.append(quad)
    audit.checks += derived_checks(rf.derived, rf.cap, limits)
    if rf.notes:
        audit.checks.append(Check("files readable", False, "; ".join(rf.notes), "the run folder"))
    return audit


def audit_run(run_dir: str | Path, limits: Limits = LIMITS) -> Audit:
    """Audit a run folder by its path (never raises for a damaged run: that is a failed check).

    Args:
        run_dir: the run folder.
        limits: the limits.

    Returns:
        Audit.
    """
    path = Path(run_dir)
    try:
        rf = open_run(path)
    except RunFolderError as exc:
        checks = []
        if path.is_dir():  # what can still be checked: the files and their hashes
            checks = _file_checks(path) + _hash_checks(path, read_run_toml(path))
        return Audit(checks=checks + [Check("run folder readable", False, str(exc), "the run folder")], limits=limits)
    return audit_folder(rf, limits)
