"""The report's figures (matplotlib, drawn off-screen with the Agg renderer).

Figures are built on :class:`matplotlib.figure.Figure` objects directly, never through
pyplot, so that building a report neither opens windows nor changes the caller's
backend. Each function returns a Figure; :func:`figure_png` turns it into PNG bytes.
Bands are equal-tailed credible intervals over the posterior draws (90% unless the run
says otherwise); lines are posterior means unless a caption says otherwise.
"""
from __future__ import annotations

import io
import math
from collections.abc import Mapping, Sequence
from contextlib import contextmanager
from typing import Any, Iterator

import matplotlib
import numpy as np
import pandas as pd
import xarray as xr
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .bands import Band, band
from .predictive import PredictiveBands

__all__ = ["figure_png", "predictive_figure", "rates_figure", "distributions_figure", "extinction_figure",
           "categories_figure", "scenario_figure", "style", "new_figure", "plain_text", "grid_shape", "PROBABILITY_FLOOR", "SERIES", "MAIN",
           "DEATH"]

#: Smallest probability drawn on a logarithmic axis; smaller values sit on the bottom edge.
PROBABILITY_FLOOR = 1e-6

INK = "#262626"
MUTED = "#8c8c8c"
MAIN = "#27598a"
BIRTH = "#2e7a57"
DEATH = "#a8412f"
ACCENT = "#b8790f"
SERIES = ("#27598a", "#b8790f", "#6a4a98", "#2e7a57", "#a8412f", "#4d4d4d", "#1f8a99")
CATEGORY_COLOURS = {"below VU": "#d9d9d9", "VU": "#e8c547", "EN": "#e0892b", "CR": "#b3352b"}

_STYLE = {
    "font.size": 9.0, "axes.titlesize": 10.0, "axes.labelsize": 9.0, "legend.fontsize": 8.0,
    "xtick.labelsize": 8.0, "ytick.labelsize": 8.0, "axes.edgecolor": "#6f6f6f", "axes.labelcolor": INK,
    "text.color": INK, "xtick.color": "#4d4d4d", "ytick.color": "#4d4d4d", "axes.spines.top": False,
    "axes.spines.right": False, "axes.grid": True, "grid.color": "#e6e6e6", "grid.linewidth": 0.7,
    "axes.titlelocation": "left", "axes.titleweight": "bold", "legend.frameon": False,
    "figure.facecolor": "white", "axes.facecolor": "white", "savefig.facecolor": "white",
}


@contextmanager
def style() -> Iterator[None]:
    """The report's matplotlib style, for the figures drawn inside the block."""
    with matplotlib.rc_context(_STYLE):
        yield


def new_figure(width: float, height: float, nrow: int = 1, ncol: int = 1, *, left: float = 0.75,
            right: float = 0.2, top: float = 0.4, bottom: float = 0.55, wgap: float = 0.75,
            hgap: float = 0.75) -> Figure:
    """A figure with fixed margins and gaps in inches (cheaper to draw than a layout engine)."""
    fig = Figure(figsize=(width, height))
    FigureCanvasAgg(fig)
    aw = (width - left - right - (ncol - 1) * wgap) / ncol
    ah = (height - top - bottom - (nrow - 1) * hgap) / nrow
    fig.subplots_adjust(left=left / width, right=1 - right / width, bottom=bottom / height,
                        top=1 - top / height, wspace=wgap / max(aw, 0.1), hspace=hgap / max(ah, 0.1))
    return fig


def figure_png(fig: Figure, dpi: int = 110) -> bytes:
    """PNG bytes of a figure (Agg renderer).

    Args:
        fig: the figure.
        dpi: resolution.

    Returns:
        the PNG file's bytes.
    """
    buf = io.BytesIO()
    with style():
        fig.savefig(buf, format="png", dpi=dpi)
    return buf.getvalue()


def plain_text(text: Any) -> str:
    """Text from a file, safe for matplotlib (a "$" would otherwise start mathematical text)."""
    return str(text).replace("$", r"\$")


def grid_shape(n: int, ncols: int = 2) -> tuple[int, int]:
    """(rows, columns) of a grid of n panels at most ``ncols`` wide."""
    ncols = max(1, min(ncols, n))
    return math.ceil(n / ncols), ncols


def _percent(p: float, _pos: Any = None) -> str:
    if p <= 0:
        return "0%"
    v = 100 * p
    if v >= 1:
        return f"{v:.0f}%"
    digits = max(0, -int(math.floor(math.log10(v))))
    return f"{v:.{digits}f}%"


