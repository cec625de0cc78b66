"""Count data: read and check a table of head counts, one or many sites.

A counts table (DESIGN §3) has the columns ``time`` and ``count`` and, optionally,
``site`` (default: one site called ``"site"``) and ``survey`` (an id for replicate
surveys made at the same time). A blank count means that survey was not made; it is
kept as missing (NaN), never dropped. Anything malformed raises
:class:`infer.errors.CountsFileError` (an :class:`~infer.errors.InputError`) naming
the file, the line and data row, the column, what is wrong and what to do.

Line numbers are the line numbers in the file as an editor shows them (the header is
line 1 when the file does not start with blank lines); the *data row* is InputError's
``row`` (data rows counted from 1, header excluded, blank lines skipped). For a
DataFrame the row is its 1-based position.

The reader is strict on purpose: unknown columns are refused (nothing is silently
ignored), counts must be whole numbers written as such (3.0 is accepted, 3.5 is
refused, nothing is rounded), and ``NA``/``nan`` words are refused in favour of an
empty cell so that "not surveyed" has exactly one spelling.
"""
from __future__ import annotations

import hashlib
import io
import math
import os
import re
import unicodedata
from collections.abc import Iterator, Sequence
from decimal import Decimal
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from tallyfit.infer.errors import CountsFileError, InputError

__all__ = [
    "REQUIRED_COLUMNS",
    "SURVEY_COLUMN",
    "DEFAULT_SITE",
    "MAX_EXACT_COUNT",
    "SiteSeries",
    "CountData",
    "Transitions",
    "load_counts",
    "iter_transitions",
    "file_sha256",
]

REQUIRED_COLUMNS: tuple[str, str] = ("time", "count")
SURVEY_COLUMN = "survey"
DEFAULT_SITE = "site"
#: Largest count held exactly: counts live in float64 arrays (NaN marks a missing
#: survey), and 2**53 is the largest integer below which every integer is a float64.
MAX_EXACT_COUNT = 2 ** 53

# Rough bytes of memory the CSV reader needs per byte of file (Python string objects
# per cell, the record lists, the checked copies). Deliberately generous.
_READ_BYTES_PER_FILE_BYTE = 40
# Bytes per cell of the dense per-site arrays: counts (float64), rows (int64) and
# the survey id (an object pointer).
_BYTES_PER_CELL = 24

_NUMBER = re.compile(r"([+-]?)(\d*)(?:\.(\d*))?(?:[eE]([+-]?\d+))?", re.ASCII)
_PLAIN_INT = re.compile(r"\+?\d{1,15}", re.ASCII)
_DATE_LIKE = re.compile(r"\d{1,4}[-/.]\d{1,2}[-/.]\d{1,4}")
_INNER_SPACE = re.compile(r"\d\s+\d")
_LINE_BREAK = re.compile(r"\r\n|\r|\n")
# Control characters other than tab, line feed and carriage return, and the Unicode
# line/paragraph separators: never part of a counts table; a sign of binary data.
_CONTROL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f\u2028\u2029]")
_MISSING_WORDS = frozenset({"na", "n/a", "nan", "null", "none", "missing", "-", "--", ".",
                            "?", "#n/a", "#na", "nd", "n.d.", "#value!", "#num!", "#div/0!"})
_INF_WORDS = frozenset({"inf", "+inf", "-inf", "infinity", "+infinity", "-infinity"})
# Leading bytes of files that are not CSV text, with what to tell the user.
_SIGNATURES: tuple[tuple[bytes, str, str], ...] = (
    (b"PK\x03\x04", "looks like a spreadsheet workbook or zip archive, not CSV text",
     "export the sheet as CSV (comma-separated, UTF-8) and load that file"),
    (b"\xd0\xcf\x11\xe0", "looks like an old Excel workbook (.xls), not CSV text",
     "export the sheet as CSV (comma-separated, UTF-8) and load that file"),
    (b"\x1f\x8b", "is gzip-compressed", "decompress it first (gunzip)"),
    (b"\xff\xfe", "is UTF-16 text", "save it as UTF-8 ('CSV UTF-8' in a spreadsheet)"),
    (b"\xfe\xff", "is UTF-16 text", "save it as UTF-8 ('CSV UTF-8' in a spreadsheet)"),
    (b"%PDF", "is a PDF document, not CSV text", "export the table as CSV"),
)
_UTF8_HINT = "save the file as UTF-8 text ('CSV UTF-8' in a spreadsheet)"


