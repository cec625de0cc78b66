"""The report: one self-contained HTML page built from a run folder, and its figures as PNG files.

:func:`build_report` reads the run folder (never samples or fits), recomputes the checks
a reviewer audits, draws the figures, and writes ``report.html`` (figures embedded as
base64 PNG, style inline) and ``figures/*.png``. Sections:

1. Summary for a manager: trend, extinction probabilities, criterion E categories, caution.
2. Data and model fit: the counts with posterior predictive bands; the assumptions.
3. Birth and death rates per size (per capita), with credible bands; parameter table.
4. Size distributions: stationary (with the probability that it exists) and quasi-stationary.
5. Extinction risk: extinction and quasi-extinction curves with the criterion E marks,
   all sites together and per site.
6. Scenarios: paired differences from the baseline.
7. Diagnostics: every check, R-hat/ESS, divergences, BFMI, trace and rank plots,
   PSIS-LOO, prior vs posterior, cap check, numerical bounds, software, seed, hashes.

Failed checks are listed at the top of the page.
"""
from __future__ import annotations

import math
import os
from collections.abc import Callable, Mapping
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import figures as F
from .bands import band, credible_level
from .checks import Check, CheckReport, run_checks
from .html import (Cell, esc, figure, format_interval, format_number, format_points, format_probability, frame_table,
                   notice, page, section, table)
from .narrative import caution_text, category_line, extinction_line, long_run_line, trend_lines
from .predictive import predictive_bands
from .run_folder import RunFolder, load_run
from .tables import (category_table, extinction_table, flatten_settings, iucn_horizons, parameter_table,
                     prior_posterior_table, scenario_differences, scenario_settings, site_data_table, trend_table)

__all__ = ["build_report", "FIGURE_NAMES"]

#: The figure files a complete report writes under figures/ (scenarios.png only with scenarios,
#: extinction_by_site.png only with several sites, the diagnostics figures only when the data allow).
FIGURE_NAMES = ("summary_categories.png", "data_predictive.png", "rates.png", "distributions.png",
                "extinction_all_sites.png", "extinction_by_site.png", "scenarios.png",
                "diagnostics_trace_rank.png", "diagnostics_prior_posterior.png", "diagnostics_pareto_k.png")

_MAX_TRACE_VARS = 10
_MAX_ELEMENTS = 12


def _write_atomic(path: Path, data: bytes) -> None:
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    with open(tmp, "wb") as fh:
        fh.write(data)
    os.replace(tmp, path)


def _find_key(doc: Any, key: str) -> Any:
    """First value stored under ``key`` in a nested mapping (breadth first)."""
    queue = [doc]
    while queue:
        cur = queue.pop(0)
        if isinstance(cur, Mapping):
            if key in cur and not isinstance(cur[key], Mapping):
                return cur[key]
            queue.extend(v for v in cur.values() if isinstance(v, Mapping))
    return None


def _result_cell(ok: bool | None) -> Cell:
    if ok is None:
        return Cell("not made", "na")
    return Cell("pass", "pass") if ok else Cell("FAIL", "fail")


