"""The one table checker: cells of a counts table (text, as a file holds them) to CountData.

Files (:mod:`tallyfit.inputs.counts_csv`), DataFrames and arrays all arrive here as a
header and records of cell text, with a :class:`Locator` that turns a record index into a
place in the source (file line and data row, DataFrame row, or ``counts[i, j]``). Every
cell is parsed strictly — counts must be whole numbers written as such (3.0 is accepted,
3.5 refused, nothing is rounded), "NA"-like words are refused in favour of an empty cell
so that "not surveyed" has one spelling, unknown columns are refused — and any problem
raises :class:`~tallyfit.infer.errors.CountsFileError` naming the place, what is wrong and
what to do.
"""
from __future__ import annotations

import math
import re
from collections.abc import Sequence
from decimal import Decimal
from typing import Any

import numpy as np
import pandas as pd

from tallyfit.chain.memory import available_bytes
from tallyfit.infer.counts import (DEFAULT_SITE, MAX_EXACT_COUNT, REQUIRED_COLUMNS, SURVEY_COLUMN, CountData,
                                   SiteSeries, format_time)
from tallyfit.infer.errors import CountsFileError, InputError

__all__ = ["Locator", "CellError", "cell_text", "frame_cells", "table_counts", "gib"]

# Bytes per cell of the dense per-site arrays: counts (float64), rows (int64) and
# the survey id (an object pointer).
_BYTES_PER_CELL = 24
_NUMBER = re.compile(r"([+-]?)(\d*)(?:\.(\d*))?(?:[eE]([+-]?\d+))?", re.ASCII)
_PLAIN_INT = re.compile(r"\+?\d{1,15}", re.ASCII)
_DATE_LIKE = re.compile(r"\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}")
_INNER_SPACE = re.compile(r"\d\s+\d")
_MISSING_WORDS = frozenset({"na", "n/a", "nan", "null", "none", "missing", "-", "--", ".",
                            "?", "#n/a", "#na", "nd", "n.d.", "#value!", "#num!", "#div/0!"})
_INF_WORDS = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})


def gib(n: float) -> str:
    """A number of bytes for a message (MiB or GiB)."""
    return f"{n / 2 ** 30:.2f} GiB" if n >= 2 ** 28 else f"{n / 2 ** 20:.1f} MiB"


class Locator:
    """Turns a record index into a place in the source for messages."""

    def __init__(self, source: str, *, kind: str, lines: Sequence[int] | None = None,
                 header_line: int | None = None, labeler: Any = None) -> None:
        self.source = source
        self.kind = kind  # "file", "frame" or "arrays"
        self.lines = lines
        self.header_line = header_line
        self.labeler = labeler

    def number(self, idx: int) -> int:
        """The number stored in SiteSeries.rows for record `idx`."""
        if self.kind == "file":
            assert self.lines is not None
            return int(self.lines[idx])
        return idx + 1

    @property
    def row_kind(self) -> str:
        return "line" if self.kind == "file" else "row"

    def ref(self, idx: int, column: str | None = None) -> str:
        """Short reference such as 'line 7', 'row 3' or 'times[2]'."""
        if self.kind == "arrays":
            return self.labeler(idx, column)
        return f"{self.row_kind} {self.number(idx)}"

    def error(self, message: str, idx: int | None, column: str | None,
              hint: str | None) -> CountsFileError:
        """A CountsFileError at record `idx` (None: the header / the whole table)."""
        if idx is None:
            if self.kind == "file":
                return CountsFileError(message, source=self.source, line=self.header_line,
                                       column=column, hint=hint, header=True)
            return CountsFileError(message, source=self.source, column=column, hint=hint)
        if self.kind == "file":
            return CountsFileError(message, source=self.source, line=self.number(idx),
                                   row=idx + 1, column=column, hint=hint)
        if self.kind == "arrays":
            return CountsFileError(message, source=self.source, row=idx + 1, column=None,
                                   hint=hint, location=self.labeler(idx, column))
        return CountsFileError(message, source=self.source, row=idx + 1, column=column,
                               hint=hint)


