"""How both evaluators size their windows of sizes: the widening limits and the warm start.

The exact-count evaluator (:mod:`.exact`) and the detection evaluator (:mod:`.hidden`)
widen windows in rounds until the probability they leave out is within the tolerance,
and start the next evaluation from the margins this one needed.
"""
from __future__ import annotations

import numpy as np

__all__ = ["TAIL_FLOOR", "MAX_ROUNDS", "warm_margins"]

#: Poisson tails never asked below this (weights below it underflow anyway).
TAIL_FLOOR = 1e-300
#: Most rounds of widening before giving up.
MAX_ROUNDS = 40


def warm_margins(margin: np.ndarray, spread: np.ndarray, last: np.ndarray, failed: np.ndarray,
                 z: np.ndarray) -> None:
    """Set one side's window margins from what the last evaluation measured (in place).

    Where the last evaluation measured a spread, the margin is what a Gaussian tail of that
    spread needs to reach ``z`` standard deviations, but at least 90% of the last margin
    (all of it where the last evaluation had to widen); elsewhere the last margin is kept.

    Args:
        margin: int64 margins per window, overwritten.
        spread: measured spread per window beyond the bulk (NaN where none was measured:
            the window was clipped at 0 or N, or the leak underflowed).
        last: the margins the last evaluation ended with (NaN where there were none).
        failed: where the last evaluation had to widen.
        z: the tail depth wanted per window, in standard deviations.

    Returns:
        None.

    Raises:
        Nothing.
    """
    known = np.isfinite(spread)
    # Gaussian-tail model of leak vs margin, shrinking at most 10% per evaluation
    model = np.ceil(1.1 * spread[known] * z[known]) + 2
    keep = np.where(failed[known], 1.0, 0.9)
    margin[known] = np.maximum(model, np.ceil(keep * last[known])).astype(np.int64)
    unknown = ~known & np.isfinite(last)
    margin[unknown] = np.ceil(last[unknown]).astype(np.int64)  # clipped or underflowed
