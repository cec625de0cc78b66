"""Extinction and quasi-extinction curves: P(first reach a size <= k by time t | start).

Sizes 0..k are merged into one absorbing size k; the absorbed probability at time t is then
the curve. The top of the range is cut where paths rarely go, with the probability of going
there kept as a rigorous bound on the error.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class PassageCurve:
    """An extinction (threshold 0) or quasi-extinction curve.

    Attributes:
        times: horizons (time units, or steps for a step chain).
        probability: P(size <= threshold at some time in [0, t] | start), per horizon.
        error_bound: bound on the absolute error of each probability.
        start: start size.
        threshold: the quasi-extinction threshold k (0 = extinction).
    """

    times: np.ndarray
    probability: np.ndarray
    error_bound: np.ndarray
    start: int
    threshold: int

    def __array__(self, dtype=None, copy=None):
        return np.asarray(self.probability, dtype=dtype)

    def __len__(self) -> int:
        return self.probability.size


def absorbing_rates(up: np.ndarray, down: np.ndarray, threshold: int) -> tuple[np.ndarray, np.ndarray]:
    """Rates with sizes <= threshold merged into an absorbing size ``threshold``."""
    up = np.array(up, dtype=float)
    down = np.array(down, dtype=float)
    up[: threshold + 1] = 0.0
    down[: threshold + 1] = 0.0
    return up, down