# --------------------------------------------------------------------------- results


class Transitions(NamedTuple):
    """Observed transition pairs of one site: count n0 at time t0, then n1 at t1.

    Attributes:
        t0, t1: float arrays, start and end time of each interval (t1 > t0).
        n0, n1: int64 arrays, the counts at t0 and t1.
    """

    t0: np.ndarray
    t1: np.ndarray
    n0: np.ndarray
    n1: np.ndarray

    @property
    def dt(self) -> np.ndarray:
        """Interval lengths t1 - t0 (all positive)."""
        return self.t1 - self.t0


def _frozen(array: np.ndarray) -> np.ndarray:
    array.flags.writeable = False
    return array


class SiteSeries:
    """The counts of one site, sorted by time.

    Attributes:
        site: the site's name.
        times: 1-D float array of the distinct survey times, ascending.
        counts: 2-D float array (n_times, n_replicates); NaN where the survey was not
            made (a blank count) or where this time has fewer replicates.
        rows: 2-D int64 array, same shape: the line in the file of each cell (or the
            1-based row of a DataFrame); 0 where no row exists (absent replicate).
        surveys: 2-D object array, same shape: the survey id of each cell, None where
            no row exists or the table had no survey column.
        source: name of the file (or "<DataFrame>") the series came from.
    Arrays are read-only.
    """

    __slots__ = ("site", "times", "counts", "rows", "surveys", "source", "_row_kind")

    def __init__(self, site: str, times: np.ndarray, counts: np.ndarray, rows: np.ndarray,
                 surveys: np.ndarray, source: str, row_kind: str = "line") -> None:
        """Build a series from checked arrays (used by the loaders; no checks here).

        Args:
            site: site name.
            times: (n_times,) ascending distinct floats.
            counts: (n_times, n_replicates) floats with NaN for missing.
            rows: (n_times, n_replicates) int64 line or row numbers, 0 for absent.
            surveys: (n_times, n_replicates) object array of survey ids or None.
            source: the source's name, for messages.
            row_kind: "line" (file lines) or "row" (DataFrame / array rows).
        """
        self.site = site
        self.times = _frozen(np.asarray(times, dtype=float))
        self.counts = _frozen(np.asarray(counts, dtype=float))
        self.rows = _frozen(np.asarray(rows, dtype=np.int64))
        self.surveys = _frozen(np.asarray(surveys, dtype=object))
        self.source = source
        self._row_kind = row_kind

    def __repr__(self) -> str:
        return (f"SiteSeries(site={self.site!r}, n_times={self.n_times}, "
                f"n_counts={self.n_counts}, times={_num(float(self.times[0]))}..{_num(float(self.times[-1]))})")

    @property
    def n_times(self) -> int:
        """Number of distinct survey times (including times whose counts are all blank)."""
        return int(self.times.shape[0])

    @property
    def n_counts(self) -> int:
        """Number of non-missing counts."""
        return int(np.count_nonzero(~np.isnan(self.counts)))

    @property
    def max_count(self) -> int:
        """Largest non-missing count of this site."""
        return int(np.nanmax(self.counts))

    def observed(self, replicates: str = "single") -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """One count per surveyed time: the times that have at least one count.

        Args:
            replicates: how to reduce several counts at one time. "single": there must
                be at most one non-missing count per time; "max": take the largest
                (the minimum number known alive, common practice).

        Returns:
            (times, counts, rows): float times ascending, int64 counts, int64 line (or
            row) numbers of the cell used.

        Raises:
            InputError: unknown `replicates`; CountsFileError when "single" is asked
                but a time has several counts (names the line of the second count).
        """
        if replicates not in ("single", "max"):
            raise InputError(f"replicates must be 'single' or 'max', not {replicates!r}",
                             source="replicates")
        present = ~np.isnan(self.counts)
        keep = present.any(axis=1)
        if replicates == "single":
            several = np.flatnonzero(present.sum(axis=1) > 1)
            if several.size:
                i = int(several[0])
                cells = np.flatnonzero(present[i])
                lines = [int(self.rows[i, j]) for j in cells]
                kind = self._row_kind
                raise CountsFileError(
                    f"site '{self.site}' has {cells.size} counts at time {_num(float(self.times[i]))} "
                    f"({kind}s {', '.join(map(str, lines))}); exact-count transitions need "
                    "one count per time",
                    source=self.source, line=lines[1] if kind == "line" else None,
                    row=None if kind == "line" else lines[1], column="count",
                    hint="use replicates='max', or an observation model with detection "
                         "for replicate surveys")
        filled = np.where(present, self.counts, -1.0)
        pick = np.argmax(filled, axis=1)
        idx = np.flatnonzero(keep)
        counts = filled[idx, pick[idx]].astype(np.int64)
        rows = self.rows[idx, pick[idx]].astype(np.int64)
        return self.times[idx].copy(), counts, rows

    def transitions(self, replicates: str = "single") -> Transitions:
        """Consecutive observed pairs of this site; see :func:`iter_transitions`.

        Args:
            replicates: "single" or "max", as in :meth:`observed`.

        Returns:
            Transitions(t0, t1, n0, n1) with one entry per consecutive pair of
            surveyed times (a time whose counts are all blank is skipped, so the pair
            spans the gap).

        Raises:
            InputError / CountsFileError: as :meth:`observed`.
        """
        times, counts, _ = self.observed(replicates)
        return Transitions(times[:-1].copy(), times[1:].copy(), counts[:-1].copy(),
                           counts[1:].copy())


