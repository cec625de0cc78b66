"""Count data: the checked counts of one or many sites, as the statistics use them.

A counts table (DESIGN §3) has the columns ``time`` and ``count`` and, optionally,
``site`` (default: one site called ``"site"``) and ``survey`` (an id for replicate
surveys made at the same time). A blank count means that survey was not made; it is
kept as missing (NaN), never dropped. :class:`CountData` holds one :class:`SiteSeries`
per site; they are built only by the one table checker (:mod:`tallyfit.infer.count_table`),
which files (:mod:`tallyfit.inputs.counts_csv`), DataFrames and arrays
(:meth:`CountData.single`) all go through, so every source gets the same checks and
messages that name the file, line, data row and column.
"""
from __future__ import annotations

from collections.abc import Iterator, Sequence
from typing import Any, NamedTuple

import numpy as np
import pandas as pd

from tallyfit.infer.errors import CountsFileError, InputError

__all__ = ["format_time", "REQUIRED_COLUMNS", "SURVEY_COLUMN", "DEFAULT_SITE", "MAX_EXACT_COUNT", "SiteSeries", "CountData",
           "Transitions", "iter_transitions"]

REQUIRED_COLUMNS: tuple[str, str] = ("time", "count")
SURVEY_COLUMN = "survey"
DEFAULT_SITE = "site"
#: Largest count held exactly: counts live in float64 arrays (NaN marks a missing
#: survey), and 2**53 is the largest integer below which every integer is a float64.
MAX_EXACT_COUNT = 2 ** 53


def format_time(value: float) -> str:
    """A time for a message: integers without '.0', others in full precision."""
    if value.is_integer() and abs(value) < 1e15:
        return str(int(value))
    return repr(float(value))


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
                f"n_counts={self.n_counts}, times={format_time(float(self.times[0]))}..{format_time(float(self.times[-1]))})")

    @property
    def row_kind(self) -> str:
        """What ``rows`` numbers: "line" (lines of the file) or "row" (DataFrame or array rows)."""
        return self._row_kind

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

    @property
    def surveyed(self) -> np.ndarray:
        """Bool mask over ``times``: the times with at least one count (a survey made)."""
        return ~np.all(np.isnan(self.counts), axis=1)

    @property
    def surveyed_times(self) -> np.ndarray:
        """The times with at least one count, ascending."""
        return self.times[self.surveyed]

    @property
    def surveyed_counts(self) -> np.ndarray:
        """The count rows (n_surveyed, n_replicates) of the surveyed times (NaN: no replicate)."""
        return self.counts[self.surveyed]

    @property
    def largest_counts(self) -> np.ndarray:
        """The largest count at each surveyed time (float; the minimum number known alive)."""
        return np.nanmax(self.surveyed_counts, axis=1)

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
                    f"site '{self.site}' has {cells.size} counts at time {format_time(float(self.times[i]))} "
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

        from tallyfit.infer.count_table import Locator, frame_cells, table_counts

        cells, names = frame_cells(frame, "<arrays>")
        locator = Locator("<arrays>", kind="arrays", labeler=label)
        return table_counts(names, cells, locator, site_column="site", max_count=max_count, sha256=None)


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