class _Report:
    """Collects figures and HTML for one run folder."""

    def __init__(self, rf: RunFolder, checks: CheckReport, level: float) -> None:
        self.rf = rf
        self.checks = checks
        self.level = level
        self.pct = f"{level:.0%}"
        self.figures: dict[str, bytes] = {}
        self.figure_failures: list[Check] = []
        self.derived = rf.derived
        self.base = rf.baseline
        self.horizons = iucn_horizons(self.derived)
        g = float(self.derived.attrs.get("generation_time", -1.0))
        self.generation_time = g if g > 0 else None
        self._skipped: list[str] = []

    # ---- figures ---------------------------------------------------------------------
    def fig(self, name: str, build: Callable[[], Any], alt: str, caption: str) -> str:
        try:
            png = F.figure_png(build())
        except Exception as exc:  # a figure that cannot be drawn is a failed check, shown at the top
            self.figure_failures.append(Check(f"figure {name}", False,
                                              f"could not be drawn ({type(exc).__name__}: {exc})", "report"))
            return notice(f"Figure {name} could not be drawn", [f"{type(exc).__name__}: {exc}"], "alert")
        self.figures[name] = png
        return figure(png, alt, caption, file_name=f"figures/{name}")

    # ---- 1. summary ------------------------------------------------------------------
    def summary_section(self) -> str:
        rf, d, lv = self.rf, self.derived, self.level
        cats = category_table(d)
        fig = self.fig("summary_categories.png", lambda: F.categories_figure(cats),
                       "Stacked bars of the posterior probability of each criterion E category per scenario",
                       "Posterior probability of each IUCN criterion E category (share of posterior draws whose "
                       "extinction probabilities meet that category's threshold), per scenario.")
        lines = []
        if self.checks.failed or self.figure_failures:
            lines.append("Some checks failed (listed at the top of this report): treat every number below as "
                         "provisional until they are resolved.")
        starts = rf.summary.get("starts") if isinstance(rf.summary.get("starts"), Mapping) else None
        trend = trend_table(d, rf.counts, self.base, lv, starts)
        lines += trend_lines(trend, site_data_table(rf.counts))
        lines.append(long_run_line(d, self.base, lv))
        ext_all = extinction_table(d, self.base, lv)
        line = extinction_line(ext_all, lv, len(rf.sites))
        if line:
            lines.append(line)
        lines.append(category_line(cats.loc[self.base], self.horizons, self.generation_time))
        body = '<ul class="key">' + "".join(f"<li>{esc(x)}</li>" for x in lines) + "</ul>"
        body += self._extinction_summary_table(ext_all) + fig
        body += f'<div class="caution"><strong>Caution.</strong> {esc(caution_text(rf.summary))}</div>'
        return section("summary", "1. Summary", body)

    def _extinction_summary_table(self, ext: pd.DataFrame) -> str:
        ks = sorted(ext["threshold"].unique())
        header = ["horizon"]
        for k in ks:
            what = "extinction (0)" if k == 0 else f"≤ {k} animals"
            header += [f"P({what})", f"{self.pct} interval"]
        rows = []
        for h in sorted(ext["horizon"].unique()):
            row: list[Any] = [Cell(format_number(h), "num")]
            for k in ks:
                r = ext[(ext["threshold"] == k) & (ext["horizon"] == h)].iloc[0]
                row += [Cell(format_probability(r["mean"]), "num"),
                        Cell(format_interval(r["lo"], r["hi"], format_probability), "num")]
            rows.append(row)
        who = "every site falls" if len(self.rf.sites) > 1 else "the population falls"
        return table(header, rows, caption=f"{self.base.capitalize()}: probability that {who} to the threshold "
                                           f"within each horizon (posterior mean and {self.pct} interval of the "
                                           "per-draw probability).")

    # ---- 2. data ---------------------------------------------------------------------
    def data_section(self) -> str:
        rf = self.rf
        body = ""
        if rf.counts is None:
            body += notice("No data to show", ["counts.csv is missing or unreadable"], "warn")
        else:
            st = site_data_table(rf.counts)
            body += frame_table(st.set_index("site"), {"occasions": "surveyed times", "missing": "times not surveyed",
                                                       "first": "first", "last": "last", "smallest": "smallest count",
                                                       "largest": "largest count", "last_count": "last count"},
                                index="site", caption="The counts, as read (counts.csv).")
        pp = predictive_bands(rf.idata, rf.counts, rf.sites)
        body += self.fig("data_predictive.png", lambda: F.predictive_figure(rf.counts, pp, rf.sites),
                         "Counts over time with posterior predictive bands per site",
                         "Dots: the counts. Shaded: 50% and 90% posterior predictive intervals of simulated counts "
                         f"(posterior_predictive variable {pp.variable or 'none'}); line: their median. Counts that "
                         "often fall outside the 90% band point to a model that does not fit.")
        body += notice("Posterior predictive bands missing", pp.notes, "warn")
        data = rf.summary.get("data") if isinstance(rf.summary.get("data"), Mapping) else {}
        settings = rf.run.get("settings") if isinstance(rf.run.get("settings"), Mapping) else rf.summary.get("settings")
        body += "<h3>Assumptions</h3><p>The results depend on these settings (rate family, priors, observation model, " \
                "size cap, horizons). Rates are per time unit of the data's time column.</p>"
        fam = self._family_text()
        if fam:
            body += f'<pre class="model">{esc(fam)}</pre>'
        rows = [(k, v) for k, v in flatten_settings(settings)] if settings else []
        rows += [(f"data.{k}", v) for k, v in flatten_settings(data)] if data else []
        rows.append(("size cap N (derived.nc)", str(rf.cap)))
        body += table(["setting", "value"], rows, caption="Resolved settings of the run (run.toml [settings], or "
                                                          "summary.json when run.toml is missing).")
        return section("data", "2. Data and model fit", body)

    def pooling_note(self) -> str:
        """A paragraph saying which site the rate-only results describe (partial pooling only)."""
        post = self.rf.idata.posterior if self.rf.idata is not None else None
        if post is None or "site_offset" not in post:
            return ""
        return ("<p>Partial pooling: each site's birth rate is the shared rate times exp(site offset). The curves "
                "and distributions here describe a typical site (offset 0); extinction probabilities and mean "
                "times for each site use that site's own rates.</p>")

    # ---- 3. rates --------------------------------------------------------------------
    def rates_section(self) -> str:
        rf, d = self.rf, self.derived
        observed = None
        if rf.counts is not None and rf.counts["count"].notna().any():
            observed = (float(rf.counts["count"].min()), float(rf.counts["count"].max()))
        top = None
        if observed is not None:
            top = int(max(observed[1] * 1.6, 10))
        body = self.fig("rates.png", lambda: F.rates_figure(d, self.base, self.level, observed, top),
                        "Per-capita birth and death rates against population size with credible bands",
                        f"Left: per-capita birth rate b(n) and death rate d(n) by size, posterior mean with {self.pct} "
                        "bands. Right: their difference; above 0 an animal adds more births than deaths. Shaded "
                        "background: the sizes the counts cover (outside it the rates are the family's formula "
                        "carried on, not data).")
        body += self.pooling_note()
        iota = band(d["immigration"].sel(scenario=self.base), self.level)
        if float(iota.hi) > 0:
            body += (f"<p>Immigration ι (arrivals per time unit, independent of size): posterior mean "
                     f"{esc(format_number(float(iota.mean)))}, {self.pct} interval "
                     f"{esc(format_interval(float(iota.lo), float(iota.hi)))}.</p>")
        else:
            body += "<p>No immigration in this model: size 0 is absorbing.</p>"
        pt = parameter_table(rf.summary, rf.idata.posterior, self.level)
        if not pt.empty:
            cols = {c: t for c, t in (("mean", "mean"), ("sd", "sd"), ("lo", "5%"), ("median", "50%"),
                                      ("hi", "95%"), ("r_hat", "R-hat"), ("ess_bulk", "bulk ESS"),
                                      ("ess_tail", "tail ESS")) if c in pt.columns}
            body += frame_table(pt, cols, index="parameter", caption="Posterior summary of the parameters "
                                "(summary.json, or computed from posterior.nc).")
        return section("rates", "3. Birth and death rates", body)

    # ---- 4. distributions ------------------------------------------------------------
    def distributions_section(self) -> str:
        d = self.derived.sel(scenario=self.base)
        body = self.fig("distributions.png", lambda: F.distributions_figure(self.derived, self.base, self.level),
                        "Stationary and quasi-stationary size distributions with credible bands",
                        f"Left: the long-run distribution of a site's size, over the draws where it exists (posterior "
                        f"mean, {self.pct} band). Right: the quasi-stationary distribution, the long-run distribution "
                        "of size given the population has not died out.")
        body += self.pooling_note()
        lv = self.level
        exists = d["stationary_exists"]
        rows: list[list[Any]] = [["P(a stationary distribution exists)", Cell(format_probability(float(exists.mean())), "num"),
                                  Cell("—", "na")]]
        if bool(exists.any()):
            b = band(d["stationary_mean"].where(exists), lv)
            rows.append(["stationary mean size", Cell(format_number(float(b.mean)), "num"),
                         Cell(format_interval(float(b.lo), float(b.hi)), "num")])
        b = band(d["quasi_mean"], lv)
        rows.append(["quasi-stationary mean size", Cell(format_number(float(b.mean)), "num"),
                     Cell(format_interval(float(b.lo), float(b.hi)), "num")])
        rate = d["quasi_decay_rate"]
        b = band(rate, lv)
        rows.append(["extinction rate from quasi-stationarity (per time unit)", Cell(format_number(float(b.median)), "num"),
                     Cell(format_interval(float(b.lo), float(b.hi)), "num")])
        for site in self.rf.sites:
            b = band(d["log10_mean_time_to_extinction"].sel(site=site), lv)
            rows.append([f"mean time to extinction from the last count, {site} (time units)",
                         Cell(_power_of_ten(float(b.median)), "num"),
                         Cell(f"{_power_of_ten(float(b.lo))} to {_power_of_ten(float(b.hi))}", "num")])
        body += table(["quantity", "posterior mean (median for rates and times)", f"{self.pct} interval"], rows)
        return section("distributions", "4. Size distributions", body)

    # ---- 5. extinction ---------------------------------------------------------------
    def extinction_section(self) -> str:
        d = self.derived.sel(scenario=self.base)
        hz = self.horizons
        marks = (f"Diamonds: IUCN criterion E thresholds (IUCN 2012) — CR 50% within {format_number(hz['CR'])} y, "
                 f"EN 20% within {format_number(hz['EN'])} y, VU 10% within {format_number(hz['VU'])} y; a category's "
                 "criterion is met when the probability at its horizon reaches its diamond. Criterion E horizons "
                 "assume the data's time unit is years.")
        body = self.fig("extinction_all_sites.png",
                        lambda: F.extinction_figure(d["extinction_probability_all_sites"], hz, self.level,
                                                    title="All sites together"),
                        "Extinction and quasi-extinction probability against horizon, all sites, with criterion E marks",
                        f"Probability that every site has fallen to the threshold (0: extinction) within each horizon: "
                        f"posterior mean and {self.pct} band. {marks} Log axis when every interval stays below 5%.")
        body += self._extinction_tables(extinction_table(self.derived, self.base, self.level), "All sites together")
        if len(self.rf.sites) > 1:
            body += self.fig("extinction_by_site.png",
                             lambda: F.extinction_figure(d["extinction_probability"], hz, self.level, panels="site"),
                             "Extinction and quasi-extinction probability per site",
                             f"Each site on its own, from its last count: posterior mean and {self.pct} band. {marks}")
            for site in self.rf.sites:
                body += self._extinction_tables(extinction_table(self.derived, self.base, self.level, site), site)
        else:
            body += "<p>One site: its curve is the one above.</p>"
        return section("extinction", "5. Extinction risk", body)

    def _extinction_tables(self, ext: pd.DataFrame, title: str) -> str:
        rows = [[Cell("extinction (0)" if r.threshold == 0 else f"≤ {r.threshold}"), Cell(format_number(r.horizon), "num"),
                 Cell(format_probability(r.mean), "num"), Cell(format_interval(r.lo, r.hi, format_probability), "num")]
                for r in ext.itertuples(index=False)]
        return table(["threshold", "horizon", "probability (posterior mean)", f"{self.pct} interval"], rows,
                     caption=title)

    # ---- 6. scenarios ----------------------------------------------------------------
    def scenarios_section(self) -> str:
        scen = self.rf.scenarios
        if len(scen) < 2:
            return section("scenarios", "6. Scenarios", "<p>No scenarios were set for this run: only the fitted "
                                                        "rates (the baseline) are shown.</p>")
        what = scenario_settings(self.derived)
        body = table(["scenario", "what it changes"], [[s, what.get(s) or "—"] for s in scen],
                     caption="Scenarios change the fitted rates of every posterior draw before the push-forward; all "
                             "use the same draws, so differences are paired.")
        diff = scenario_differences(self.derived, self.level)
        rows = []
        for r in diff.itertuples(index=False):
            is_p = r.quantity.startswith("P(")
            f = format_probability if is_p else format_number
            df = format_points if is_p else (lambda v: f"{float(v):+.3g}")
            rows.append([r.scenario, r.quantity, Cell(f(r.baseline), "num"), Cell(f(r.value), "num"),
                         Cell(df(r.diff_mean) if np.isfinite(r.diff_mean) else "—", "num"),
                         Cell(f"{df(r.diff_lo)} to {df(r.diff_hi)}" if np.isfinite(r.diff_lo) else "—", "num"),
                         Cell(format_probability(r.p_higher), "num")])
        body += table(["scenario", "quantity", self.base, "scenario", "difference (mean)", f"{self.pct} interval",
                       "P(scenario higher)"], rows,
                      caption="Paired differences, scenario minus baseline, draw by draw (pts: percentage points). "
                              "When a few draws carry most of the risk, a mean can lie outside its interval.")
        body += self.fig("scenarios.png", lambda: F.scenario_figure(self.derived, self.level),
                         "Extinction curves per scenario and paired differences from the baseline",
                         f"Left: probability of extinction of every site within each horizon, per scenario (posterior "
                         f"mean, {self.pct} band). Right: paired difference from {self.base} (dot: mean; bar: "
                         f"{self.pct} interval).")
        cats = category_table(self.derived)
        body += frame_table(cats, {c: c for c in cats.columns}, formats={c: format_probability for c in cats.columns},
                            index="scenario", caption="Posterior probability of each criterion E category per scenario.")
        return section("scenarios", "6. Scenarios", body)

    # ---- 7. diagnostics --------------------------------------------------------------
    def diagnostics_section(self) -> str:
        rf, ch = self.rf, self.checks
        th = ch.thresholds
        body = ("<p>Every check below is recomputed from the run folder's files by this report (ArviZ for the "
                "statistics), except those marked as recorded in summary.json. Limits: R-hat below "
                f"{th.r_hat:g}, bulk and tail ESS above {th.ess_bulk:g} and {th.ess_tail:g} (Vehtari et al. 2021, "
                f"Bayesian Analysis 16:667–718); at most {th.max_divergences} divergent transitions; BFMI at least "
                f"{th.bfmi:g} per chain; Pareto k at most {th.pareto_k:g} (Vehtari, Gelman &amp; Gabry 2017, "
                "Statistics and Computing 27:1413–1432).</p>")
        all_checks = ch.checks + self.figure_failures
        body += table(["check", "result", "detail", "source"],
                      [[c.name, _result_cell(c.passed), c.detail, c.source] for c in all_checks],
                      caption="All checks.")
        body += "<h3>Convergence per parameter</h3>"
        conv = ch.convergence
        rows = [[r.parameter, Cell(format_number(r.r_hat, 4), "num" if r.r_hat_ok else "fail"),
                 Cell(format_number(round(r.ess_bulk) if np.isfinite(r.ess_bulk) else r.ess_bulk), "num" if r.ess_bulk_ok else "fail"),
                 Cell(format_number(round(r.ess_tail) if np.isfinite(r.ess_tail) else r.ess_tail), "num" if r.ess_tail_ok else "fail"),
                 _result_cell(bool(r.ok))] for r in conv.itertuples(index=False)]
        body += table(["parameter", "R-hat", "bulk ESS", "tail ESS", "result"], rows,
                      caption="Rank-normalised split R-hat and effective sample sizes (ArviZ), from posterior.nc.")
        post = rf.idata.posterior
        body += "<h3>Sampler</h3>"
        srows = []
        bfmi = ch.bfmi
        for i, c in enumerate(post["chain"].values):
            div = ch.divergences.get(str(c)) if not ch.divergences.empty else None
            b = bfmi[i] if bfmi is not None and i < bfmi.size else None
            srows.append([str(c), Cell(str(post.sizes["draw"]), "num"),
                          Cell("—" if div is None else str(int(div)),
                               "na" if div is None else ("num" if div <= th.max_divergences else "fail")),
                          Cell(format_number(b) if b is not None else "—",
                               "na" if b is None else ("num" if b >= th.bfmi else "fail"))])
        body += table(["chain", "draws", "divergent transitions", "BFMI"], srows)
        names = self._plot_vars()
        body += self.fig("diagnostics_trace_rank.png", lambda: F.trace_rank_figure(rf.idata, names),
                         "Trace densities and rank bar plots per chain for each parameter",
                         "Left: posterior density per chain. Right: rank plots per chain (ArviZ plot_trace, kind "
                         "'rank_bars'); well-mixed chains have flat, similar rank bars."
                         + self._skipped_note())
        body += "<h3>Leave-one-out cross-validation (PSIS-LOO)</h3>"
        loo = ch.loo
        if loo.error:
            body += notice("PSIS-LOO not computed", [loo.error], "warn")
        else:
            body += table(["elpd (LOO)", "standard error", "effective parameters p_loo", "observations"],
                          [[Cell(format_number(loo.elpd, 5), "num"), Cell(format_number(loo.se, 3), "num"),
                            Cell(format_number(loo.p_loo, 3), "num"), Cell(str(loo.pareto_k.size), "num")]])
            body += self.fig("diagnostics_pareto_k.png", lambda: F.pareto_k_figure(loo, th.pareto_k),
                             "Pareto k per observation with the 0.7 line",
                             f"Pareto k of each observation's importance-sampling estimate; above {th.pareto_k:g} "
                             "the LOO estimate for that observation is unreliable.")
            high = [f"{lab}: k = {k:.2f}" for lab, k in zip(loo.labels, loo.pareto_k) if k > th.pareto_k]
            body += notice(f"Observations with Pareto k above {th.pareto_k:g}", high, "alert")
        body += "<h3>Prior and posterior</h3>"
        pp_names = [n for n in names if "prior" in rf.idata.groups() and n in rf.idata.prior]
        if "prior" not in rf.idata.groups():
            body += notice("No prior draws", ["posterior.nc has no prior group; prior and posterior cannot be "
                                              "compared"], "warn")
        else:
            body += self.fig("diagnostics_prior_posterior.png", lambda: F.prior_posterior_figure(rf.idata, pp_names),
                             "Prior and posterior histograms per parameter",
                             "Grey: prior draws; blue: posterior draws. A posterior much narrower than its prior "
                             "means the data informed the parameter; one that looks like its prior means they did "
                             "not, and the prior drives the result.")
            ppt = prior_posterior_table(rf.idata, self.level)
            if not ppt.empty:
                ppt["prior"] = [format_interval(a, b) for a, b in zip(ppt["prior_lo"], ppt["prior_hi"])]
                ppt["post"] = [format_interval(a, b) for a, b in zip(ppt["post_lo"], ppt["post_hi"])]
                body += frame_table(ppt, {"prior": f"prior {self.pct} interval", "post": f"posterior {self.pct} interval",
                                          "sd_ratio": "posterior sd / prior sd"}, index="parameter")
        body += "<h3>Cap check and numerical error bounds</h3>"
        cap = rf.summary.get("cap_check")
        if isinstance(cap, Mapping):
            body += table(["entry", "value"], flatten_settings(cap), caption="cap_check as recorded in summary.json.")
        elif cap is not None:
            body += f"<p>cap_check recorded in summary.json: {esc(cap)}</p>"
        nrows = []
        for sc in rf.scenarios:
            d = self.derived.sel(scenario=sc)
            ex = d["stationary_exists"].values.astype(bool)
            mass = d["stationary_mass_above_cap"].values[ex]
            nrows.append([sc, Cell(format_number(float(np.nanmax(d["extinction_error_bound"].values)), 3), "num"),
                          Cell(format_number(float(np.nanmax(mass)), 3) if mass.size else "—", "num")])
        body += table(["scenario", "largest extinction error bound", "largest stationary mass above the cap"], nrows,
                      caption=f"From derived.nc; size cap N = {rf.cap}, solver tolerance "
                              f"{format_number(self.derived.attrs.get('tol'))}.")
        body += "<h3>Software, seed and data</h3>" + self._provenance()
        return section("diagnostics", "7. Diagnostics for review", body)

    def _family_name(self) -> str | None:
        fam = self.rf.summary.get("family")
        if isinstance(fam, Mapping) and fam.get("name"):
            return str(fam["name"])
        name = _find_key(self.rf.run.get("settings", {}), "rates") or _find_key(self.rf.summary.get("settings", {}), "rates")
        return None if name is None else str(name)

    def _family_text(self) -> str:
        text = self.rf.idata.posterior.attrs.get("tallyfit_family")
        if isinstance(text, str) and text.strip():
            return text.strip()
        fam = self.rf.summary.get("family")
        if isinstance(fam, Mapping) and fam.get("formula"):
            return f"Rate family: {fam.get('name', '')}\n  {fam['formula']}"
        return ""

    def _plot_vars(self) -> list[str]:
        post = self.rf.idata.posterior
        order = []
        params = self.rf.summary.get("parameters")
        if isinstance(params, Mapping):
            order += [str(k).split("[")[0] for k in params]
        order += [str(v) for v in post.data_vars]
        names, self._skipped = [], []
        for n in dict.fromkeys(order):
            if n not in post:
                continue
            size = int(np.prod([post[n].sizes[d] for d in post[n].dims if d not in ("chain", "draw")] or [1]))
            if size > _MAX_ELEMENTS or len(names) >= _MAX_TRACE_VARS:
                self._skipped.append(n)
            else:
                names.append(n)
        return names

    def _skipped_note(self) -> str:
        skipped = self._skipped
        return (" Not drawn (too many elements or variables; see the table above): " + ", ".join(skipped) + "."
                if skipped else "")

    def _provenance(self) -> str:
        rf = self.rf
        versions = rf.run.get("versions") if isinstance(rf.run.get("versions"), Mapping) else {}
        rows = [[f"{k} (run)", str(v)] for k, v in versions.items()]
        for pkg in ("arviz", "matplotlib", "xarray"):
            try:
                rows.append([f"{pkg} (this report)", metadata.version(pkg)])
            except metadata.PackageNotFoundError:
                pass
        seed = _find_key(rf.run, "seed")
        if seed is None:
            seed = _find_key(rf.summary.get("settings", {}), "seed")
        rows.append(["seed", "not recorded" if seed is None else str(seed)])
        hashes = rf.run.get("hashes") if isinstance(rf.run.get("hashes"), Mapping) else {}
        for name, h in hashes.items():
            rows.append([f"SHA-256 of {name} (run.toml)", str(h)])
        data = rf.summary.get("data") if isinstance(rf.summary.get("data"), Mapping) else {}
        if data.get("sha256"):
            rows.append(["SHA-256 of the data (summary.json)", str(data["sha256"])])
        post = rf.idata.posterior
        rows.append(["posterior draws", f"{post.sizes['chain']} chains × {post.sizes['draw']} draws"])
        dd = self.derived
        rows.append(["draws in derived.nc", f"{dd.sizes['chain']} chains × {dd.sizes['draw']} draws"])
        out = table(["item", "value"], rows)
        out += notice("Files missing or unreadable", rf.notes, "warn")
        return out

    # ---- page --------------------------------------------------------------------------
    def render(self) -> str:
        # the summary is written last, so that it knows whether any figure failed
        later = [self.data_section(), self.rates_section(), self.distributions_section(),
                 self.extinction_section(), self.scenarios_section(), self.diagnostics_section()]
        parts = [self.summary_section()] + later
        failed = self.checks.failed + self.figure_failures
        if failed:
            banner = notice(f"{len(failed)} check{'s' if len(failed) != 1 else ''} failed — read before using "
                            "these results", [f"{c.name}: {c.detail} ({c.source})" for c in failed], "alert")
        else:
            n = len([c for c in self.checks.checks if c.passed])
            banner = notice(f"All {n} checks that could be made passed (details in section 7).", [], "ok")
        banner += notice("Checks that could not be made", [f"{c.name}: {c.detail}" for c in self.checks.not_made], "warn")
        banner += notice("Files missing or unreadable", self.rf.notes, "warn")
        warns = self.rf.summary.get("warnings") if isinstance(self.rf.summary.get("warnings"), list) else []
        banner += notice("Warnings recorded by the run (summary.json)", [str(w) for w in warns], "warn")
        data = self.rf.summary.get("data") if isinstance(self.rf.summary.get("data"), Mapping) else {}
        source = data.get("source") or "counts.csv"
        subtitle = [f"Data: {source}" + (f" · {len(self.rf.sites)} site{'s' if len(self.rf.sites) > 1 else ''}"),
                    f"Rate family: {self._family_name() or 'not recorded'} · scenarios: {', '.join(self.rf.scenarios)}"]
        contents = [("summary", "Summary"), ("data", "Data and model fit"), ("rates", "Birth and death rates"),
                    ("distributions", "Size distributions"), ("extinction", "Extinction risk"),
                    ("scenarios", "Scenarios"), ("diagnostics", "Diagnostics for review")]
        return page("tallyfit report", subtitle, banner, contents, parts)