class CountData:
    """Checked counts of one or many sites, ready for the likelihood.

    Attributes (read-only properties):
        sites: list of site names, in order of first appearance in the source.
        series: list of SiteSeries, one per site, same order.
        n_replicates: most surveys made at one time anywhere (width of every
            `SiteSeries.counts`).
        has_replicates: True when some time has more than one survey row.
        has_survey_column: True when the source had a `survey` column.
        max_count: the largest non-missing count.
        source: the file name as given, "<DataFrame>" or "<arrays>".
        sha256: hex SHA-256 of the exact bytes parsed (files), else None.
        table: the tidy table as read, in source order: columns site, time,
            [survey], count (nullable Int64; <NA> = survey not made); index = line
            numbers in the file ("line") or 1-based DataFrame rows ("row").
    """

    __slots__ = ("_series", "_source", "_table", "_has_survey_column", "_sha256")

    def __init__(self, series: Sequence[SiteSeries], *, source: str, table: pd.DataFrame,
                 has_survey_column: bool, sha256: str | None = None) -> None:
        """Assemble checked series (use :func:`load_counts` or :meth:`single` instead).

        Args:
            series: at least one SiteSeries, all with the same number of columns.
            source: the source's name.
            table: the tidy table as read.
            has_survey_column: whether the source had a survey column.
            sha256: hash of the raw file bytes, or None.

        Raises:
            InputError: no series, or series of different widths.
        """
        series = tuple(series)
        if not series:
            raise InputError("count data needs at least one site", source=source)
        widths = {s.counts.shape[1] for s in series}
        if len(widths) != 1:
            raise InputError("all sites must have the same number of replicate columns",
                             source=source)
        self._series = series
        self._source = source
        self._table = table
        self._has_survey_column = bool(has_survey_column)
        self._sha256 = sha256

    def __repr__(self) -> str:
        return (f"CountData(source={self._source!r}, sites={len(self._series)}, "
                f"counts={self.n_counts}, n_replicates={self.n_replicates})")

    def __len__(self) -> int:
        return len(self._series)

    def __iter__(self) -> Iterator[SiteSeries]:
        return iter(self._series)

    @property
    def sites(self) -> list[str]:
        """Site names in order of first appearance."""
        return [s.site for s in self._series]

    @property
    def series(self) -> list[SiteSeries]:
        """One SiteSeries per site, in the order of `sites`."""
        return list(self._series)

    @property
    def n_sites(self) -> int:
        """Number of sites."""
        return len(self._series)

    @property
    def n_replicates(self) -> int:
        """Most survey rows at one (site, time); the width of each counts array."""
        return int(self._series[0].counts.shape[1])

    @property
    def has_replicates(self) -> bool:
        """True when some (site, time) has more than one survey row."""
        return self.n_replicates > 1

    @property
    def has_survey_column(self) -> bool:
        """True when the source had a survey column."""
        return self._has_survey_column

    @property
    def n_counts(self) -> int:
        """Number of non-missing counts over all sites."""
        return sum(s.n_counts for s in self._series)

    @property
    def max_count(self) -> int:
        """Largest non-missing count over all sites."""
        return max(s.max_count for s in self._series)

    @property
    def source(self) -> str:
        """File name as given, "<DataFrame>" or "<arrays>"."""
        return self._source

    @property
    def sha256(self) -> str | None:
        """Hex SHA-256 of the exact file bytes that were parsed, or None."""
        return self._sha256

    @property
    def table(self) -> pd.DataFrame:
        """A copy of the tidy table as read (see the class docstring)."""
        return self._table.copy()

    def site(self, name: str) -> SiteSeries:
        """The series of one site.

        Args:
            name: site name.

        Returns:
            That site's SiteSeries.

        Raises:
            KeyError: no such site (the message lists the sites).
        """
        for s in self._series:
            if s.site == name:
                return s
        raise KeyError(f"no site {name!r}; sites are {self.sites}")

    def to_frame(self) -> pd.DataFrame:
        """The data as a tidy table sorted by site (in `sites` order), time, replicate.

        One row per row of the source (blank counts included, absent replicates not).
        Loading the result with :func:`load_counts` gives back the same sites, times,
        counts and survey ids.

        Returns:
            DataFrame with columns site (str), time (float), survey (str, only when
            the source had a survey column) and count (nullable Int64).
        """
        sites: list[str] = []
        times: list[float] = []
        surveys: list[Any] = []
        counts: list[Any] = []
        for s in self._series:
            n_t, n_r = s.counts.shape
            for i in range(n_t):
                for j in range(n_r):
                    if s.rows[i, j] == 0:
                        continue
                    sites.append(s.site)
                    times.append(float(s.times[i]))
                    surveys.append(s.surveys[i, j])
                    c = s.counts[i, j]
                    counts.append(pd.NA if np.isnan(c) else int(c))
        columns: dict[str, Any] = {"site": pd.Series(sites, dtype=object).astype(str),
                                   "time": np.asarray(times, dtype=float)}
        if self._has_survey_column:
            columns[SURVEY_COLUMN] = pd.Series(surveys, dtype=object).astype(str)
        columns["count"] = pd.array(counts, dtype="Int64")
        return pd.DataFrame(columns)

    @classmethod
    def single(cls, times: Any, counts: Any, site: str = DEFAULT_SITE, *,
               max_count: int | None = None) -> CountData:
        """Count data of one site from arrays, with the same checks as a file.

        Args:
            times: 1-D array-like of survey times (any order; distinct).
            counts: 1-D array-like, one count per time, or 2-D (n_times, n_replicates)
                for replicate surveys; NaN marks a survey that was not made.
            site: the site's name.
            max_count: optional upper limit on the counts.

        Returns:
            CountData with source "<arrays>"; messages name cells as times[i] or
            counts[i] / counts[i, j].

        Raises:
            InputError: arrays of the wrong shape or type; CountsFileError for any
                check a counts file must pass (negative, fractional, duplicate times,
                fewer than two surveyed times, ...).
        """
        if not isinstance(site, str):
            raise InputError(f"site must be a string, not {type(site).__name__}",
                             source="<arrays>", column="site")
        try:
            t = np.asarray(times, dtype=float)
            c = np.asarray(counts, dtype=float)
        except (TypeError, ValueError) as exc:
            raise InputError(f"times and counts must be numeric arrays ({exc})",
                             source="<arrays>") from None
        if t.ndim != 1:
            raise InputError(f"times must be 1-D, got shape {t.shape}", source="<arrays>",
                             column="time")
        if c.ndim == 1:
            c = c[:, None]
            two_d = False
        elif c.ndim == 2:
            two_d = True
        else:
            raise InputError(f"counts must be 1-D or 2-D, got shape {c.shape}",
                             source="<arrays>", column="count")
        if c.shape[0] != t.shape[0]:
            raise InputError(f"counts has {c.shape[0]} times but times has {t.shape[0]}",
                             source="<arrays>", column="count")
        n_t, n_r = c.shape
        frame = pd.DataFrame({
            "site": [site] * (n_t * n_r),
            "time": np.repeat(t, n_r),
            "count": c.reshape(-1),
        })
        if two_d:
            frame[SURVEY_COLUMN] = [str(j + 1) for _ in range(n_t) for j in range(n_r)]

        def label(idx: int, column: str | None) -> str:
            i, j = divmod(idx, n_r)
            if column == "time":
                return f"times[{i}]"
            return f"counts[{i}, {j}]" if two_d else f"counts[{i}]"

        cells, names = _frame_cells(frame, "<arrays>")
        locator = _Locator("<arrays>", kind="arrays", labeler=label)
        return _build(names, cells, locator, site_column="site", max_count=max_count,
                      sha256=None)