class CellError(Exception):
    """A cell problem, raised by the cell parsers and located by the caller."""

    def __init__(self, message: str, hint: str) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint


def _show(text: str, limit: int = 40) -> str:
    """A cell value for a message: quoted, shortened."""
    if len(text) > limit:
        text = text[:limit] + "…"
    return repr(text)


# --------------------------------------------------------------------------- cells


def _is_missing_word(low: str) -> bool:
    return low in _MISSING_WORDS


def _parse_time(text: str) -> float:
    t = text.strip()
    if not t:
        raise CellError("time is blank", "every row needs the time of its survey")
    low = t.lower()
    if low in _INF_WORDS:
        raise CellError(f"time {_show(t)} is not finite", "write the time as a plain number")
    if _is_missing_word(low):
        raise CellError(f"time {_show(t)} is not a number",
                   "every row needs the time of its survey as a number, e.g. 2001")
    m = _NUMBER.fullmatch(t)
    if m is None or not (m.group(2) or m.group(3)):
        if _DATE_LIKE.search(t):
            hint = ("dates must be converted to numbers in one unit, e.g. decimal years "
                    "(2001.5) or days since the first survey")
        elif _INNER_SPACE.search(t):
            hint = "remove the spaces inside the number"
        else:
            hint = "write the time as a plain number, e.g. 2001 or 2001.5"
        raise CellError(f"time {_show(t)} is not a number", hint)
    value = float(t)
    if not math.isfinite(value):
        raise CellError(f"time {_show(t)} is too large to hold as a number",
                   "use a smaller time unit origin, e.g. years since the first survey")
    return value


def _parse_count(text: str, max_count: int | None) -> int | None:
    """A count cell: None for blank (survey not made), else a checked int."""
    t = text.strip()
    if not t:
        return None
    if _PLAIN_INT.fullmatch(t):
        value = int(t)
    else:
        low = t.lower()
        if low in _INF_WORDS:
            raise CellError(f"count {_show(t)} is not finite",
                       "write the count as a whole number, or leave the cell empty if "
                       "the survey was not made")
        if _is_missing_word(low):
            raise CellError(f"count {_show(t)} is not a number",
                       "leave the cell empty to mark a survey that was not made")
        m = _NUMBER.fullmatch(t)
        if m is None or not (m.group(2) or m.group(3)):
            hint = ("remove the spaces inside the number" if _INNER_SPACE.search(t) else
                    "write the count as a whole number, e.g. 12 (leave the cell empty if "
                    "the survey was not made)")
            raise CellError(f"count {_show(t)} is not a number", hint)
        value = _exact_integer(t, m)
    if value < 0:
        raise CellError(f"count {_show(t)} is negative",
                   "head counts are 0 or more; fix the value, or leave the cell empty if "
                   "the survey was not made")
    if value > MAX_EXACT_COUNT:
        raise CellError(f"count {_show(t)} is too large for the machine",
                   f"counts are held as 64-bit floats, exact only up to {MAX_EXACT_COUNT:,}"
                   "; a count this large is almost certainly a typing error")
    if max_count is not None and value > max_count:
        raise CellError(f"count {value} is above max_count={max_count}",
                   "check the value, or raise max_count if it is real")
    return value


