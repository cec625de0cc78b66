"""Section 7 of the report: everything a reviewer audits, from the run folder's audit.

The checks themselves are :mod:`tallyfit.runfolder.audit`'s (the same ones ``tallyfit
audit`` prints); this module lays them out with the per-parameter table, the sampler's
statistics, PSIS-LOO, prior against posterior, the cap check, numerical bounds and
provenance.
"""
from __future__ import annotations

from importlib import metadata
from typing import Any

import numpy as np

from tallyfit.runfolder import schema as S

from . import diagnostic_figures as F
from .html import Cell, format_interval, format_number, frame_table, notice, section, table
from .tables import flatten_settings, prior_posterior_table

__all__ = ["diagnostics_section", "result_cell", "MAX_TRACE_VARIABLES", "MAX_ELEMENTS"]

#: At most this many variables get trace and rank plots, each with at most MAX_ELEMENTS entries.
MAX_TRACE_VARIABLES = 10
MAX_ELEMENTS = 12


def result_cell(ok: bool | None) -> Cell:
    """The result column of a check: pass, FAIL or not made."""
    if ok is None:
        return Cell("not made", "na")
    return Cell("pass", "pass") if ok else Cell("FAIL", "fail")


def _plot_variables(post: Any, first: list[str]) -> tuple[list[str], list[str]]:
    """Variables to draw (the summarised parameters first, then the rest) and those skipped."""
    names, skipped = [], []
    for n in dict.fromkeys([f for f in first if f in post] + [str(v) for v in post.data_vars]):
        size = int(np.prod([post[n].sizes[d] for d in post[n].dims if d not in ("chain", "draw")] or [1]))
        if size > MAX_ELEMENTS or len(names) >= MAX_TRACE_VARIABLES:
            skipped.append(str(n))
        else:
            names.append(str(n))
    return names, skipped


def _loo_labels(idata: Any, n: int) -> list[str]:
    da = idata.log_likelihood[S.LOGLIK_VARIABLE]
    if S.OBS_SITE in da.coords and S.OBS_TIME in da.coords:
        return [f"site {s}, to time {float(t):g}" for s, t in zip(da[S.OBS_SITE].values, da[S.OBS_TIME].values)]
    return [f"observation {i}" for i in range(n)]


def _convergence_table(rep: Any) -> str:
    conv = rep.audit.convergence
    if conv is None:
        return notice("Convergence per parameter not computed", ["posterior.nc could not be judged"], "warn")
    rows = []
    for label, r in conv.table.iterrows():
        ok = bool(r.r_hat_ok and r.ess_bulk_ok and r.ess_tail_ok)
        rows.append([str(label), Cell(format_number(r.r_hat, 4), "num" if r.r_hat_ok else "fail"),
                     Cell(format_number(round(r.ess_bulk) if np.isfinite(r.ess_bulk) else r.ess_bulk),
                          "num" if r.ess_bulk_ok else "fail"),
                     Cell(format_number(round(r.ess_tail) if np.isfinite(r.ess_tail) else r.ess_tail),
                          "num" if r.ess_tail_ok else "fail"), result_cell(ok)])
    out = table(["parameter", "R-hat", "bulk ESS", "tail ESS", "result"], rows,
                caption="Rank-normalised split R-hat and effective sample sizes (ArviZ), from posterior.nc.")
    post = rep.rf.idata.posterior
    lim = rep.audit.limits
    srows = []
    for i, c in enumerate(post["chain"].values):
        div = conv.divergences[i] if i < len(conv.divergences) else None
        b = conv.bfmi[i] if i < len(conv.bfmi) else None
        srows.append([str(c), Cell(str(post.sizes["draw"]), "num"),
                      Cell("—" if div is None else str(div), "na" if div is None else
                           ("num" if div <= lim.divergences else "fail")),
                      Cell(format_number(b) if b is not None else "—",
                           "na" if b is None else ("num" if b > lim.bfmi else "fail"))])
    return out + "<h3>Sampler</h3>" + table(["chain", "draws", "divergent transitions", "E-BFMI"], srows)


def _loo_part(rep: Any) -> str:
    k = rep.audit.pareto_k
    lim = rep.audit.limits.pareto_k
    out = "<h3>Leave-one-out cross-validation (PSIS-LOO)</h3>"
    if k.size == 0:
        return out + notice("PSIS-LOO not computed", [c.detail for c in rep.audit.checks
                                                      if c.name == "PSIS-LOO Pareto k"], "warn")
    out += rep.fig("diagnostics_pareto_k.png", lambda: F.pareto_k_figure(k, lim),
                   "Pareto k per observation with the 0.7 line",
                   f"Pareto k of each observation's importance-sampling estimate; above {lim:g} the LOO estimate "
                   "for that observation is unreliable.")
    high = [f"{lab}: k = {v:.2f}" for lab, v in zip(_loo_labels(rep.rf.idata, k.size), k) if v > lim]
    return out + notice(f"Observations with Pareto k above {lim:g}", high, "alert")


