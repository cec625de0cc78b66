"""The comparison report of a weighing folder: which model the counts support, and what it changes.

Reads only the weighing folder's own files (weights.csv, weighed.nc, weighing.json; each
model's summaries were copied into weighing.json when the weighing was written) through
:func:`tallyfit.runfolder.weighing.open_weighing`, and links each model's own report.
"""
from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from tallyfit.runfolder import schema as S
from tallyfit.runfolder.store import write_atomic
from tallyfit.runfolder.weighing import WeighingFolder, open_weighing

from .figures import MAIN, MUTED, PROBABILITY_FLOOR, figure_png, new_figure, plain_text, style
from .html import (Cell, esc, figure, format_interval, format_number, format_probability, notice, page, section,
                   table)

__all__ = ["build_weighing_report", "weighing_extinction_figure", "WEIGHED"]

#: The row label of the weighed combination.
WEIGHED = "weighed by stacking"
#: Colours of the models' lines (the weighed combination is drawn in MAIN).
MODEL_COLOURS = ("#a8412f", "#2e7a57", "#b8790f", "#6b4c9a", "#4d4d4d", "#1f8a99")


def _stat(entry: dict[str, Any] | None) -> tuple[Any, Any, Any]:
    return (None, None, None) if not entry else (entry.get("mean"), entry.get("q_lo"), entry.get("q_hi"))


def _entries(wf: WeighingFolder) -> dict[str, dict[str, Any]]:
    """{row label: baseline summary} for every compared model, then the weighed combination."""
    out = {k: m["baseline"] for k, m in wf.section("models").items() if m["baseline"] is not None}
    baseline = str(wf.weighed["scenario"].values[0])
    out[WEIGHED] = wf.section("weighed")[baseline]
    return out


def weighing_extinction_figure(entries: dict[str, dict[str, Any]], threshold: str, units: str, level: float) -> Any:
    """Extinction probability against the horizon, one line per model and the weighed band.

    Args:
        entries: {label: baseline summary} (as :func:`_entries`), the weighed one last.
        threshold: the summary key, e.g. "threshold=0".
        units: the time units' plural.
        level: the credible level of the band.

    Returns:
        a matplotlib Figure.
    """
    fig = new_figure(7.2, 3.9, right=2.3)
    ax = fig.add_subplot(1, 1, 1)
    with style():
        for i, (label, e) in enumerate(entries.items()):
            ext = e["extinction_probability_all_sites"].get(threshold, {})
            hs = sorted(ext, key=float)
            x = np.array([float(h) for h in hs])
            mean = np.array([np.nan if ext[h]["mean"] is None else ext[h]["mean"] for h in hs], dtype=float)
            if label == WEIGHED:
                lo = np.array([np.nan if ext[h]["q_lo"] is None else ext[h]["q_lo"] for h in hs], dtype=float)
                hi = np.array([np.nan if ext[h]["q_hi"] is None else ext[h]["q_hi"] for h in hs], dtype=float)
                ax.fill_between(x, np.maximum(lo, PROBABILITY_FLOOR), np.maximum(hi, PROBABILITY_FLOOR), color=MAIN,
                                alpha=0.2, linewidth=0, label=f"weighed, {level:.0%} interval")
                ax.plot(x, np.maximum(mean, PROBABILITY_FLOOR), color=MAIN, linewidth=2.4, label="weighed, mean")
            else:
                ax.plot(x, np.maximum(mean, PROBABILITY_FLOOR), color=MODEL_COLOURS[i % len(MODEL_COLOURS)],
                        linewidth=1.4, linestyle="--", marker="o", markersize=3, label=plain_text(label))
        ax.set_yscale("log")
        ax.set_ylim(PROBABILITY_FLOOR, 1.2)
        ax.set_xlabel(f"horizon ({plain_text(units)})")
        ax.set_ylabel("probability of extinction")
        ax.grid(True, color=MUTED, alpha=0.25, linewidth=0.6)
        ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), frameon=False, fontsize=8)
    return fig


