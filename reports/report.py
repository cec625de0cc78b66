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
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tallyfit.runfolder import schema as S
from tallyfit.runfolder.audit import Audit, Check, audit_folder
from tallyfit.runfolder.reader import RunFolder, open_run
from tallyfit.runfolder.store import write_atomic

from . import figures as F
from .bands import band
from .html import (Cell, esc, figure, format_interval, format_number, format_points, format_probability, frame_table,
                   notice, page, section, table)
from .forecast import forecast_figure, forecast_frame
from .narrative import caution_text, category_line, extinction_line, headline, long_run_line, trend_lines
from .predictive import predictive_bands
from .review import diagnostics_section
from .tables import (category_table, covariate_effects, environment_share, extinction_table, flatten_settings,
                     scenario_differences, scenario_settings, site_data_table, trend_table)

__all__ = ["build_report", "FIGURE_NAMES"]

#: The figure files a complete report writes under figures/ (scenarios.png only with scenarios,
#: extinction_by_site.png only with several sites, the diagnostics figures only when the data allow).
FIGURE_NAMES = ("summary_categories.png", "data_predictive.png", "rates.png", "distributions.png",
                "extinction_all_sites.png", "extinction_by_site.png", "scenarios.png",
                "diagnostics_trace_rank.png", "diagnostics_prior_posterior.png", "diagnostics_pareto_k.png")