def _prior_part(rep: Any, names: list[str]) -> str:
    idata = rep.rf.idata
    out = "<h3>Prior and posterior</h3>"
    if "prior" not in idata.groups():
        return out + notice("No prior draws", ["posterior.nc has no prior group; prior and posterior cannot be "
                                                "compared"], "warn")
    pp_names = [n for n in names if n in idata.prior]
    out += rep.fig("diagnostics_prior_posterior.png", lambda: F.prior_posterior_figure(idata, pp_names),
                   "Prior and posterior histograms per parameter",
                   "Grey: prior draws; blue: posterior draws. A posterior much narrower than its prior means the "
                   "data informed the parameter; one that looks like its prior means they did not, and the prior "
                   "drives the result.")
    ppt = prior_posterior_table(idata, rep.level)
    if not ppt.empty:
        ppt["prior"] = [format_interval(a, b) for a, b in zip(ppt["prior_lo"], ppt["prior_hi"])]
        ppt["post"] = [format_interval(a, b) for a, b in zip(ppt["post_lo"], ppt["post_hi"])]
        out += frame_table(ppt, {"prior": f"prior {rep.pct} interval", "post": f"posterior {rep.pct} interval",
                                 "sd_ratio": "posterior sd / prior sd"}, index="parameter")
    return out


def _numerical_part(rep: Any) -> str:
    rf = rep.rf
    out = "<h3>Cap check and numerical error bounds</h3>"
    cap = rf.summary_section("cap_check")
    if cap is not None:
        out += table(["entry", "value"], flatten_settings(cap), caption="cap_check as recorded in summary.json.")
    rows = []
    for sc in rf.scenarios:
        d = rf.derived.sel(scenario=sc)
        mass = d["stationary_mass_above_cap"].values[d["stationary_exists"].values.astype(bool)]
        rows.append([sc, Cell(format_number(float(np.nanmax(d["extinction_error_bound"].values)), 3), "num"),
                     Cell(format_number(float(np.nanmax(mass)), 3) if mass.size else "—", "num")])
    return out + table(["scenario", "largest extinction error bound", "largest stationary mass above the cap"],
                       rows, caption=f"From derived.nc; size cap N = {rf.cap}, solver tolerance "
                                     f"{format_number(rf.tol)}.")


def _provenance(rep: Any) -> str:
    rf = rep.rf
    rows = [[f"{k} (run)", str(v)] for k, v in (rf.run["versions"].items() if rf.run is not None else [])]
    for pkg in ("arviz", "matplotlib", "xarray"):
        try:
            rows.append([f"{pkg} (this report)", metadata.version(pkg)])
        except metadata.PackageNotFoundError:
            pass
    rows.append(["seed", "not recorded" if rf.seed is None else str(rf.seed)])
    for name, h in (rf.run["hashes"].items() if rf.run is not None else []):
        rows.append([f"SHA-256 of {name} (run.toml)", str(h)])
    data = rf.summary_section("data")
    if data is not None and data.get("sha256"):
        rows.append(["SHA-256 of the data as read (summary.json)", str(data["sha256"])])
    post = rf.idata.posterior
    rows.append(["posterior draws", f"{post.sizes['chain']} chains × {post.sizes['draw']} draws"])
    rows.append(["draws in derived.nc", f"{rf.derived.sizes['chain']} chains × {rf.derived.sizes['draw']} draws"])
    return table(["item", "value"], rows) + notice("Files missing or unreadable", rf.notes, "warn")


def diagnostics_section(rep: Any) -> str:
    """Section 7: every check, convergence per parameter, sampler, LOO, priors, bounds, provenance.

    Args:
        rep: the report being built (reports.report's builder: rf, audit, level, pct,
            fig(), figure_failures).

    Returns:
        the section's HTML.
    """
    lim = rep.audit.limits
    body = ("<p>Every check below is made from the run folder's files (ArviZ for the statistics); where "
            "summary.json records a verdict on the same thing the line says whether they agree. Limits: R-hat "
            f"below {lim.r_hat:g}, bulk and tail ESS above {lim.ess_bulk:g} and {lim.ess_tail:g} (Vehtari et al. "
            f"2021, Bayesian Analysis 16:667–718); at most {lim.divergences} divergent transitions; E-BFMI above "
            f"{lim.bfmi:g} per chain; Pareto k at most {lim.pareto_k:g} (Vehtari, Gelman &amp; Gabry 2017, "
            "Statistics and Computing 27:1413–1432), a warning only.</p>")
    checks = rep.audit.checks + rep.figure_failures
    body += table(["check", "result", "detail", "source"],
                  [[c.name, result_cell(c.passed) if c.blocking or c.passed is not False else Cell("warning", "na"),
                    c.detail, c.source] for c in checks], caption="All checks.")
    body += "<h3>Convergence per parameter</h3>" + _convergence_table(rep)
    params = rep.rf.summary_section("parameters") or {}
    names, skipped = _plot_variables(rep.rf.idata.posterior, [str(k).split("[")[0] for k in params])
    if names:
        body += rep.fig("diagnostics_trace_rank.png", lambda: F.trace_rank_figure(rep.rf.idata, names),
                        "Trace densities and rank bar plots per chain for each parameter",
                        "Left: posterior density per chain. Right: rank plots per chain (ArviZ plot_trace, kind "
                        "'rank_bars'); well-mixed chains have flat, similar rank bars."
                        + (" Not drawn (too many elements or variables; see the table above): "
                           + ", ".join(skipped) + "." if skipped else ""))
    body += _loo_part(rep) + _prior_part(rep, names) + _numerical_part(rep)
    body += "<h3>Software, seed and data</h3>" + _provenance(rep)
    return section("diagnostics", "7. Diagnostics for review", body)