def _exact_integer(text: str, m: re.Match[str]) -> int:
    """The exact integer a decimal string denotes; _Bad if it is not an integer.

    Never rounds: 3.0 and 3e2 are integers, 3.5 and 1e-3 are not. Returns a value
    above MAX_EXACT_COUNT (not necessarily exact) for huge magnitudes, negative for
    negative values.
    """
    sign, int_part, frac, exp = m.group(1), m.group(2) or "", m.group(3) or "", m.group(4)
    digits = (int_part + frac).lstrip("0")
    if not digits:
        return 0
    if exp is None:
        expo = 0
    elif len(exp.lstrip("+-").lstrip("0")) > 9:
        expo = 10 ** 10 if not exp.startswith("-") else -(10 ** 10)
    else:
        expo = int(exp)
    stripped_int = int_part.lstrip("0")
    if stripped_int:
        adjusted = len(stripped_int) - 1 + expo
    else:
        adjusted = -(len(frac) - len(frac.lstrip("0")) + 1) + expo
    negative = sign == "-"
    if adjusted >= 16:
        return -(MAX_EXACT_COUNT + 1) if negative else MAX_EXACT_COUNT + 1
    if adjusted < 0:  # 0 < |value| < 1
        if negative:
            return -1
        raise CellError(f"count {_show(text)} is not a whole number",
                   "counts are whole numbers of animals; tallyfit never rounds — fix the "
                   "value")
    d = Decimal(text)  # exponent is moderate here, so this is exact and cheap
    if d != d.to_integral_value():
        if negative:
            return -1
        raise CellError(f"count {_show(text)} is not a whole number",
                   "counts are whole numbers of animals; tallyfit never rounds — fix the "
                   "value")
    return int(d)


def _parse_label(text: str, what: str) -> str:
    t = text.strip()
    if not t:
        raise CellError(f"{what} is blank", f"every row needs a {what} id when the table has a "
                                       f"{what} column")
    return t



def cell_text(value: Any) -> str | None:
    """A DataFrame cell as the text a CSV file would hold; raises CellError for booleans."""
    if value is None or value is pd.NA or value is pd.NaT:
        return ""
    if isinstance(value, (bool, np.bool_)):
        raise CellError(f"{value!r} is a true/false value, not a number",
                   "use numbers for time and count")
    if isinstance(value, (int, np.integer)):
        return str(int(value))
    if isinstance(value, (float, np.floating)):
        v = float(value)
        if math.isnan(v):
            return ""
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(value, str):
        return value
    try:
        if pd.isna(value):
            return ""
    except (TypeError, ValueError):
        pass
    return str(value)


def frame_cells(frame: pd.DataFrame, name: str) -> tuple[list[list[Any]], list[str]]:
    """Header names and records of raw cells from a DataFrame (converted later)."""
    names: list[str] = []
    for position, col in enumerate(frame.columns):
        if not isinstance(col, str):
            raise CountsFileError(
                f"column {position + 1} is named {col!r}, not a string", source=name,
                hint="name the columns time, count and optionally site and survey")
        names.append(col.strip())
    columns = [frame.iloc[:, j].tolist() for j in range(frame.shape[1])]
    records = [list(r) for r in zip(*columns)] if columns else []
    return records, names





def _check_max_count(max_count: Any) -> int | None:
    if max_count is None:
        return None
    if isinstance(max_count, (bool, np.bool_)) or not isinstance(max_count, (int, np.integer)):
        raise InputError(f"max_count must be a whole number or None, not {max_count!r}",
                         source="max_count")
    if max_count < 0:
        raise InputError(f"max_count must be 0 or more, not {max_count}", source="max_count")
    return int(max_count)


def _header_columns(names: list[str], locator: Locator, site_column: str) -> dict[str, int]:
    """Map role -> column index, refusing unknown, duplicate, unnamed or missing columns."""
    allowed = [*REQUIRED_COLUMNS, site_column, SURVEY_COLUMN]
    allowed_text = ", ".join(allowed)
    found_text = ", ".join(repr(n) for n in names) if names else "no columns"
    seen: dict[str, int] = {}
    for j, n in enumerate(names):
        if not n:
            raise locator.error(
                f"column {j + 1} of the header has no name", None, None,
                "name every column (allowed: " + allowed_text + "), or remove the extra "
                "comma at the end of the header")
        if n in seen:
            raise locator.error(f"column '{n}' appears twice in the header", None, n,
                                "keep one column of each name")
        seen[n] = j
    missing = [c for c in REQUIRED_COLUMNS if c not in seen]
    if missing:
        hint = ("the first line must be the header, e.g. 'time,count' or "
                "'site,time,survey,count'")
        if len(names) == 1 and any(s in names[0] for s in (";", "\t", "|")):
            hint = ("tallyfit reads comma-separated files; this header looks separated by "
                    "another character — save the file as CSV with commas")
        else:
            lowered = {n.lower(): n for n in names}
            near = [f"'{lowered[c]}' to '{c}'" for c in missing if c in lowered]
            if near:
                hint = "column names are case-sensitive: rename " + ", ".join(near)
        raise locator.error(
            f"missing required column{'s' if len(missing) > 1 else ''} "
            f"{', '.join(repr(c) for c in missing)} (found {found_text})", None, None, hint)
    for n in names:
        if n not in allowed:
            hint = (f"allowed columns are {allowed_text}; remove or rename this column "
                    "(tallyfit ignores nothing silently)")
            if n.lower() in allowed and n not in allowed:
                hint = f"column names are case-sensitive: rename it to '{n.lower()}'"
            raise locator.error(f"unknown column '{n}'", None, n, hint)
    return {role: seen[role] for role in ("time", "count", site_column, SURVEY_COLUMN)
            if role in seen}