def _loo_section(wf: WeighingFolder) -> str:
    rows = []
    for _, r in wf.table.iterrows():
        compared = r["status"] == "ok" and not np.isnan(r["weight"])
        checks = (Cell("passed", "pass") if r["diagnostics_passed"] is True or r["diagnostics_passed"] == "True"
                  else Cell("FAILED", "fail") if compared else Cell("not fitted", "na"))
        k = r["max_pareto_k"]
        rows.append([str(r["model"]), "none" if r["varying_years"] == "none" else str(r["varying_years"]).replace("_", " and "),
                     Cell(f"{format_number(r['elpd_loo'])} ± {format_number(r['se'])}", "num") if compared else "—",
                     Cell(format_number(r["elpd_diff"]) + (f" ± {format_number(r['dse'])}" if compared and r["dse"] > 0
                                                           else ""), "num") if compared else "—",
                     Cell(format_number(r["p_loo"]), "num") if compared else "—",
                     Cell(f"{r['weight']:.3f}", "num") if compared else "—",
                     Cell(format_number(k), "fail" if compared and k > 0.7 else "num") if compared else "—", checks])
    body = table(["model", "good and bad years", "elpd_loo ± se", "difference from best ± se", "p_loo",
                  "stacking weight", "largest Pareto k", "convergence checks"], rows,
                 caption="Models ranked by expected log predictive density of each transition left out (PSIS-LOO); "
                         "higher is better.")
    links = "".join(f'<li><a href="{esc(r["folder"])}/report.html">{esc(r["model"])}</a> '
                    f'<span class="file">({esc(r["folder"])})</span></li>'
                    for _, r in wf.table.iterrows() if r["status"] == "ok")
    body += f"<p>Each model's own report, with its checks and figures:</p><ul>{links}</ul>"
    body += ("<p>elpd_loo estimates how well a model predicts each census from the others, by Pareto-smoothed "
             "importance sampling leave-one-out (PSIS-LOO; Vehtari, Gelman &amp; Gabry 2017, Statistics and Computing "
             "27:1413–1432); p_loo is its effective number of parameters. A Pareto k above 0.7 marks a census whose "
             "left-out prediction is unreliable. The stacking weights are the mixture of the models that predicts "
             "left-out censuses best (Yao, Vehtari, Simpson &amp; Gelman 2018, Bayesian Analysis 13:917–1007); they "
             "sum to 1, and a weight near 0 means the model adds nothing the others do not. Both are ArviZ's.</p>")
    return section("weights", "1. Which model the counts support", body)


def _risk_section(wf: WeighingFolder, entries: dict[str, dict[str, Any]], level: float,
                  figures: dict[str, bytes]) -> str:
    dep = wf.section("dependence")
    thr, units = dep["threshold"], wf.section("data")["time_units"]
    horizons = sorted(entries[WEIGHED]["extinction_probability_all_sites"][thr], key=float)
    rows = []
    for label, e in entries.items():
        ext = e["extinction_probability_all_sites"][thr]
        rows.append([Cell(label, "pass" if label == WEIGHED else None)]
                    + [Cell(f"{format_probability(ext[h]['mean'])} ({format_interval(ext[h]['q_lo'], ext[h]['q_hi'], format_probability)})",
                            "num") if h in ext else "—" for h in horizons])
    what = "extinct" if thr == "threshold=0" else f"at or below {thr.split('=')[1]}"
    body = table(["model"] + [f"within {h} {units}" for h in horizons], rows,
                 caption=f"Probability that every site is {what}: posterior mean ({level:.0%} interval), baseline scenario.")
    png = figure_png(weighing_extinction_figure(entries, thr, units, level))
    figures["weighing_extinction.png"] = png
    body += figure(png, "Extinction probability against horizon for each model and the weighed combination",
                   "Each model's posterior mean (dashed) and the stacking-weighted combination (solid, with its "
                   "interval); logarithmic scale.", file_name=f"{S.FIGURES_DIR}/weighing_extinction.png")
    cats = list(entries[WEIGHED]["iucn_category_probability"])
    body += "<h3>Criterion E categories</h3>" + table(
        ["model"] + cats, [[label] + [Cell(format_probability(e["iucn_category_probability"].get(c)), "num") for c in cats]
                           for label, e in entries.items()],
        caption="Posterior probability of each IUCN criterion E category, baseline scenario.")
    size_rows = []
    for label, e in entries.items():
        st, qs = _stat(e.get("stationary_mean")), _stat(e.get("quasi_stationary_mean"))
        size_rows.append([label, Cell(format_probability(e.get("stationary_exists_probability")), "num"),
                          Cell(f"{format_number(st[0])} ({format_interval(st[1], st[2])})", "num"),
                          Cell(f"{format_number(qs[0])} ({format_interval(qs[1], qs[2])})", "num")])
    body += "<h3>Long-run size</h3>" + table(
        ["model", "P(a stationary distribution exists)", "its mean size", "mean size while the population persists "
                                                                          "(quasi-stationary)"], size_rows,
        caption=f"Posterior mean ({level:.0%} interval); the stationary mean over the draws where it exists.")
    return section("side-by-side", "2. The models' answers side by side", body)