def _band_fill(ax: Any, x: np.ndarray, b: Any, colour: str, label: str | None, level: float,
               line: str = "mean") -> None:
    centre = b.mean if line == "mean" else b.median
    ax.fill_between(x, np.asarray(b.lo), np.asarray(b.hi), color=colour, alpha=0.22, linewidth=0,
                    label=f"{level:.0%} interval" if label else None)
    ax.plot(x, np.asarray(centre), color=colour, linewidth=1.6, label=label)


# --------------------------------------------------------------------------- data
def predictive_figure(counts: pd.DataFrame | None, bands: PredictiveBands, sites: Sequence[str],
                      unit: str = "time unit") -> Figure:
    """The counts of each site with posterior predictive bands (50% and 90%) and median.

    Args:
        counts: observed counts (columns time, count, site); None draws bands only.
        bands: posterior predictive quantiles per site.
        sites: the sites, one panel each.
        unit: the time unit ("year"), for the axis label; whole times get whole ticks.

    Returns:
        Figure.
    """
    with style():
        nrow, ncol = grid_shape(len(sites))
        many = len(sites) > 1
        fig = new_figure(4.2 * ncol if many else 7.5, 2.8 * nrow + (0.35 if many else 0), nrow, ncol,
                      bottom=0.9 if many else 0.55)
        for i, site in enumerate(sites):
            ax = fig.add_subplot(nrow, ncol, i + 1)
            df = bands.bands.get(site)
            if df is not None and not df.empty:
                t = df["time"].to_numpy()
                ax.fill_between(t, df["q05"], df["q95"], step=None, color=MAIN, alpha=0.16, linewidth=0,
                                label="90% predictive")
                ax.fill_between(t, df["q25"], df["q75"], color=MAIN, alpha=0.28, linewidth=0,
                                label="50% predictive")
                ax.plot(t, df["q50"], color=MAIN, linewidth=1.2, label="predictive median")
            if counts is not None:
                rows = counts[counts["site"] == site]
                seen = rows[rows["count"].notna()]
                ax.plot(seen["time"], seen["count"], "o", color=INK, markersize=3.2, label="count", zorder=3)
                miss = np.unique(rows.loc[rows["count"].isna(), "time"])
                for k, t_miss in enumerate(miss):
                    ax.axvline(t_miss, color=MUTED, linestyle=":", linewidth=0.8,
                               label="no survey" if k == 0 else None)
            ax.set_title(plain_text(site) if len(sites) > 1 else "Counts and posterior predictive bands")
            ax.set_xlabel(unit if unit != "time unit" else "time")
            if counts is not None and bool(np.all(np.mod(counts["time"].to_numpy(dtype=float), 1) == 0)):
                ax.xaxis.set_major_locator(MaxNLocator(integer=True))  # 2004, not 2002.5
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0f}"))
            ax.set_ylabel("count")
            ax.set_ylim(bottom=0)
            if i == 0 and not many:
                ax.legend(loc="best")
            elif i == 0:
                handles, labels = ax.get_legend_handles_labels()
                fig.legend(handles, labels, loc="lower center", ncol=len(labels), bbox_to_anchor=(0.5, 0.0))
        return fig


# --------------------------------------------------------------------------- rates
def rates_figure(derived: xr.Dataset, scenario: str, level: float = 0.9,
                 observed: tuple[float, float] | None = None, max_size: int | None = None,
                 unit: str = "time unit") -> Figure:
    """Per-capita birth and death rates by size, and their difference, with credible bands.

    Args:
        derived: the push-forward Dataset.
        scenario: scenario name.
        level: credible level of the bands.
        observed: (smallest, largest) count, shaded as the sizes the data cover.
        max_size: largest size drawn (default: the cap).
        unit: the time unit, for the axis labels ("per animal per year").

    Returns:
        Figure with two panels.
    """
    d = derived.sel(scenario=scenario)
    cap = int(derived["size"].max())
    top = cap if max_size is None else max(2, min(cap, int(max_size)))
    d = d.sel(size=slice(1, top))
    x = d["size"].values.astype(float)
    bb, bd = band(d["birth_per_capita"], level), band(d["death_per_capita"], level)
    net = band(d["birth_per_capita"] - d["death_per_capita"], level)
    with style():
        fig = new_figure(8.2, 3.3, 1, 2, wgap=0.85)
        ax1, ax2 = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
        for ax in (ax1, ax2):
            if observed is not None:
                ax.axvspan(max(1, observed[0]), observed[1], color="#f1ede4", zorder=0, label="sizes counted")
        _band_fill(ax1, x, bb, BIRTH, "birth b(n)", level)
        _band_fill(ax1, x, bd, DEATH, "death d(n)", level)
        ax1.set_title("Per-capita birth and death rates")
        ax1.set_xlabel("population size n")
        ax1.set_ylabel(f"rate per animal per {unit}")
        ax1.set_ylim(bottom=0)
        handles, labels = ax1.get_legend_handles_labels()
        keep = [i for i, lab in enumerate(labels) if "interval" not in lab]
        ax1.legend([handles[i] for i in keep], [labels[i] for i in keep], loc="best")
        _band_fill(ax2, x, net, MAIN, "b(n) − d(n)", level)
        ax2.axhline(0, color=INK, linewidth=0.8)
        ax2.set_title("Per-capita growth b(n) − d(n)")
        ax2.set_xlabel("population size n")
        ax2.set_ylabel(f"per animal per {unit}")
        ax2.legend(loc="best")
        return fig


