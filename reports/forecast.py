"""The forecast of the next censuses in the report: a fan chart and a table per site.

Reads the quantiles summary.json records (``derived.<scenario>.forecast``); computes nothing.
"""
from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import pandas as pd
from matplotlib.figure import Figure
from matplotlib.ticker import FuncFormatter, MaxNLocator

from .figures import INK, MAIN, grid_shape, new_figure, plain_text, style

__all__ = ["forecast_frame", "forecast_figure"]

_QUANTILES = ("q05", "q25", "q50", "q75", "q95")


def forecast_frame(summary_derived: Mapping[str, Any] | None, scenario: str) -> pd.DataFrame:
    """The forecast of one scenario as a table.

    Args:
        summary_derived: summary.json's "derived" section (None: not available).
        scenario: the scenario's name.

    Returns:
        DataFrame with columns site, time, mean, q05, q25, q50, q75, q95 (empty when the run
        has no forecast).
    """
    entry = (summary_derived or {}).get(scenario, {}).get("forecast") or {}
    rows = [{"site": site, **step} for site, steps in entry.items() for step in steps]
    return pd.DataFrame(rows, columns=["site", "time", "mean", *_QUANTILES])


def forecast_figure(counts: pd.DataFrame | None, frame: pd.DataFrame, sites: Sequence[str],
                    unit: str = "time unit") -> Figure:
    """Fan chart per site: the last counts, then the 50% and 90% predictive bands and median of
    the next censuses.

    Args:
        counts: the observed counts (columns site, time, count), or None.
        frame: :func:`forecast_frame`.
        sites: the sites, one panel each.
        unit: the time unit, for the axis label.

    Returns:
        Figure.
    """
    with style():
        nrow, ncol = grid_shape(len(sites))
        many = len(sites) > 1
        fig = new_figure(4.2 * ncol if many else 7.5, 2.6 * nrow, nrow, ncol)
        for i, site in enumerate(sites):
            ax = fig.add_subplot(nrow, ncol, i + 1)
            f = frame[frame["site"] == site].sort_values("time")
            seen = None
            if counts is not None:
                seen = counts[(counts["site"] == site) & counts["count"].notna()].sort_values("time").tail(10)
                ax.plot(seen["time"], seen["count"], "o-", color=INK, markersize=3.2, linewidth=0.8, label="counts")
            if not f.empty and f[list(_QUANTILES)].notna().all().all():
                t = f["time"].to_numpy(dtype=float)
                if seen is not None and not seen.empty:  # the fan opens at the last count
                    t0, c0 = float(seen["time"].iloc[-1]), float(seen["count"].iloc[-1])
                    t = [t0, *t]
                    col = {q: [c0, *f[q].to_numpy(dtype=float)] for q in _QUANTILES}
                else:
                    col = {q: f[q].to_numpy(dtype=float) for q in _QUANTILES}
                ax.fill_between(t, col["q05"], col["q95"], color=MAIN, alpha=0.16, linewidth=0, label="90% forecast")
                ax.fill_between(t, col["q25"], col["q75"], color=MAIN, alpha=0.3, linewidth=0, label="50% forecast")
                ax.plot(t, col["q50"], color=MAIN, linewidth=1.3, label="forecast median")
            times = pd.concat([f["time"], seen["time"] if seen is not None else pd.Series(dtype=float)])
            if len(times) and bool((times.astype(float) % 1 == 0).all()):
                ax.xaxis.set_major_locator(MaxNLocator(integer=True))
                ax.xaxis.set_major_formatter(FuncFormatter(lambda v, _p: f"{v:.0f}"))
            ax.set_title(plain_text(site) if many else "Next censuses")
            ax.set_xlabel(unit if unit != "time unit" else "time")
            ax.set_ylabel("animals")
            ax.set_ylim(bottom=0)
            if i == 0:
                ax.legend(loc="upper left", fontsize=7.5)
        return fig