def _method_section(wf: WeighingFolder) -> str:
    counts = {str(k): int(v) for k, v in zip(*np.unique(wf.weighed[S.WEIGHED_MODEL_COORD].values, return_counts=True))}
    n = int(wf.weighed.sizes["draw"])
    rows = [[k, Cell(f"{wf.section('weights')[k]:.3f}", "num"), Cell(str(counts.get(k, 0)), "num")]
            for k in wf.section("weights")]
    body = ("<p>The weighed results combine the models' posterior draws: each model gives round(weight × "
            f"{n}) of the {n} draws (largest remainders, so they add up), picked at random from its own draws, "
            "so every weighed figure is the weight-averaged mixture of the models' posteriors. The draws are in "
            "<span class=\"file\">weighed.nc</span> with the model each came from; the table is in "
            "<span class=\"file\">weights.csv</span>.</p>")
    body += table(["model", "stacking weight", "draws in the combination"], rows)
    return section("method", "3. How the combination was made", body)


def build_weighing_report(folder: str | Path) -> Path:
    """Write ``report.html`` (self-contained) and ``figures/`` of a weighing folder.

    Args:
        folder: the weighing folder (or its staging folder).

    Returns:
        the path of report.html.

    Raises:
        RunFolderError: the weighing folder is unfinished or damaged.
        OSError: the report cannot be written.
    """
    wf = open_weighing(folder)
    level = float(wf.section("weighed")["credible_level"])
    entries = _entries(wf)
    figures: dict[str, bytes] = {}
    sections = [_loo_section(wf), _risk_section(wf, entries, level, figures), _method_section(wf)]
    dep = wf.section("dependence")
    failed = [w for w in wf.section("warnings")]
    banner = f'<p class="headline">{esc(dep["sentence"])}</p>'
    if failed:
        banner += notice(f"{len(failed)} problem{'s' if len(failed) != 1 else ''} — read before using these results",
                         failed, "alert")
    else:
        banner += notice("Every model fitted and passed its convergence checks; every PSIS-LOO estimate is "
                         "reliable (Pareto k ≤ 0.7).", [], "ok")
    banner += f'<p class="caution">{esc(wf.section("caution"))}</p>'
    data = wf.section("data")
    subtitle = [f"Data: {data['source']} · {len(data['sites'])} site{'s' if len(data['sites']) != 1 else ''} · "
                f"{data['n_counts']} counts", "Models: " + ", ".join(str(m) for m in wf.table["model"])]
    text = page("tallyfit model weighing", subtitle, banner,
                [("weights", "Which model the counts support"), ("side-by-side", "The models' answers side by side"),
                 ("method", "How the combination was made")], sections)
    fig_dir = wf.path / S.FIGURES_DIR
    fig_dir.mkdir(exist_ok=True)
    for name, png in figures.items():
        write_atomic(fig_dir / name, png)
    return write_atomic(wf.path / "report.html", text)