# --------------------------------------------------------------------------- locating


class _Locator:
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


class _Bad(Exception):
    """A cell problem, raised by the cell parsers and located by the caller."""

    def __init__(self, message: str, hint: str) -> None:
        super().__init__(message)
        self.message = message
        self.hint = hint


def _num(value: float) -> str:
    """A time for a message: integers without '.0', others in full precision."""
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


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
        raise _Bad("time is blank", "every row needs the time of its survey")
    low = t.lower()
    if low in _INF_WORDS:
        raise _Bad(f"time {_show(t)} is not finite", "write the time as a plain number")
    if _is_missing_word(low):
        raise _Bad(f"time {_show(t)} is not a number",
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
        raise _Bad(f"time {_show(t)} is not a number", hint)
    value = float(t)
    if not math.isfinite(value):
        raise _Bad(f"time {_show(t)} is too large to hold as a number",
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
            raise _Bad(f"count {_show(t)} is not finite",
                       "write the count as a whole number, or leave the cell empty if "
                       "the survey was not made")
        if _is_missing_word(low):
            raise _Bad(f"count {_show(t)} is not a number",
                       "leave the cell empty to mark a survey that was not made")
        m = _NUMBER.fullmatch(t)
        if m is None or not (m.group(2) or m.group(3)):
            hint = ("remove the spaces inside the number" if _INNER_SPACE.search(t) else
                    "write the count as a whole number, e.g. 12 (leave the cell empty if "
                    "the survey was not made)")
            raise _Bad(f"count {_show(t)} is not a number", hint)
        value = _exact_integer(t, m)
    if value < 0:
        raise _Bad(f"count {_show(t)} is negative",
                   "head counts are 0 or more; fix the value, or leave the cell empty if "
                   "the survey was not made")
    if value > MAX_EXACT_COUNT:
        raise _Bad(f"count {_show(t)} is too large for the machine",
                   f"counts are held as 64-bit floats, exact only up to {MAX_EXACT_COUNT:,}"
                   "; a count this large is almost certainly a typing error")
    if max_count is not None and value > max_count:
        raise _Bad(f"count {value} is above max_count={max_count}",
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
        raise _Bad(f"count {_show(text)} is not a whole number",
                   "counts are whole numbers of animals; tallyfit never rounds — fix the "
                   "value")
    d = Decimal(text)  # exponent is moderate here, so this is exact and cheap
    if d != d.to_integral_value():
        if negative:
            return -1
        raise _Bad(f"count {_show(text)} is not a whole number",
                   "counts are whole numbers of animals; tallyfit never rounds — fix the "
                   "value")
    return int(d)


def _parse_label(text: str, what: str) -> str:
    t = text.strip()
    if not t:
        raise _Bad(f"{what} is blank", f"every row needs a {what} id when the table has a "
                                       f"{what} column")
    return t


# --------------------------------------------------------------------------- sources


def _available_memory() -> int | None:
    """Bytes of memory available now, or None if the system does not say."""
    try:
        pages = os.sysconf("SC_AVPHYS_PAGES")
        size = os.sysconf("SC_PAGE_SIZE")
    except (ValueError, OSError, AttributeError):
        return None
    if pages <= 0 or size <= 0:
        return None
    return int(pages) * int(size)


def _gib(n: float) -> str:
    return f"{n / 2 ** 30:.2f} GiB" if n >= 2 ** 28 else f"{n / 2 ** 20:.1f} MiB"


def _line_of_offset(raw: bytes, pos: int) -> int:
    """1-based line number of byte `pos` (\\n, \\r\\n and \\r all end a line)."""
    head = raw[:pos]
    return head.count(b"\n") + head.count(b"\r") - head.count(b"\r\n") + 1


def file_sha256(path: str | os.PathLike[str]) -> str:
    """SHA-256 of a file's raw bytes.

    Args:
        path: the file.

    Returns:
        The hex digest (64 lowercase hex characters).

    Raises:
        InputError: the file cannot be read.
    """
    digest = hashlib.sha256()
    try:
        with open(path, "rb") as handle:
            for block in iter(lambda: handle.read(1 << 20), b""):
                digest.update(block)
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror or exc})", source=str(path),
                         hint="check the path and the file's permissions") from None
    return digest.hexdigest()


