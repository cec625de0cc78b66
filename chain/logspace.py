"""Log-space sums used on every posterior draw.

scipy.special.logsumexp is the reference; it carries array-API dispatch that costs about
half a millisecond a call, which dominates the O(N) solvers when they run for thousands
of draws. This is the same max-shifted formula on plain float arrays.
"""
from __future__ import annotations

import numpy as np


def log_sum_exp(a: np.ndarray) -> float:
    """log Σ exp(a) for a 1-D float array (-inf for an empty or all -inf array; +inf if any +inf)."""
    a = np.asarray(a, dtype=float)
    if a.size == 0:
        return -np.inf
    top = a.max()
    if not np.isfinite(top):
        return float(top)
    return float(top + np.log(np.exp(a - top).sum()))


def suffix_log_sum_exp(a: np.ndarray) -> np.ndarray:
    """log Σ_{j>=i} exp(a_j) for every i."""
    return np.logaddexp.accumulate(np.asarray(a, dtype=float)[::-1])[::-1]
