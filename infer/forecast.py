"""Forecast of the next censuses: how many animals to expect at the next few counts.

For one posterior draw the population size k census intervals after a site's last count
has the distribution of row ``start`` of P(k·Δ) = exp(Q k Δ) (the process is Markov, so
nothing before the last count matters once it is known). With good and bad years the
row is that of the year-averaged annual chain, P̄^(k·Δ), Δ a whole number of years.
The predictive distribution is the average of these rows over the posterior draws:
parameter uncertainty and the chance of births and deaths (and of the years) together.

The forecast is of the population size; with exact counts that is the next count.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from tallyfit.chain.uniformization import transition_rows

__all__ = ["FORECAST_QUANTILES", "forecast_rows", "pmf_quantiles"]

#: Quantiles of the fan chart and table: 90% and 50% bands and the median.
FORECAST_QUANTILES = (0.05, 0.25, 0.5, 0.75, 0.95)


def forecast_rows(birth: np.ndarray, death: np.ndarray, starts: np.ndarray, steps: int, interval: float,
                  annual: Any | None = None) -> np.ndarray:
    """Distribution of the size 1..steps census intervals after each start, for one draw.

    Args:
        birth, death: rates over sizes 0..N (immigration λ_0 included).
        starts: start sizes (each site's last count).
        steps: how many future censuses.
        interval: census interval Δ in time units (> 0).
        annual: an EnvironmentalChain with these rates (good and bad years), or None.

    Returns:
        array (len(starts), steps, N+1); each row sums to 1 up to the cut Poisson tail.

    Raises:
        ValueError: steps < 1, interval ≤ 0, or (with ``annual``) an interval that is not a
            whole number of years.
    """
    starts = np.asarray(starts, dtype=np.int64)
    if steps < 1 or not interval > 0:
        raise ValueError(f"a forecast needs steps >= 1 and an interval > 0, got {steps}, {interval}")
    if annual is None:
        times = interval * np.arange(1, steps + 1, dtype=float)
        rows = transition_rows(birth, death, starts, times, tail=1e-14).rows  # (time, start, size)
        return np.minimum(np.transpose(rows, (1, 0, 2)), 1.0)
    years = int(round(interval))
    if years != interval or years < 1:
        raise ValueError(f"with good and bad years the census interval must be whole years, got {interval}")
    matrix = annual.annual_matrix(None)
    row = np.zeros((starts.size, matrix.shape[0]))
    row[np.arange(starts.size), starts] = 1.0
    out = np.empty((starts.size, steps, matrix.shape[0]))
    for k in range(steps):
        for _ in range(years):
            row = row @ matrix
        out[:, k] = row
    return out


def pmf_quantiles(pmf: np.ndarray, quantiles: tuple[float, ...] = FORECAST_QUANTILES) -> np.ndarray:
    """Quantiles of distributions over sizes 0..N (the smallest n with P(size ≤ n) ≥ q).

    Args:
        pmf: array (..., N+1), each last-axis vector a distribution.
        quantiles: levels in (0, 1).

    Returns:
        array (..., len(quantiles)) of sizes.
    """
    cdf = np.cumsum(pmf, axis=-1)
    cdf = cdf / cdf[..., -1:]  # the cut tail is shared out, not lost
    return np.stack([np.argmax(cdf >= q - 1e-12, axis=-1) for q in quantiles], axis=-1)