def _read_bytes(path: str | os.PathLike[str]) -> bytes:
    name = str(path)
    p = Path(path)
    try:
        if p.is_dir():
            raise InputError("is a folder, not a counts file", source=name,
                             hint="give the path of the CSV file")
        size = p.stat().st_size
    except OSError as exc:
        if isinstance(exc, FileNotFoundError):
            raise InputError("file not found", source=name,
                             hint="check the path (relative paths start from the "
                                  "current folder)") from None
        raise InputError(f"cannot read the file ({exc.strerror or exc})", source=name,
                         hint="check the path and the file's permissions") from None
    available = _available_memory()
    if available is not None and size * _READ_BYTES_PER_FILE_BYTE > available:
        raise InputError(
            f"file is too large for the machine: reading {_gib(size)} of CSV needs about "
            f"{_gib(size * _READ_BYTES_PER_FILE_BYTE)} of memory, {_gib(available)} is free",
            source=name, hint="split the file, e.g. one file per site (tallyfit batch)")
    try:
        return p.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror or exc})", source=name,
                         hint="check the path and the file's permissions") from None


def _decode(raw: bytes, name: str) -> str:
    """Bytes to text, refusing binary data with a located message."""
    for magic, what, hint in _SIGNATURES:
        if raw.startswith(magic):
            raise CountsFileError(f"this file {what}", source=name, hint=hint)
    nul = raw.find(b"\x00")
    if nul >= 0:
        raise CountsFileError("contains a NUL byte: this is binary data, not CSV text",
                              source=name, line=_line_of_offset(raw, nul),
                              hint="check that this is the counts file; " + _UTF8_HINT)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        bad = raw[exc.start:exc.start + 1]
        raise CountsFileError(
            f"byte 0x{bad.hex().upper()} is not UTF-8 text (binary data or another "
            "encoding)", source=name, line=_line_of_offset(raw, exc.start),
            hint=_UTF8_HINT) from None
    m = _CONTROL.search(text)
    if m is not None:
        line = len(_LINE_BREAK.findall(text[:m.start()])) + 1
        code = f"U+{ord(m.group()):04X}"
        raise CountsFileError(
            f"contains the control character {code} ({unicodedata.name(m.group(), 'control')})"
            ": the file is binary or corrupt", source=name, line=line,
            hint="remove the character, or check that this is the counts file")
    return text


