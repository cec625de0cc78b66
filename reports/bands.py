"""Posterior bands: equal-tailed credible intervals and means over the draws.

Every figure and table of the report summarises draws the same way: the posterior mean,
the median and an equal-tailed interval (90% unless the run says otherwise), over the
``chain`` and ``draw`` dims, ignoring draws where a quantity does not exist (NaN).
"""
from __future__ import annotations

import warnings
from dataclasses import dataclass

import numpy as np
import xarray as xr

__all__ = ["Band", "band", "SAMPLE_DIMS"]

SAMPLE_DIMS = ("chain", "draw")


@dataclass(frozen=True)
class Band:
    """Mean, median and an equal-tailed interval, elementwise over the remaining dims.

    Attributes:
        mean, lo, median, hi: DataArrays over the dims left after summarising the draws.
        n: number of finite draws behind each element.
        level: the interval's credible level.
    """

    mean: xr.DataArray
    lo: xr.DataArray
    median: xr.DataArray
    hi: xr.DataArray
    n: xr.DataArray
    level: float


def band(da: xr.DataArray, level: float = 0.9, dims: tuple[str, ...] = SAMPLE_DIMS) -> Band:
    """Summarise draws: mean, median and equal-tailed interval, NaN draws left out.

    Args:
        da: the draws (must have every dim in ``dims``).
        level: credible level in (0, 1).
        dims: the dims holding the draws.

    Returns:
        Band (elements with no finite draw are NaN, with n = 0).

    Raises:
        ValueError: level not in (0, 1) or a dim in ``dims`` missing from ``da``.
    """
    if not 0 < level < 1:
        raise ValueError(f"credible level must be in (0, 1), got {level!r}")
    missing = [d for d in dims if d not in da.dims]
    if missing:
        raise ValueError(f"{da.name!r} has no dim {', '.join(missing)} (dims: {', '.join(da.dims)})")
    x = da.astype(float)
    a = (1 - level) / 2
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        q = x.quantile([a, 0.5, 1 - a], dim=list(dims), skipna=True)
        mean = x.mean(dim=list(dims), skipna=True)
    n = np.isfinite(x).sum(dim=list(dims))
    return Band(mean=mean, lo=q.isel(quantile=0, drop=True), median=q.isel(quantile=1, drop=True),
                hi=q.isel(quantile=2, drop=True), n=n, level=level)