def _power_of_ten(log10_value: float) -> str:
    if not math.isfinite(log10_value):
        return "—" if math.isnan(log10_value) else ("infinite" if log10_value > 0 else "0")
    if log10_value < 5:
        return format_number(10 ** log10_value, 3)
    mant = 10 ** (log10_value - math.floor(log10_value))
    return f"{mant:.2g} × 10^{int(math.floor(log10_value))}"


def build_report(run_dir: str | Path) -> Path:
    """Write ``report.html`` (self-contained) and ``figures/*.png`` for a run folder.

    Reads posterior.nc, derived.nc, summary.json, run.toml and counts.csv; recomputes the
    diagnostics (ArviZ) and the hash checks; never samples or fits. Failed checks are
    listed at the top of the page. Files are written under a temporary name and renamed.

    Args:
        run_dir: the run folder.

    Returns:
        path of the written report.html.

    Raises:
        RunFolderError: run_dir is not a folder, or posterior.nc or derived.nc is missing
            or unreadable (optional files that are missing are reported on the page).
        OSError: the report or figures cannot be written.
    """
    rf = load_run(run_dir)
    checks = run_checks(rf)
    rep = _Report(rf, checks, credible_level(rf.summary))
    text = rep.render()
    fig_dir = rf.path / "figures"
    fig_dir.mkdir(exist_ok=True)
    for name, png in rep.figures.items():
        _write_atomic(fig_dir / name, png)
    out = rf.path / "report.html"
    _write_atomic(out, text.encode("utf-8"))
    return out