def _parse_csv(text: str) -> pd.DataFrame:
    """The strict pandas parse of comma-separated text: every cell a str, None if absent."""
    return pd.read_csv(io.StringIO(text), header=None, sep=",", engine="python",
                       dtype=object, na_filter=False, skipinitialspace=True,
                       skip_blank_lines=False, on_bad_lines="error", quotechar='"',
                       doublequote=True, index_col=False)


def _parses(lines: Sequence[str], k: int) -> bool:
    try:
        _parse_csv("\n".join(lines[:k]) + "\n")
    except Exception:  # noqa: BLE001 - ParserError, csv.Error, ...: the prefix does not parse
        return False
    return True


def _field_count(line: str) -> int:
    """Number of fields of one line as pandas reads it (-1 if it does not parse)."""
    try:
        return int(_parse_csv(line + "\n").shape[1])
    except Exception:  # noqa: BLE001 - an unreadable line has no field count
        return -1


def _locate_parse_failure(lines: Sequence[str]) -> int:
    """Index of the first line whose addition makes the text fail to parse."""
    lo, hi = 0, len(lines)  # prefix lo parses (empty: trivially), prefix hi fails
    while hi - lo > 1:
        mid = (lo + hi) // 2
        if _parses(lines, mid):
            lo = mid
        else:
            hi = mid
    return hi - 1


_FIELDS = re.compile(r"Expected (\d+) fields in line (\d+), saw (\d+)")