# --------------------------------------------------------------------------- distributions
def _pmf_top(*hi: np.ndarray, cap: int) -> int:
    top = 10
    for h in hi:
        h = np.nan_to_num(np.asarray(h, dtype=float))
        if h.max() > 0:
            idx = np.flatnonzero(h > 1e-4 * h.max())
            top = max(top, int(idx.max()) if idx.size else 10)
    return min(cap, int(top * 1.1) + 2)


def distributions_figure(derived: xr.Dataset, scenario: str, level: float = 0.9) -> Figure:
    """The stationary distribution (over draws where it exists) and the quasi-stationary distribution, with bands.

    Args:
        derived: the push-forward Dataset.
        scenario: scenario name.
        level: credible level of the bands.

    Returns:
        Figure with two panels; the stationary panel's title gives the posterior
        probability that a stationary distribution exists.
    """
    d = derived.sel(scenario=scenario)
    cap = int(derived["size"].max())
    exists = d["stationary_exists"]
    p_exists = float(exists.mean())
    st = band(d["stationary_pmf"].where(exists), level) if bool(exists.any()) else None
    qs = band(d["quasi_pmf"], level)
    top = _pmf_top(qs.hi, *( [st.hi] if st is not None else []), cap=cap)
    x = derived["size"].values[: top + 1]
    with style():
        fig = new_figure(8.2, 3.3, 1, 2, wgap=0.85)
        ax1, ax2 = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
        if st is not None:
            _band_fill(ax1, x, _slice(st, top), MAIN, "posterior mean", level)
            ax1.legend(loc="best")
        else:
            ax1.text(0.5, 0.5, "no draw has a stationary distribution\n(the population is not regulated,\n"
                     "or size 0 is absorbing)", transform=ax1.transAxes, ha="center", va="center", color=MUTED)
        ax1.set_title(f"Stationary, P(exists) = {_percentplain_text(p_exists)}")
        ax1.set_xlabel("population size")
        ax1.set_ylabel("probability")
        _band_fill(ax2, x, _slice(qs, top), ACCENT, "posterior mean", level)
        ax2.set_title("Quasi-stationary (given not extinct)")
        ax2.set_xlabel("population size")
        ax2.set_ylabel("probability")
        ax2.legend(loc="best")
        for ax in (ax1, ax2):
            ax.set_ylim(bottom=0)
            ax.set_xlim(0, top)
        return fig


def _percentplain_text(p: float) -> str:
    if not np.isfinite(p):
        return "—"
    return f"{100 * p:.0f}%" if p in (0.0, 1.0) or 0.01 <= p <= 0.99 else f"{100 * p:.2g}%"


def _slice(b: Band, top: int) -> Band:
    sel = {"size": slice(0, top)}
    return Band(mean=b.mean.sel(sel), lo=b.lo.sel(sel), median=b.median.sel(sel), hi=b.hi.sel(sel),
                n=b.n.sel(sel), level=b.level)


# --------------------------------------------------------------------------- extinction
def _iucn_marks(ax: Any, horizons: Mapping[str, float], log: bool) -> None:
    marks = (("CR", 0.5), ("EN", 0.2), ("VU", 0.1))
    for name, p in marks:
        h = float(horizons.get(name, {"CR": 10.0, "EN": 20.0, "VU": 100.0}[name]))
        ax.plot([h], [p], marker="D", markersize=6, color=CATEGORY_COLOURS[name], markeredgecolor=INK,
                markeredgewidth=0.6, linestyle="none", zorder=4)
        right = name == "VU"
        ax.annotate(f"{name}: {p:.0%} in {h:g} y", (h, p), textcoords="offset points",
                    xytext=(-7 if right else 7, -3 if log else 2), ha="right" if right else "left",
                    fontsize=7.5, color=INK)


