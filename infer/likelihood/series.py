"""The count data forms the likelihood accepts, as one checked CountSeries per site.

Arrays from a caller are checked cell by cell (finite, strictly increasing times; whole,
non-negative counts). A :class:`tallyfit.infer.counts.CountData` was checked when it was
built, so its series are taken as they are.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import CountValueError

__all__ = ["CountSeries", "as_series"]


@dataclass(frozen=True)
class CountSeries:
    """One site's survey times and counts as the likelihood uses them.

    Attributes:
        times: 1-D float array, strictly increasing.
        counts: 2-D float array (n_times, n_replicates); NaN = survey not made.
    """

    times: np.ndarray
    counts: np.ndarray


def _checked_series(times: Any, counts: Any, site: int) -> CountSeries:
    t = np.asarray(times, dtype=np.float64)
    c = np.asarray(counts, dtype=np.float64)
    if t.ndim != 1:
        raise CountValueError(f"site {site}: times must be 1-D, got shape {t.shape}", site=site)
    if c.ndim == 1:
        c = c[:, None]
    if c.ndim != 2 or c.shape[0] != t.size:
        raise CountValueError(f"site {site}: counts must have shape (n_times,) or (n_times, "
                              f"n_replicates) with n_times = {t.size}, got {c.shape}", site=site)
    if not np.all(np.isfinite(t)):
        i = int(np.flatnonzero(~np.isfinite(t))[0])
        raise CountValueError(f"site {site}: time #{i} is {t[i]!r}; times must be finite",
                              site=site)
    if t.size > 1 and not np.all(np.diff(t) > 0):
        i = int(np.flatnonzero(~(np.diff(t) > 0))[0])
        raise CountValueError(f"site {site}: times must be strictly increasing, but time #{i + 1} "
                              f"({t[i + 1]!r}) follows {t[i]!r}", site=site, time=float(t[i + 1]),
                              hint="sort the rows by time and put replicate surveys in columns")
    present = ~np.isnan(c)
    vals = c[present]
    bad = ~np.isfinite(vals) | (vals < 0) | (vals != np.round(vals))
    if np.any(bad):
        idx = np.argwhere(present)[np.flatnonzero(bad)[0]]
        v = c[idx[0], idx[1]]
        raise CountValueError(f"site {site}: count {v!r} at time {t[idx[0]]!r} is not a whole "
                              f"number ≥ 0", site=site, time=float(t[idx[0]]))
    return CountSeries(times=t, counts=c)


def as_series(times: Any, counts: Any = None) -> list[CountSeries]:
    """Normalise the accepted data forms to a list of CountSeries.

    Accepted: (1-D times, 1-D or 2-D counts) for one site; (list of times arrays, list of
    counts arrays) for several; or ``times`` = an object with ``.series`` (each item with
    ``.times`` and ``.counts``, or a (times, counts) pair) and ``counts`` = None; or a list
    of (times, counts) pairs with ``counts`` = None. Only a CountData (checked when it was
    built) is taken without checking its cells again.

    Args:
        times: see above.
        counts: see above.

    Returns:
        One CountSeries per site.

    Raises:
        CountValueError: shapes that do not match, unsorted or non-finite times, counts
            that are negative or not whole numbers.
    """
    if counts is None and isinstance(times, CountData):
        return [CountSeries(times=np.asarray(s.times, dtype=np.float64),
                            counts=np.asarray(s.counts, dtype=np.float64)) for s in times.series]
    items: list[tuple[Any, Any]]
    if counts is None:
        src = times.series if hasattr(times, "series") else times
        items = []
        try:
            for it in src:
                if hasattr(it, "times") and hasattr(it, "counts"):
                    items.append((it.times, it.counts))
                else:
                    tt, cc = it
                    items.append((tt, cc))
        except (TypeError, ValueError) as exc:
            raise CountValueError("with counts=None, pass a data object with .series or a list "
                                  "of (times, counts) pairs") from exc
    elif (isinstance(times, (list, tuple)) and len(times) > 0 and np.ndim(times[0]) >= 1):
        if not isinstance(counts, (list, tuple)) or len(counts) != len(times):
            raise CountValueError("several sites: give a list of counts arrays as long as the "
                                  "list of times arrays")
        items = list(zip(times, counts))
    else:
        items = [(times, counts)]
    if not items:
        raise CountValueError("no series given")
    return [_checked_series(t, c, s) for s, (t, c) in enumerate(items)]