def _file_cells(raw: bytes, name: str) -> tuple[list[list[str | None]], list[str], _Locator]:
    """Parse file bytes into header names and records of cells, with their lines."""
    text = _decode(raw, name)
    physical = _LINE_BREAK.split(text)
    kept = [(i + 1, line) for i, line in enumerate(physical) if line.strip()]
    if not kept:
        raise CountsFileError("the file is empty", source=name,
                              hint="a counts file needs a header line 'time,count' "
                                   "and one line per survey")
    line_numbers = [n for n, _ in kept]
    lines = [line for _, line in kept]
    try:
        frame = _parse_csv("\n".join(lines) + "\n")
    except Exception as exc:  # noqa: BLE001 - any parser failure becomes a located message
        fields = _FIELDS.search(str(exc))
        k = -1
        if fields is not None:
            # pandas names the line of the joined text; trust it only if that line,
            # read alone, really has the number of fields pandas saw.
            k = int(fields.group(2)) - 1
            if not 0 <= k < len(lines) or \
                    _field_count(lines[k]) != int(fields.group(3)):
                k = -1
        if k < 0:
            k = _locate_parse_failure(lines)
        line = line_numbers[k]
        if fields is not None:
            expected, seen = int(fields.group(1)), int(fields.group(3))
            message = (f"this line has {seen} fields but the header has {expected}")
            hint = ("remove the extra commas (a trailing comma?), or put values that "
                    "contain commas in double quotes")
        elif '"' in lines[k]:
            message = "a quotation mark on this line is not closed, or is followed by text"
            hint = 'put the whole value in double quotes, e.g. "North, Bay"; write a ' \
                   'quote inside a quoted value as ""'
        else:
            message = f"this line cannot be read as comma-separated text ({exc})"
            hint = "check the line in a text editor"
        raise CountsFileError(message, source=name, line=line,
                              row=k if k > 0 else None, header=(k == 0),
                              hint=hint) from None
    records: list[list[str | None]] = []
    for values in frame.itertuples(index=False, name=None):
        records.append([None if v is None or (isinstance(v, float) and math.isnan(v))
                        else str(v) for v in values])
    if len(records) != len(lines):
        # A quoted value swallowed a line break; find the first record that holds one.
        for k, rec in enumerate(records):
            if any(c is not None and ("\n" in c or "\r" in c) for c in rec):
                break
        else:
            k = min(len(records), len(lines)) - 1
        raise CountsFileError("a quoted value runs over more than one line",
                              source=name, line=line_numbers[k], row=k if k > 0 else None,
                              header=(k == 0),
                              hint='close the quotation mark on this line')
    header = records[0]
    names = ["" if c is None else c.strip() for c in header]
    locator = _Locator(name, kind="file", lines=line_numbers[1:],
                       header_line=line_numbers[0])
    return records[1:], names, locator


