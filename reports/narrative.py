"""Plain-language sentences for the manager's summary, built from the report's tables.

Every sentence states a number together with its uncertainty and what it assumes. The
sentences are plain text; :mod:`reports.html` escapes them.
"""
from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.runfolder.schema import CAUTION

from .bands import band
from .html import format_interval, format_number, format_probability

__all__ = ["caution_text", "trend_lines", "long_run_line", "extinction_line", "category_line"]

def caution_text(summary: Mapping[str, Any] | None) -> str:
    """The caution to show: summary.json's ``caution`` when it is non-empty text, else the schema's.

    Args:
        summary: summary.json as read, or None.

    Returns:
        str.
    """
    text = summary["caution"] if summary is not None else ""
    return text.strip() if isinstance(text, str) and text.strip() else CAUTION


def _signed(x: float) -> str:
    s = format_number(abs(x), 2)
    return ("+" if x > 0 else "−" if x < 0 else "") + s


def trend_lines(trend: pd.DataFrame, sites: pd.DataFrame, unit: str = "time unit") -> list[str]:
    """One sentence per site: what the counts did, and the change the model expects from the last count.

    Args:
        trend: :func:`reports.tables.trend_table`.
        sites: :func:`reports.tables.site_data_table`.
        unit: the time unit ("year").

    Returns:
        list of sentences.
    """
    out = []
    info = {str(r.site): r for r in sites.itertuples(index=False)}
    single = len(trend) == 1
    for r in trend.itertuples(index=False):
        s = info.get(str(r.site))
        parts = []
        if s is not None and np.isfinite(s.first):
            parts.append(f"counts from {format_number(s.first)} to {format_number(s.last)} ranged from "
                         f"{format_number(s.smallest)} to {format_number(s.largest)}")
        if r.p_increase >= 0.9:
            verdict = "expects it to grow"
        elif r.p_increase <= 0.1:
            verdict = "expects it to decline"
        else:
            verdict = "cannot tell whether it will grow or decline"
        size = "" if int(r.size) == int(r.last_count) else f", about {int(r.size)} animals allowing for missed ones"
        parts.append(f"from the last count of {int(r.last_count)} (at {format_number(r.last_time)}{size}) the model "
                     f"{verdict}: expected change {_signed(r.mean)} animals per {unit} "
                     f"({format_interval(r.lo, r.hi, lambda v: _signed(float(v)))}), probability of growth "
                     f"{format_probability(r.p_increase)}")
        text = "; ".join(parts) + "."
        out.append(text[0].upper() + text[1:] if single else f"{r.site}: {text}")
    return out


def long_run_line(derived: xr.Dataset, scenario: str, level: float = 0.9) -> str:
    """Where the population settles in the long run: the stationary mean when a stationary law
    probably exists, else the quasi-stationary mean (the typical size while it persists).

    Args:
        derived: the push-forward Dataset.
        scenario: scenario name.
        level: credible level.

    Returns:
        one sentence.
    """
    d = derived.sel(scenario=scenario)
    p = float(d["stationary_exists"].mean())
    pct = f"{level:.0%}"
    if p >= 0.5:
        b = band(d["stationary_mean"].where(d["stationary_exists"]), level)
        return (f"In the long run the model expects about {format_number(float(b.mean), 3)} animals per site "
                f"(stationary mean, {pct} interval {format_interval(float(b.lo), float(b.hi))}); the posterior "
                f"probability that such a long-run balance exists is {format_probability(p)}.")
    b = band(d["quasi_mean"], level)
    return (f"A long-run balance is unlikely (posterior probability {format_probability(p)}); while it persists the "
            f"population would typically number about {format_number(float(b.mean), 3)} animals per site "
            f"(quasi-stationary mean, {pct} interval {format_interval(float(b.lo), float(b.hi))}).")


def extinction_line(table: pd.DataFrame, level: float = 0.9, n_sites: int = 1, units: str = "time units") -> str:
    """One sentence: probability that the population (every site) dies out within each horizon (threshold 0).

    Args:
        table: :func:`reports.tables.extinction_table` for all sites.
        level: credible level of the intervals in the table.
        n_sites: number of sites (the sentence says "every site" when there are several).
        units: the plural time unit ("years").

    Returns:
        sentence (empty when the table has no threshold 0).
    """
    rows = table[table["threshold"] == 0]
    if rows.empty:
        return ""
    parts = [f"{format_probability(r.mean)} within {format_number(r.horizon)}" for r in rows.itertuples(index=False)]
    who = " (every site at 0)" if n_sites > 1 else ""
    return (f"Probability of extinction{who}: " + ", ".join(parts)
            + f" {units} (posterior means; {level:.0%} intervals in the table below).")


def category_line(row: pd.Series, horizons: Mapping[str, float], generation_time: float | None) -> str:
    """One sentence on the criterion E category probabilities of one scenario.

    IUCN (2012) Red List Categories and Criteria v3.1, criterion E.

    Args:
        row: probabilities indexed by category name (one row of tables.category_table).
        horizons: {"CR": years, "EN": years, "VU": years}.
        generation_time: years per generation (None: not given).

    Returns:
        sentence.
    """
    best = str(row.idxmax())
    listing = ", ".join(f"{k} {format_probability(v)}" for k, v in row.items())
    gen = (f"a generation time of {format_number(generation_time)} years" if generation_time
           else "no generation time given, so the shortest horizons")
    return (f"IUCN Red List criterion E (quantitative analysis; IUCN 2012, Categories and Criteria v3.1): "
            f"posterior probability of each category — {listing}; most probable: {best}. Horizons: "
            f"CR {format_number(horizons['CR'])} y, EN {format_number(horizons['EN'])} y, "
            f"VU {format_number(horizons['VU'])} y ({gen}). This is criterion E alone, for all sites "
            f"together; an assessment weighs every criterion.")


def headline(table: pd.DataFrame, categories: pd.Series, n_failed: int, n_sites: int, units: str,
             level: float = 0.9) -> str:
    """The answer a manager reads first: the risk at the longest horizon and whether the checks passed.

    Args:
        table: :func:`reports.tables.extinction_table` for all sites (baseline).
        categories: criterion E category probabilities of the baseline (a row of category_table).
        n_failed: how many checks failed.
        n_sites: number of sites.
        units: the plural time unit ("years").
        level: credible level of the interval.

    Returns:
        one or two sentences.
    """
    lowest = int(table["threshold"].min())
    rows = table[table["threshold"] == lowest]
    r = rows.loc[rows["horizon"].idxmax()]
    who = "every site" if n_sites > 1 else "the population"
    what = "dies out" if lowest == 0 else f"falls to {lowest} animals or fewer"
    if n_sites > 1:
        what = "is extinct" if lowest == 0 else f"is at {lowest} animals or fewer"
    best = str(categories.idxmax())
    first = (f"Probability that {who} {what} within {format_number(float(r['horizon']))} {units}: "
             f"{format_probability(float(r['mean']))} ({level:.0%} interval "
             f"{format_interval(float(r['lo']), float(r['hi']), format_probability)}); most probable criterion E "
             f"category: {best} ({format_probability(float(categories[best]))}).")
    second = ("Every check passed." if n_failed == 0 else
              f"{n_failed} check{'s' if n_failed != 1 else ''} failed: treat these numbers as provisional.")
    return f"{first} {second}"
