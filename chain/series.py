"""Sums of positive series in log space, with a ratio test for the tail.

The stationary distribution, the ultimate extinction probability and the mean time to
extinction of an unbounded chain are all sums of products of rate ratios. We add terms
until the tail beyond the truncation is provably small *under the ratio assumption*:
if consecutive terms shrink by a factor at most ρ < 1 beyond 2M, the tail after 2M is at
most t_{2M}·ρ/(1−ρ). ρ is the largest ratio seen on [M, 2M) and at far probe sizes
2M·4^j up to about 10^12, which catches ratios that creep up towards a limit (e.g.
(0.9n + 0.3)/(n + 1) → 0.9); between probes the ratio is assumed not to exceed them.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from .logspace import log_sum_exp as logsumexp
from .rates import MAX_UNBOUNDED_SIZE


@dataclass(frozen=True)
class SeriesSum:
    """A summed positive series.

    Attributes:
        log_terms: log of the terms that were added (index = term number).
        log_total: log of their sum.
        tail_bound: bound on (sum of omitted terms) / (sum of added terms).
        status: "converged", "diverged" or "inconclusive".
        reason: a sentence for the user.
    """

    log_terms: np.ndarray
    log_total: float
    tail_bound: float
    status: str
    reason: str

    @property
    def converged(self) -> bool:
        return self.status == "converged"


_PROBES = 4.0 ** np.arange(18)


def sum_log_series(log_terms: Callable[[int], np.ndarray], *, target: float = 1e-12,
                   start: int = 64, max_terms: int = MAX_UNBOUNDED_SIZE,
                   what: str = "the series",
                   log_ratio: Callable[[np.ndarray], np.ndarray] | None = None) -> SeriesSum:
    """Sum a positive series given by its log terms, deciding convergence from the tail.

    Args:
        log_terms: ``log_terms(m)`` returns the log of terms 0..m (may contain -inf;
            once a term is -inf, all later terms must be -inf too).
        target: wanted bound on the omitted relative mass.
        start: first truncation tried; doubled until the bound is met.
        max_terms: give up (status "inconclusive") beyond this many terms.
        what: name of the series for the reason text.
        log_ratio: ``log_ratio(n)`` = log(t_{n+1}/t_n) at an array of term numbers, used to
            probe the ratio far beyond the terms summed.

    Returns:
        SeriesSum.
    """
    log_ratio_fn = log_ratio
    m = start
    while True:
        lt = np.asarray(log_terms(2 * m), dtype=float)
        if np.isneginf(lt).any():
            last = int(np.flatnonzero(~np.isneginf(lt))[-1]) if np.isfinite(lt).any() else 0
            lt = lt[: last + 1]
            return SeriesSum(lt, float(logsumexp(lt)), 0.0, "converged",
                             f"{what} has finitely many non-zero terms (none beyond {last})")
        if np.isposinf(lt).any():
            n = int(np.flatnonzero(np.isposinf(lt))[0])
            return SeriesSum(lt, np.inf, np.inf, "diverged", f"{what} has an infinite term at {n}")
        log_ratio = np.diff(lt[m:])  # log(t_{n+1}/t_n) for n in [m, 2m)
        total = float(logsumexp(lt))
        if log_ratio.min() >= 0:
            return SeriesSum(lt, np.inf, np.inf, "diverged",
                             f"{what} diverges: its terms do not shrink between {m} and {2 * m} "
                             f"(ratio of successive terms >= 1), so the sum is infinite")
        rho_log = float(log_ratio.max())
        if rho_log < 0 and log_ratio_fn is not None:
            with np.errstate(all="ignore"):
                far = np.asarray(log_ratio_fn((2 * m * _PROBES).astype(np.int64)), dtype=float)
            far = far[~np.isnan(far)]
            if far.size:
                rho_log = max(rho_log, float(far.max()))
        if rho_log < 0:
            rho = np.exp(rho_log)
            log_tail = lt[-1] + rho_log - np.log1p(-rho)
            bound = float(np.exp(log_tail - total))
            if bound <= target:
                return SeriesSum(lt, total, bound, "converged",
                                 f"{what} converges (ratio test: successive terms shrink by at most "
                                 f"{rho:.6g} from {m} on; omitted relative mass <= {bound:.2e})")
        if 2 * m >= max_terms:
            return SeriesSum(lt, total, np.inf, "inconclusive",
                             f"{what}: the ratio test could not bound the tail below {target:g} "
                             f"within {2 * m} terms (successive-term ratio approaches 1)")
        m *= 2
