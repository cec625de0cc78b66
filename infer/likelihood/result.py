"""What one likelihood evaluation returns (or raises when a count is above the cap)."""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from tallyfit.infer.errors import CapTooSmallError

__all__ = ["LikelihoodResult", "cap_error"]


@dataclass
class LikelihoodResult:
    """A log-likelihood evaluation with its gradients and its truncation bound.

    Attributes:
        ll: the log-likelihood (−inf when a transition is impossible in exact arithmetic).
        d_birth, d_death: gradients over sizes 0..N (None when not asked for). d_birth[N]
            and d_death[0] are 0 (those rates do not enter).
        d_detection: derivative w.r.t. the detection probability (None without detection
            or without gradients).
        error_bound: bound on |log L_true − ll| from windows and truncated sums (rounding
            not included); ≤ tol unless the whole range was needed.
        pointwise: per site, one log-likelihood term per transition (exact counts: one
            per pair of consecutive surveyed times; detection: one per surveyed occasion
            after the first, the first occasion's term folded into the second). They sum
            to ll.
        d_sigma: derivative w.r.t. the environment's standard deviation σ (None without
            environmental variation or without gradients).
        d_birth_effects, d_death_effects: derivatives w.r.t. the covariate effects on log
            births and log deaths (None without covariates or gradients).
        sweeps: number of forward/backward sweep groups computed (all rounds).
        steps: total uniformization steps over those sweeps.
        rounds: rounds of window widening.
    """

    ll: float
    d_birth: np.ndarray | None
    d_death: np.ndarray | None
    d_detection: float | None
    error_bound: float
    pointwise: list[np.ndarray] = field(default_factory=list)
    sweeps: int = 0
    steps: int = 0
    rounds: int = 0
    d_sigma: float | None = None
    d_birth_effects: np.ndarray | None = None
    d_death_effects: np.ndarray | None = None


def cap_error(count: int, site: int, time: float, N: int) -> CapTooSmallError:
    """The error for a count above the size cap N.

    Args:
        count: the offending count.
        site: index of its series.
        time: its survey time.
        N: the cap of the rate arrays.

    Returns:
        A CapTooSmallError (to raise) that names the count, where it is, and a cap to use.

    Raises:
        Nothing.
    """
    return CapTooSmallError(
        f"count {count} at site {site}, time {time:g} exceeds the size cap N = {N} "
        f"(the rate arrays cover sizes 0..{N})",
        hint=f"rebuild the rates with a larger maximum size, e.g. at least {max(2 * count, count + 50)}")