class _Report:
    """Collects figures and HTML for one run folder."""

    def __init__(self, rf: RunFolder, audit: Audit) -> None:
        self.rf = rf
        self.audit = audit
        self.level = rf.credible_level
        self.pct = f"{self.level:.0%}"
        self.figures: dict[str, bytes] = {}
        self.figure_failures: list[Check] = []
        self.derived = rf.derived
        self.base = rf.baseline
        self.horizons = rf.criterion_e_horizons
        self.generation_time = rf.generation_time
        self.categories = rf.categories
        data = rf.summary_section("data") or {}
        self.unit = str(data.get("time_unit", "time unit"))  # singular and plural, as the run recorded them
        self.units = str(data.get("time_units", "time units"))
        self.unit_reason = str(data.get("time_unit_reason", ""))
        self.varying = (rf.summary_section("environment") or {}).get("varying_years", "none") != "none"

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
        cats = category_table(d, self.categories)
        fig = self.fig("summary_categories.png", lambda: F.categories_figure(cats),
                       "Stacked bars of the posterior probability of each criterion E category per scenario",
                       "Posterior probability of each IUCN criterion E category (share of posterior draws whose "
                       "extinction probabilities meet that category's threshold), per scenario.")
        lines = []
        if self.audit.failed or self.figure_failures:
            lines.append("Some checks failed (listed at the top of this report): treat every number below as "
                         "provisional until they are resolved.")
        starts = rf.summary_section("starts")
        trend = trend_table(d, rf.counts, self.base, lv, starts)
        lines += trend_lines(trend, site_data_table(rf.counts), self.unit)
        lines.append(long_run_line(d, self.base, lv))
        ext_all = extinction_table(d, self.base, lv)
        line = extinction_line(ext_all, lv, len(rf.sites), self.units)
        if line:
            lines.append(line)
        lines.append(category_line(cats.loc[self.base], self.horizons, self.generation_time))
        body = '<ul class="key">' + "".join(f"<li>{esc(x)}</li>" for x in lines) + "</ul>"
        body += self._extinction_summary_table(ext_all) + fig
        body += f'<div class="caution"><strong>Caution.</strong> {esc(caution_text(rf.summary))}</div>'
        return section("summary", "1. Summary", body)

    def _extinction_summary_table(self, ext: pd.DataFrame) -> str:
        ks = sorted(ext["threshold"].unique())
        header = [f"horizon ({self.units})"]
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
        pp = predictive_bands(rf.idata, rf.sites)
        body += self.fig("data_predictive.png", lambda: F.predictive_figure(rf.counts, pp, rf.sites, self.unit),
                         "Counts over time with posterior predictive bands per site",
                         "Dots: the counts. Shaded: 50% and 90% posterior predictive intervals of simulated counts; "
                         "line: their median. Counts that "
                         "often fall outside the 90% band point to a model that does not fit.")
        body += notice("Posterior predictive bands missing", pp.notes, "warn")
        sc = self.audit.spread
        if sc is not None:
            verdict = ("The counts swing more from one census to the next than the model's own simulations do: "
                       "the model lacks good and bad years, so its extinction risks are likely too low or too "
                       "confident. Refit with good and bad years (--varying-years births) and compare."
                       if sc.too_calm else "The model's simulations swing from one census to the next as much as "
                                           "the counts do.")
            body += (f"<p>Year-to-year swings: the standard deviation of the one-step log changes of the counts is "
                     f"{esc(format_number(sc.observed, 3))}; the model's simulated series give "
                     f"{esc(format_number(sc.predicted[0], 3))} (90% {esc(format_number(sc.predicted[1], 3))} to "
                     f"{esc(format_number(sc.predicted[2], 3))}; posterior predictive p = "
                     f"{esc(format_number(sc.p_value, 2))}). {esc(verdict)}</p>")
        body += self.forecast_part()
        data = rf.summary_section("data")
        settings = rf.run["settings"] if rf.run is not None else rf.summary_section("settings")
        body += "<h3>Assumptions</h3><p>The results depend on these settings (rate family, priors, observation model, " \
                f"size cap, horizons). Rates are per {esc(self.unit)}: {esc(self.unit_reason or 'the unit of the data’s time column')}.</p>"
        family = rf.summary_section("family") or {}
        fam = rf.family_text or (f"Rate family: {family['name']}\n  {family['formula']}" if family else "")
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
        body = self.fig("rates.png", lambda: F.rates_figure(d, self.base, self.level, observed, top, self.unit),
                        "Per-capita birth and death rates against population size with credible bands",
                        f"Left: per-capita birth rate b(n) and death rate d(n) by size, posterior mean with {self.pct} "
                        "bands. Right: their difference; above 0 an animal adds more births than deaths. Shaded "
                        "background: the sizes the counts cover (outside it the rates are the family's formula "
                        "carried on, not data).")
        body += self.pooling_note()
        iota = band(d["immigration"].sel(scenario=self.base), self.level)
        if float(iota.hi) > 0:
            body += (f"<p>Immigration ι (arrivals per {esc(self.unit)}, independent of size): posterior mean "
                     f"{esc(format_number(float(iota.mean)))}, {self.pct} interval "
                     f"{esc(format_interval(float(iota.lo), float(iota.hi)))}.</p>")
        else:
            body += "<p>No immigration in this model: size 0 is absorbing.</p>"
        body += self.environment_part()
        params = rf.summary_section("parameters")
        if params is not None:
            pt, where = pd.DataFrame.from_dict(params, orient="index"), "summary.json"
        elif self.audit.convergence is not None:
            pt, where = self.audit.convergence.table, "recomputed from posterior.nc"
        else:
            pt, where = pd.DataFrame(), ""
        if not pt.empty:
            lo, hi = (1 - self.level) / 2, 1 - (1 - self.level) / 2
            cols = {"mean": "mean", "sd": "sd", "q_lo": f"{lo:.0%}", "q50": "50%", "q_hi": f"{hi:.0%}",
                    "r_hat": "R-hat", "ess_bulk": "bulk ESS", "ess_tail": "tail ESS"}
            body += frame_table(pt.apply(pd.to_numeric), cols, index="parameter",
                                caption=f"Posterior summary of the parameters ({where}).")
        return section("rates", "3. Birth and death rates", body)

    def forecast_part(self) -> str:
        """The next censuses: a fan chart and a table (baseline), from summary.json."""
        frame = forecast_frame(self.rf.summary_section("derived"), self.base)
        if frame.empty:
            return ""
        fmt = lambda v: "—" if pd.isna(v) else format_number(float(v))  # noqa: E731
        rows = [[Cell(r.site), Cell(format_number(float(r.time)), "num"), Cell(fmt(r.q50), "num"),
                 Cell(f"{fmt(r.q25)} to {fmt(r.q75)}", "num"), Cell(f"{fmt(r.q05)} to {fmt(r.q95)}", "num"),
                 Cell(fmt(r.mean), "num")] for r in frame.itertuples(index=False)]
        out = "<h3>How many to expect at the next censuses</h3>"
        out += self.fig("forecast.png", lambda: forecast_figure(self.rf.counts, frame, self.rf.sites, self.unit),
                        "Fan chart of the forecast of the next censuses per site",
                        "The predictive distribution of the population size at each of the next census times, "
                        "starting from the last count: 50% and 90% bands and the median. It averages over the "
                        "posterior, so it carries both the uncertainty in the rates and the chance of births and "
                        "deaths" + (" and of good and bad years" if self.varying else "") + ".")
        out += table(["site", "time", "median", "50% interval", "90% interval", "mean"], rows,
                     caption=f"{self.base.capitalize()}: forecast of the population size at the next censuses "
                             "(with exact counts, the next counts).")
        return out

    def environment_part(self) -> str:
        """Good and bad years (σ, the environmental share of the variance) and covariate effects."""
        rf, post, lv = self.rf, self.rf.idata.posterior, self.level
        varying = (rf.summary_section("environment") or {}).get("varying_years", "none")
        out = ""
        if "environment_sd" in post and varying in ("births", "births_and_deaths"):
            sd = band(post["environment_sd"], lv)
            moved = "per-capita births" if varying == "births" else "per-capita births (and, inversely, deaths)"
            out += (f"<h3>Good and bad years</h3><p>Each census interval draws its own conditions, which move every "
                    f"animal's {moved} together. Their year-to-year standard deviation on the log scale is σ = "
                    f"{esc(format_number(float(sd.median)))} ({self.pct} interval "
                    f"{esc(format_interval(float(sd.lo), float(sd.hi)))}); a good year one σ above the average "
                    f"multiplies births by about {esc(format_number(math.exp(float(sd.median))))}.")
            if rf.counts is not None and rf.counts["count"].notna().any():
                c = int(max(1, round(float(rf.counts["count"].dropna().astype(float).median()))))
                c = min(c, rf.cap)
                share = band(environment_share(post, self.derived, self.base, c, varying), lv)
                out += (f" At the median count ({c}) the environment makes up "
                        f"{esc(format_probability(float(share.median)))} ({self.pct} interval "
                        f"{esc(format_interval(float(share.lo), float(share.hi), format_probability))}) of the "
                        "variance of one year's log growth; the rest is the chance of births and deaths "
                        "themselves (Lande, Engen &amp; Sæther 2003).")
            out += (" The extinction and quasi-extinction probabilities, the criterion E categories, the mean "
                    "times to extinction and the size distributions below all come from the annual chain that "
                    f"draws a new year each {esc(self.unit)}, so they depend on σ: the wider the swings, the likelier a "
                    "run of bad years.</p>")
        effects = covariate_effects(post, lv)
        if not effects.empty:
            rows = [[r.rate, r.covariate, Cell(format_number(r.ratio, 3), "num"),
                     Cell(format_interval(r.lo, r.hi), "num"), Cell(format_probability(r.p_above_1), "num")]
                    for r in effects.itertuples(index=False)]
            out += table(["rate", "covariate", "factor per unit (median)", f"{self.pct} interval",
                          "P(factor > 1)"], rows,
                         caption="Known conditions: each per-capita rate is multiplied by this factor for every unit "
                                 "of the covariate (for a 0/1 covariate: the rate when it is 1 over the rate when it "
                                 "is 0). Forecasts use the future values stated in the settings.")
        return out

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
        rows.append([f"extinction rate from quasi-stationarity (per {self.unit})", Cell(format_number(float(b.median)), "num"),
                     Cell(format_interval(float(b.lo), float(b.hi)), "num")])
        for site in self.rf.sites:
            b = band(d["log10_mean_time_to_extinction"].sel(site=site), lv)
            rows.append([f"mean time to extinction from the last count, {site} ({self.units})",
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
                 + ("assume the data's time unit is years." if self.unit != "year" else "are in years, as the data are."))
        body = self.fig("extinction_all_sites.png",
                        lambda: F.extinction_figure(d["extinction_probability_all_sites"], hz, self.level,
                                                    title="All sites together", units=self.units),
                        "Extinction and quasi-extinction probability against horizon, all sites, with criterion E marks",
                        f"Probability that every site has fallen to the threshold (0: extinction) within each horizon: "
                        f"posterior mean and {self.pct} band. {marks} Log axis when every interval stays below 5%.")
        body += self._extinction_tables(extinction_table(self.derived, self.base, self.level), "All sites together")
        if len(self.rf.sites) > 1:
            body += self.fig("extinction_by_site.png",
                             lambda: F.extinction_figure(d["extinction_probability"], hz, self.level, panels="site",
                                                                 units=self.units),
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
        return table(["threshold", f"horizon ({self.units})", "probability (posterior mean)", f"{self.pct} interval"], rows,
                     caption=title)

    # ---- 6. scenarios ----------------------------------------------------------------
    def scenarios_section(self) -> str:
        scen = self.rf.scenarios
        if len(scen) < 2:
            return section("scenarios", "6. Scenarios", "<p>No scenarios were set for this run: only the fitted "
                                                        "rates (the baseline) are shown.</p>")
        what = scenario_settings(self.rf.scenario_settings, self.unit)
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
        body += self.fig("scenarios.png", lambda: F.scenario_figure(self.derived, self.level, self.units),
                         "Extinction curves per scenario and paired differences from the baseline",
                         f"Left: probability of extinction of every site within each horizon, per scenario (posterior "
                         f"mean, {self.pct} band). Right: paired difference from {self.base} (dot: mean; bar: "
                         f"{self.pct} interval).")
        cats = category_table(self.derived, self.categories)
        body += frame_table(cats, {c: c for c in cats.columns}, formats={c: format_probability for c in cats.columns},
                            index="scenario", caption="Posterior probability of each criterion E category per scenario.")
        return section("scenarios", "6. Scenarios", body)

    # ---- page --------------------------------------------------------------------------
    def render(self) -> str:
        # the summary is written last, so that it knows whether any figure failed
        later = [self.data_section(), self.rates_section(), self.distributions_section(),
                 self.extinction_section(), self.scenarios_section(), diagnostics_section(self)]
        parts = [self.summary_section()] + later
        failed = self.audit.failed + self.figure_failures
        recorded = [str(w) for w in (self.rf.summary_section("warnings") or [])]
        # a warning the run recorded that a failed check also finds is shown once, naming both sources
        also = {c.name: [w for w in recorded if w[:60] in c.detail or c.detail[:60] in w] for c in failed}
        recorded = [w for w in recorded if not any(w in ws for ws in also.values())]
        if failed:
            banner = notice(f"{len(failed)} check{'s' if len(failed) != 1 else ''} failed — read before using "
                            "these results", [f"{c.name}: {c.detail} ({c.source}"
                                              + ("; also recorded by the run in summary.json" if also[c.name] else "")
                                              + ")" for c in failed], "alert")
        else:
            n = len([c for c in self.audit.checks if c.passed])
            banner = notice(f"All {n} checks that could be made passed (details in section 7).", [], "ok")
        banner += notice("Warnings from the checks", [f"{c.name}: {c.detail} ({c.source})"
                                                      for c in self.audit.warnings], "warn")
        banner += notice("Checks that could not be made", [f"{c.name}: {c.detail}" for c in self.audit.not_made], "warn")
        banner += notice("Warnings recorded by the run (summary.json)", recorded, "warn")
        ext = extinction_table(self.derived, self.base, self.level)
        if not ext.empty:
            cats = category_table(self.derived, self.categories).loc[self.base]
            banner = (f'<p class="headline">{esc(headline(ext, cats, len(failed), len(self.rf.sites), self.units, self.level))}'
                      "</p>" + banner)
        data = self.rf.summary_section("data") or {}
        family = self.rf.summary_section("family") or {}
        subtitle = [f"Data: {data.get('source', 'counts.csv')}"
                    + (f" · {len(self.rf.sites)} site{'s' if len(self.rf.sites) > 1 else ''}"),
                    f"Rate family: {family.get('name', 'not recorded')} · scenarios: {', '.join(self.rf.scenarios)}"]
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
    rf = open_run(run_dir)
    rep = _Report(rf, audit_folder(rf, report_written=False))
    text = rep.render()
    fig_dir = rf.path / S.FIGURES_DIR
    fig_dir.mkdir(exist_ok=True)
    for name, png in rep.figures.items():
        write_atomic(fig_dir / name, png)
    return write_atomic(rf.path / "report.html", text)