def table_counts(names: list[str], records: list[list[Any]], locator: Locator, *,
           site_column: str, max_count: int | None, sha256: str | None) -> CountData:
    """Check every cell and assemble CountData (shared by files, frames and arrays)."""
    if not isinstance(site_column, str) or not site_column.strip() or \
            site_column.strip() in (*REQUIRED_COLUMNS, SURVEY_COLUMN):
        raise InputError(f"site_column must be a column name other than time, count and "
                         f"survey, not {site_column!r}", source="site_column")
    site_column = site_column.strip()
    max_count = _check_max_count(max_count)
    cols = _header_columns(names, locator, site_column)
    if site_column != DEFAULT_SITE and site_column not in cols and locator.kind != "arrays":
        raise locator.error(f"site column '{site_column}' not found (found "
                            f"{', '.join(repr(n) for n in names)})", None, None,
                            "pass the name of the column that holds the site, or leave "
                            "site_column at its default for a single site")
    if not records:
        raise locator.error("the table has a header but no data rows", None, None,
                            "add one row per survey: time, count (and site, survey)")
    i_time, i_count = cols["time"], cols["count"]
    i_site = cols.get(site_column)
    i_survey = cols.get(SURVEY_COLUMN)
    n_fields = len(names)
    frame_like = locator.kind != "file"

    times = np.empty(len(records), dtype=float)
    counts = np.empty(len(records), dtype=float)
    sites: list[str] = []
    surveys: list[str | None] = []
    for idx, rec in enumerate(records):
        if len(rec) < n_fields or any(c is None for c in rec[:n_fields]):
            j = next(k for k in range(n_fields) if k >= len(rec) or rec[k] is None)
            present = sum(1 for c in rec if c is not None)
            raise locator.error(f"this line has {present} field{'s' if present != 1 else ''}"
                                f" but the header has {n_fields}", idx, names[j],
                                "add the missing fields (an empty count still needs its "
                                "comma)")
        column = "time"
        try:
            cell = cell_text(rec[i_time]) if frame_like else rec[i_time]
            times[idx] = _parse_time(cell)
            column = "count"
            cell = cell_text(rec[i_count]) if frame_like else rec[i_count]
            value = _parse_count(cell, max_count)
            counts[idx] = np.nan if value is None else float(value)
            if i_site is not None:
                column = site_column
                cell = cell_text(rec[i_site]) if frame_like else rec[i_site]
                sites.append(_parse_label(cell, "site"))
            else:
                sites.append(DEFAULT_SITE)
            if i_survey is not None:
                column = SURVEY_COLUMN
                cell = cell_text(rec[i_survey]) if frame_like else rec[i_survey]
                surveys.append(_parse_label(cell, "survey"))
            else:
                surveys.append(None)
        except CellError as bad:
            raise locator.error(bad.message, idx, column, bad.hint) from None

    # Group by site (first appearance order) and time; find duplicates.
    by_site: dict[str, dict[float, list[int]]] = {}
    for idx in range(len(records)):
        groups = by_site.setdefault(sites[idx], {})
        group = groups.setdefault(float(times[idx]), [])
        if group:
            where = f"site '{sites[idx]}' " if i_site is not None else ""
            if i_survey is None:
                raise locator.error(
                    f"{where}already has a row at time {format_time(float(times[idx]))} "
                    f"({locator.ref(group[0], 'time')})", idx, "time",
                    "mark replicate surveys at one time with a 'survey' column, or "
                    "remove the duplicate row")
            for other in group:
                if surveys[other] == surveys[idx]:
                    raise locator.error(
                        f"survey '{surveys[idx]}' at time {format_time(float(times[idx]))} {where}appears "
                        f"twice (also {locator.ref(other, SURVEY_COLUMN)})", idx,
                        SURVEY_COLUMN,
                        "give each replicate survey at one time its own survey id")
        group.append(idx)

    n_rep = max(len(g) for groups in by_site.values() for g in groups.values())
    n_cells = sum(len(groups) for groups in by_site.values()) * n_rep
    available = available_bytes()
    need = n_cells * _BYTES_PER_CELL
    if available is not None and need > available // 2:
        site_name, t_big, g_big = max(
            ((s, t, g) for s, groups in by_site.items() for t, g in groups.items()),
            key=lambda item: len(item[2]))
        raise locator.error(
            f"data too large for the machine: {n_rep} replicate surveys at time {format_time(float(t_big))} "
            f"of site '{site_name}' make the count arrays need {gib(need)}, "
            f"{gib(available)} is free", g_big[-1], SURVEY_COLUMN,
            "check the survey ids (replicates are surveys at the same time), or split the "
            "data by site")

    series: list[SiteSeries] = []
    for site, groups in by_site.items():
        order = sorted(groups)
        n_t = len(order)
        c = np.full((n_t, n_rep), np.nan)
        r = np.zeros((n_t, n_rep), dtype=np.int64)
        s = np.full((n_t, n_rep), None, dtype=object)
        for i, t in enumerate(order):
            for j, idx in enumerate(groups[t]):
                c[i, j] = counts[idx]
                r[i, j] = locator.number(idx)
                s[i, j] = surveys[idx]
        t_arr = np.asarray(order, dtype=float)
        observed = ~np.isnan(c).all(axis=1)
        first_idx = groups[order[0]][0]
        if int(observed.sum()) < 2:
            where = f"site '{site}' " if i_site is not None else "the table "
            if observed.any():
                t_obs = t_arr[observed][0]
                msg = f"{where}has counts at only one time ({format_time(float(t_obs))})"
                at = groups[float(t_obs)][0]
            else:
                msg = f"{where}has no counts (every count is blank)"
                at = first_idx
            raise locator.error(msg, at, "count",
                                "a birth–death fit needs counts at two or more times per "
                                "site to see a change; add counts or remove this site's rows")
        if not math.isfinite(float(t_arr[-1]) - float(t_arr[0])):
            raise locator.error(
                f"the times of {'site ' + repr(site) if i_site is not None else 'the table'}"
                f" span {format_time(float(t_arr[0]))} to {format_time(float(t_arr[-1]))}, too wide to hold as a number",
                groups[order[-1]][0], "time", "measure time from a nearer origin")
        series.append(SiteSeries(site, t_arr, c, r, s, locator.source,
                                 row_kind=locator.row_kind))

    index_name = "line" if locator.kind == "file" else "row"
    index = pd.Index([locator.number(i) for i in range(len(records))], name=index_name)
    table_cols: dict[str, Any] = {"site": pd.Series(sites, dtype=object, index=index).astype(str),
                                  "time": pd.Series(times, index=index)}
    if i_survey is not None:
        table_cols[SURVEY_COLUMN] = pd.Series(surveys, dtype=object, index=index).astype(str)
    table_cols["count"] = pd.Series(pd.array([pd.NA if math.isnan(v) else int(v)
                                              for v in counts], dtype="Int64"), index=index)
    table = pd.DataFrame(table_cols, index=index)
    return CountData(series, source=locator.source, table=table,
                     has_survey_column=i_survey is not None, sha256=sha256)