def extinction_figure(draws: xr.DataArray, horizons: Mapping[str, float], level: float = 0.9,
                      title: str = "", panels: str | None = None, units: str = "time units") -> Figure:
    """Probability of falling to each threshold within each horizon, with bands and the criterion E marks.

    The criterion E marks (IUCN 2012, Red List Categories and Criteria v3.1) are CR at
    50% within the CR horizon, EN at 20% within the EN horizon, VU at 10% within 100
    years. The axis is linear when any interval reaches 5%, otherwise logarithmic down
    to PROBABILITY_FLOOR (smaller values are drawn on the bottom edge).

    Args:
        draws: probabilities with dims (chain, draw, threshold, horizon) and optionally
            one more dim (e.g. site) given by ``panels``.
        horizons: {"CR": years, "EN": years, "VU": years}.
        level: credible level of the bands.
        title: title of a single-panel figure.
        panels: a dim of ``draws`` to draw one panel per value of (e.g. "site").

    Returns:
        Figure.

    Raises:
        ValueError: ``draws`` lacks the threshold or horizon dim.
    """
    for dim in ("threshold", "horizon"):
        if dim not in draws.dims:
            raise ValueError(f"extinction draws need a {dim!r} dim (dims: {', '.join(draws.dims)})")
    keys = [None] if panels is None else list(draws[panels].values)
    b_all = band(draws, level)
    log = not bool((b_all.hi >= 0.05).any())
    x = draws["horizon"].values.astype(float)
    with style():
        nrow, ncol = grid_shape(len(keys))
        fig = new_figure(8.2 if ncol == 1 else 3.6 * ncol + 1.9, 3.4 if nrow == 1 else 2.9 * nrow, nrow, ncol,
                      right=2.0, left=0.85)
        for i, key in enumerate(keys):
            ax = fig.add_subplot(nrow, ncol, i + 1)
            b = b_all if key is None else band(draws.sel({panels: key}), level)
            for j, k in enumerate(draws["threshold"].values):
                label = "extinction (0)" if int(k) == 0 else f"quasi-extinction (≤ {int(k)})"
                sel = {"threshold": k}
                part = _Bandlike(b, sel, log)
                colour = SERIES[j % len(SERIES)]
                ax.fill_between(x, part.lo, part.hi, color=colour, alpha=0.2, linewidth=0)
                ax.plot(x, part.mean, color=colour, linewidth=1.6, marker="o", markersize=3, label=label)
            _iucn_marks(ax, horizons, log)
            if log:
                ax.set_yscale("log")
                ax.set_ylim(PROBABILITY_FLOOR * 0.8, 1.0)
            else:
                ax.set_ylim(0, 1)
            ax.yaxis.set_major_formatter(FuncFormatter(_percent))
            ax.set_xlim(0, max(x.max(), max(horizons.values())) * 1.12)
            ax.set_xlabel(f"horizon ({units}; years for criterion E)" if units != "years" else "horizon (years)")
            ax.set_ylabel("probability")
            ax.set_title(plain_text(key) if key is not None else plain_text(title))
            if i == ncol - 1 or len(keys) == 1:
                ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0))
        return fig


class _Bandlike:
    def __init__(self, b: Any, sel: Mapping[str, Any], log: bool) -> None:
        def get(da: xr.DataArray) -> np.ndarray:
            v = np.asarray(da.sel(sel).values, dtype=float)
            return np.clip(v, PROBABILITY_FLOOR, 1.0) if log else v

        self.mean, self.lo, self.hi = get(b.mean), get(b.lo), get(b.hi)