def _cell_text(value: Any) -> str | None:
    """A DataFrame cell as the text a CSV file would hold; raises _Bad for booleans."""
    if value is None or value is pd.NA or value is pd.NaT:
        return ""
    if isinstance(value, (bool, np.bool_)):
        raise _Bad(f"{value!r} is a true/false value, not a number",
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


def _frame_cells(frame: pd.DataFrame, name: str) -> tuple[list[list[Any]], list[str]]:
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


# --------------------------------------------------------------------------- checking


def _check_max_count(max_count: Any) -> int | None:
    if max_count is None:
        return None
    if isinstance(max_count, (bool, np.bool_)) or not isinstance(max_count, (int, np.integer)):
        raise InputError(f"max_count must be a whole number or None, not {max_count!r}",
                         source="max_count")
    if max_count < 0:
        raise InputError(f"max_count must be 0 or more, not {max_count}", source="max_count")
    return int(max_count)


def _header_columns(names: list[str], locator: _Locator, site_column: str) -> dict[str, int]:
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


def _build(names: list[str], records: list[list[Any]], locator: _Locator, *,
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
            cell = _cell_text(rec[i_time]) if frame_like else rec[i_time]
            times[idx] = _parse_time(cell)
            column = "count"
            cell = _cell_text(rec[i_count]) if frame_like else rec[i_count]
            value = _parse_count(cell, max_count)
            counts[idx] = np.nan if value is None else float(value)
            if i_site is not None:
                column = site_column
                cell = _cell_text(rec[i_site]) if frame_like else rec[i_site]
                sites.append(_parse_label(cell, "site"))
            else:
                sites.append(DEFAULT_SITE)
            if i_survey is not None:
                column = SURVEY_COLUMN
                cell = _cell_text(rec[i_survey]) if frame_like else rec[i_survey]
                surveys.append(_parse_label(cell, "survey"))
            else:
                surveys.append(None)
        except _Bad as bad:
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
                    f"{where}already has a row at time {_num(float(times[idx]))} "
                    f"({locator.ref(group[0], 'time')})", idx, "time",
                    "mark replicate surveys at one time with a 'survey' column, or "
                    "remove the duplicate row")
            for other in group:
                if surveys[other] == surveys[idx]:
                    raise locator.error(
                        f"survey '{surveys[idx]}' at time {_num(float(times[idx]))} {where}appears "
                        f"twice (also {locator.ref(other, SURVEY_COLUMN)})", idx,
                        SURVEY_COLUMN,
                        "give each replicate survey at one time its own survey id")
        group.append(idx)

    n_rep = max(len(g) for groups in by_site.values() for g in groups.values())
    n_cells = sum(len(groups) for groups in by_site.values()) * n_rep
    available = _available_memory()
    need = n_cells * _BYTES_PER_CELL
    if available is not None and need > available // 2:
        site_name, t_big, g_big = max(
            ((s, t, g) for s, groups in by_site.items() for t, g in groups.items()),
            key=lambda item: len(item[2]))
        raise locator.error(
            f"data too large for the machine: {n_rep} replicate surveys at time {_num(float(t_big))} "
            f"of site '{site_name}' make the count arrays need {_gib(need)}, "
            f"{_gib(available)} is free", g_big[-1], SURVEY_COLUMN,
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
                msg = f"{where}has counts at only one time ({_num(float(t_obs))})"
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
                f" span {_num(float(t_arr[0]))} to {_num(float(t_arr[-1]))}, too wide to hold as a number",
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


# --------------------------------------------------------------------------- public


def load_counts(source: str | os.PathLike[str] | pd.DataFrame, *, site_column: str = "site",
                max_count: int | None = None) -> CountData:
    """Read and check a counts table.

    Args:
        source: path of a CSV file (UTF-8, comma-separated, header line first; a BOM,
            Windows or old Mac line endings, blank lines and spaces around values are
            fine), or a pandas DataFrame with the same columns (NaN/None = blank).
        site_column: name of the column that holds the site. With the default "site"
            the column is optional (absent: one site called "site"); another name must
            exist in the table.
        max_count: optional upper limit; a larger count is refused.

    Returns:
        CountData with one SiteSeries per site, times sorted, replicates side by side.

    Raises:
        CountsFileError (an InputError): anything malformed — empty file or header
            only; missing, unknown, duplicate or unnamed columns; ragged lines; broken
            quotes; binary data (NUL or control bytes, non-UTF-8 text, workbooks);
            blank or non-numeric or non-finite times; non-numeric, NaN/inf, negative,
            fractional counts, counts above `max_count` or above what float64 holds
            exactly ("too large for the machine"); blank site or survey ids; a repeated
            (site, time) without a survey column or a repeated (site, time, survey); a
            site with counts at fewer than two times; data needing more memory than is
            free. Messages name the file, line (and data row), column and a fix.
        InputError: the file cannot be opened, or bad `site_column` / `max_count`.
    """
    if isinstance(source, pd.DataFrame):
        name = "<DataFrame>"
        records, names = _frame_cells(source, name)
        locator = _Locator(name, kind="frame")
        return _build(names, records, locator, site_column=site_column,
                      max_count=max_count, sha256=None)
    if not isinstance(source, (str, os.PathLike)):
        raise InputError(f"source must be a file path or a pandas DataFrame, not "
                         f"{type(source).__name__}", source="source")
    name = str(source)
    raw = _read_bytes(source)
    digest = hashlib.sha256(raw).hexdigest()
    records_f, names, locator = _file_cells(raw, name)
    return _build(names, records_f, locator, site_column=site_column, max_count=max_count,
                  sha256=digest)


def iter_transitions(data: CountData, *, replicates: str = "single"
                     ) -> Iterator[tuple[str, Transitions]]:
    """Per site, the observed transition pairs (t0, t1, n0, n1).

    For each site (in `data.sites` order) the surveyed times are those with at least
    one non-missing count. Consecutive surveyed times form the pairs, so a time whose
    counts are all blank is skipped and the pair around it spans the gap: counts
    5, blank, 7 at times 1, 2, 3 give the single pair (1, 3, 5, 7). Every site has at
    least one pair (load_counts guarantees two surveyed times).

    Args:
        data: checked count data.
        replicates: "single" (at most one count per time, else an error) or "max"
            (the largest count at each time: the minimum number known alive, common
            practice) — exact-count likelihoods need one count per time; replicate
            surveys belong in an observation model with detection.

    Yields:
        (site, Transitions(t0, t1, n0, n1)) with float times and int64 counts; unpack
        as ``for site, (t0, t1, n0, n1) in iter_transitions(data)``.

    Raises:
        InputError / CountsFileError: unknown `replicates`, or several counts at one
            time with replicates="single" (names the line).
    """
    if not isinstance(data, CountData):
        raise InputError(f"iter_transitions needs CountData, not {type(data).__name__}",
                         source="data")
    for s in data.series:
        yield s.site, s.transitions(replicates)