# --------------------------------------------------------------------------- categories and scenarios
def categories_figure(table: pd.DataFrame) -> Figure:
    """Posterior probability of each criterion E category, one stacked bar per scenario.

    Args:
        table: DataFrame indexed by scenario, one column per category (see tables.category_table).

    Returns:
        Figure.
    """
    with style():
        fig = new_figure(7.5, 1.05 + 0.42 * len(table), left=1.1, top=0.5, right=0.4)
        ax = fig.add_subplot(1, 1, 1)
        names = list(table.index)[::-1]
        ticks = [plain_text(n) for n in names]
        left = np.zeros(len(names))
        for j, cat in enumerate(table.columns):
            vals = table.loc[names, cat].to_numpy(dtype=float)
            colour = CATEGORY_COLOURS.get(cat, SERIES[j % len(SERIES)])
            ax.barh(np.arange(len(names)), vals, left=left, color=colour, edgecolor="white", linewidth=0.8, label=cat, height=0.62)
            for y, (l, v) in enumerate(zip(left, vals)):
                if v >= 0.06:
                    ax.text(l + v / 2, y, f"{v:.0%}", ha="center", va="center", fontsize=7.5,
                            color="white" if cat in ("EN", "CR") else INK)
            left += vals
        ax.set_yticks(np.arange(len(names)), ticks)
        ax.set_axisbelow(True)
        ax.set_xlim(0, 1)
        ax.xaxis.set_major_formatter(FuncFormatter(_percent))
        ax.grid(axis="y", visible=False)
        ax.set_xlabel("posterior probability of the criterion E category")
        ax.legend(ncol=len(table.columns), loc="lower center", bbox_to_anchor=(0.5, 1.0))
        return fig


def scenario_figure(derived: xr.Dataset, level: float = 0.9, units: str = "time units") -> Figure:
    """Scenarios beside the baseline: extinction curves (all sites, threshold 0 or the lowest),
    and the paired difference from the baseline at each horizon, with bands.

    Args:
        derived: the push-forward Dataset (baseline first).
        level: credible level.
        units: the plural time unit, for the axis labels.

    Returns:
        Figure with two panels.
    """
    scen = [str(s) for s in derived["scenario"].values]
    k = derived["threshold"].values[0]
    ext = derived["extinction_probability_all_sites"].sel(threshold=k)
    x = derived["horizon"].values.astype(float)
    b_all = band(ext, level)
    log = not bool((b_all.hi >= 0.05).any())
    what = "extinction" if int(k) == 0 else f"falling to {int(k)} or fewer"
    with style():
        fig = new_figure(8.2, 3.4, 1, 2, left=0.85, wgap=1.1)
        ax1, ax2 = fig.add_subplot(1, 2, 1), fig.add_subplot(1, 2, 2)
        base = ext.sel(scenario=scen[0])
        width = 0.8 * (np.min(np.diff(x)) if x.size > 1 else 1.0) / max(1, len(scen) - 1)
        for i, sc in enumerate(scen):
            colour = SERIES[i % len(SERIES)]
            bs = band(ext.sel(scenario=sc), level)
            lo, hi, mean = (np.asarray(v.values, dtype=float) for v in (bs.lo, bs.hi, bs.mean))
            if log:
                lo, hi, mean = (np.clip(v, PROBABILITY_FLOOR, 1) for v in (lo, hi, mean))
            ax1.fill_between(x, lo, hi, color=colour, alpha=0.16, linewidth=0)
            ax1.plot(x, mean, color=colour, marker="o", markersize=3, linewidth=1.5, label=plain_text(sc))
            if i == 0:
                continue
            diff = band(ext.sel(scenario=sc) - base, level)
            off = (i - (len(scen)) / 2) * width * 0.9
            m = np.asarray(diff.mean.values, dtype=float)
            # interval and mean drawn separately: with a heavy tail the mean can lie outside the interval
            ax2.vlines(x + off, np.asarray(diff.lo.values, dtype=float), np.asarray(diff.hi.values, dtype=float),
                       color=colour, linewidth=2.2, alpha=0.55)
            ax2.plot(x + off, m, "o", color=colour, markersize=4.5, label=plain_text(sc))
        if log:
            ax1.set_yscale("log")
            ax1.set_ylim(PROBABILITY_FLOOR * 0.8, 1)
        else:
            ax1.set_ylim(0, 1)
        ax1.yaxis.set_major_formatter(FuncFormatter(_percent))
        ax1.set_title(f"P({what}), all sites")
        ax1.set_xlabel(f"horizon ({units})")
        ax1.legend(loc="best")
        ax2.axhline(0, color=INK, linewidth=0.8)
        ax2.set_title(f"Change from {plain_text(scen[0])} (paired)")
        ax2.set_xlabel(f"horizon ({units})")
        ax2.set_ylabel("difference in probability")
        ax2.yaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{100 * v:+.3g} pts" if v else "0"))
        if len(scen) > 1:
            ax2.legend(loc="best")
        return fig
