"""Ultimate extinction probability and mean time to extinction.

With ρ_0 = 1 and ρ_j = Π_{k=1..j} μ_k/λ_k, the probability of ever reaching 0 from n is

    u_n = Σ_{j≥n} ρ_j / Σ_{j≥0} ρ_j,                       (Karlin & McGregor 1957)

which is 1 when the denominator diverges, and which on a finite chain becomes the
gambler's-ruin ratio between 0 and the first size that cannot step down.

The mean time to extinction T_n satisfies μ_k D_k = 1 + λ_k D_{k+1} for the increments
D_k = T_k − T_{k−1}, so, with θ_i = (λ_1⋯λ_{i−1})/(μ_1⋯μ_i),

    D_k = (μ_1⋯μ_{k−1})/(λ_1⋯λ_{k−1}) · Σ_{i≥k} θ_i,   T_n = Σ_{k=1..n} D_k,

a sum of positive terms evaluated in log space.
"""
from __future__ import annotations

import numpy as np

from .logspace import suffix_log_sum_exp as _suffix_logsumexp
from .rates import Rates
from .series import SeriesSum, sum_log_series


def _log_rho(up: np.ndarray, down: np.ndarray, base: int = 0) -> np.ndarray:
    """log ρ_j relative to ``base``: Σ_{k=base+1..j} log(down_k/up_k), j = base..len-1."""
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.log(down[base + 1:]) - np.log(up[base + 1:])
    return np.concatenate([[0.0], np.cumsum(step)])


def _first_stuck(down: np.ndarray) -> int | None:
    """First size >= 1 with zero down rate (never steps below it), or None."""
    idx = np.flatnonzero(down[1:] == 0)
    return int(idx[0]) + 1 if idx.size else None


def ruin_probability(up: np.ndarray, down: np.ndarray, top: int) -> np.ndarray:
    """P(reach 0 before ``top`` | start n) for n = 0..top on a chain absorbing at 0 and top.

    Uses u_n = Σ_{j=n}^{top-1} ρ_j / Σ_{j=a}^{top-1} ρ_j from the highest size a < top with a zero
    up rate (below which the population can never climb to ``top``; a = 0 if none).

    Args:
        up, down: rates over sizes 0..top (at least).
        top: the upper absorbing size.

    Returns:
        array over sizes 0..top; u_0 = 1, u_top = 0.
    """
    u = np.zeros(top + 1)
    zero_up = np.flatnonzero(up[1:top] == 0) + 1
    a = int(zero_up[-1]) if zero_up.size else 0
    u[: a + 1] = 1.0
    if a + 1 <= top - 1:
        lr = _log_rho(up[: top + 1], down[: top + 1], base=a)[: top - a]  # j = a..top-1
        suffix = _suffix_logsumexp(lr)
        u[a + 1: top] = np.exp(suffix[1:] - suffix[0])
    return u


def extinction_probability(rates: Rates, sizes: np.ndarray | None = None, *,
                           target: float = 1e-12) -> tuple[np.ndarray, SeriesSum | None]:
    """Ultimate probability of ever reaching size 0, per start size.

    Args:
        rates: validated rates.
        sizes: start sizes (default 0..N, or 0..100 for an unbounded chain).
        target: tail bound wanted for an unbounded chain.

    Returns:
        (probabilities, the series used for an unbounded chain or None).
    """
    if sizes is None:
        sizes = np.arange((rates.cap if rates.finite else 100) + 1)
    sizes = np.asarray(sizes, dtype=int)
    top_needed = int(sizes.max()) if sizes.size else 0
    if rates.finite:
        up, down = rates.upto(rates.cap)
        stuck = _first_stuck(down)
        if stuck is None:
            return np.ones(sizes.size), None  # finite, reflecting cap: extinction is certain
        u = np.zeros(rates.cap + 1)
        u[: stuck + 1] = ruin_probability(up, down, stuck)
        return u[sizes], None

    def terms(m: int) -> np.ndarray:
        up, down = rates.upto(m)
        _no_zero_birth(rates, up)
        stuck = _first_stuck(down)
        lr = _log_rho(up, down)
        if stuck is not None:
            lr[stuck:] = -np.inf  # never gets below `stuck`: escape, handled below
        return lr

    up, down = rates.upto(max(top_needed, 8))
    stuck = _first_stuck(down)
    if stuck is not None:
        up, down = rates.upto(max(top_needed, stuck))
        u = np.zeros(max(top_needed, stuck) + 1)
        u[: stuck + 1] = ruin_probability(up, down, stuck)
        return u[sizes], None
    def log_ratio(j: np.ndarray) -> np.ndarray:  # ρ_{j+1}/ρ_j = μ_{j+1}/λ_{j+1}
        up_j, down_j = rates.at(j + 1)
        return np.log(down_j) - np.log(up_j)
    s = sum_log_series(terms, target=target, what="the sum of ρ_j = Π μ_k/λ_k", log_ratio=log_ratio)
    if s.status == "diverged":
        return np.ones(sizes.size), s
    if not s.converged:
        return np.full(sizes.size, np.nan), s
    lr = s.log_terms
    if top_needed >= lr.size:
        lr = terms(top_needed + 1)
    suffix = _suffix_logsumexp(lr)
    # terms beyond the truncation are bounded by s.tail_bound of the total; suffix sums near the
    # truncation point are lower bounds, so results for sizes near it carry that relative error.
    return np.exp(suffix[sizes] - s.log_total), s


def _log_increments(up: np.ndarray, down: np.ndarray) -> np.ndarray:
    """log D_k for k = 1..m on sizes 0..m with the top size m reflecting.

    Closed form (vectorised) when every rate is positive; otherwise the backward
    recursion log D_k = logaddexp(−log μ_k, log λ_k − log μ_k + log D_{k+1}), which handles
    zero rates exactly (a zero death rate makes D infinite for every size that can reach it).
    """
    up = np.asarray(up, dtype=float).copy()
    up[-1] = 0.0
    with np.errstate(divide="ignore"):
        lu = np.log(up)
        ld = np.log(down)
    if np.all(up[1:-1] > 0) and np.all(down[1:] > 0):
        big_l = np.concatenate([[0.0], np.cumsum(lu[1:-1])])   # L_i = Σ_{j=1..i} log λ_j, i = 0..m-1
        big_m = np.concatenate([[0.0], np.cumsum(ld[1:])])     # M_i = Σ_{j=1..i} log μ_j, i = 0..m
        log_theta = big_l - big_m[1:]                          # θ_i at index i-1, i = 1..m
        return (big_m[:-1] - big_l) + _suffix_logsumexp(log_theta)
    m = up.size - 1
    log_d = np.empty(m)
    nxt = -np.inf
    for k in range(m, 0, -1):
        with np.errstate(invalid="ignore"):
            log_d[k - 1] = np.logaddexp(-ld[k], lu[k] - ld[k] + nxt) if np.isfinite(ld[k]) else np.inf
        nxt = log_d[k - 1]
    return log_d


def log_mean_time_to_extinction(rates: Rates, sizes: np.ndarray | None = None, *,
                                target: float = 1e-12) -> tuple[np.ndarray, SeriesSum | None]:
    """log of the mean time to reach 0, per start size (+inf where it is infinite).

    The time is in the rates' own time unit (steps for a step chain). It is infinite when
    extinction is not certain, or when a size >= 1 that the population can reach cannot
    step down.

    Args:
        rates: validated rates.
        sizes: start sizes (default 0..N, or 0..100 for an unbounded chain).
        target: tail bound wanted for an unbounded chain.

    Returns:
        (log mean times with -inf at size 0, the series used for an unbounded chain or None).

    Raises:
        RateError: an unbounded chain with a zero birth rate at a size >= 1 (give it capped).
    """
    if sizes is None:
        sizes = np.arange((rates.cap if rates.finite else 100) + 1)
    sizes = np.asarray(sizes, dtype=int)
    top_needed = int(sizes.max()) if sizes.size else 0
    series = None
    if rates.finite:
        up, down = rates.upto(rates.cap)
        log_d = _log_increments(up, down)
    else:
        def log_theta(m: int) -> np.ndarray:
            up, down = rates.upto(m + 1)
            _no_zero_birth(rates, up)
            with np.errstate(divide="ignore"):
                big_l = np.concatenate([[0.0], np.cumsum(np.log(up[1:-1]))])
                big_m = np.concatenate([[0.0], np.cumsum(np.log(down[1:]))])
            return big_l - big_m[1:]
        def log_ratio(j: np.ndarray) -> np.ndarray:  # θ_{j+2}/θ_{j+1} = λ_{j+1}/μ_{j+2}
            up_j, _ = rates.at(j + 1)
            _, down_j = rates.at(j + 2)
            return np.log(up_j) - np.log(down_j)
        series = sum_log_series(log_theta, target=target, what="the mean-time series Σ θ_i",
                                log_ratio=log_ratio)
        if series.status == "diverged" or np.isposinf(series.log_total):
            out = np.full(sizes.size, np.inf)
            out[sizes == 0] = -np.inf
            return out, series
        if not series.converged:
            return np.where(sizes == 0, -np.inf, np.nan), series
        m = max(series.log_terms.size, top_needed + 1)
        up, down = rates.upto(m)
        with np.errstate(divide="ignore"):
            big_l = np.concatenate([[0.0], np.cumsum(np.log(up[1:-1]))])
            big_m = np.concatenate([[0.0], np.cumsum(np.log(down[1:]))])
        log_theta_m = big_l - big_m[1:]
        # Σ_{i>=k} θ_i = (Σ_{i=k..m} θ_i) + tail; the tail is within series.tail_bound of the total
        suffix = _suffix_logsumexp(log_theta_m)
        log_d = (big_m[:-1] - big_l) + suffix
    log_t = np.concatenate([[-np.inf], np.logaddexp.accumulate(log_d)])
    out = np.full(sizes.size, np.inf)
    inside = sizes < log_t.size
    out[inside] = log_t[sizes[inside]]
    return out, series


def _no_zero_birth(rates: Rates, up: np.ndarray) -> None:
    zero = np.flatnonzero(up[1:] == 0)
    if zero.size:
        from .errors import RateError
        k = int(zero[0]) + 1
        raise RateError(f"unbounded chain has {rates.up_name} rate 0 at size {k}: sizes above {k} are "
                        f"never reached from below; give the chain as arrays capped at {k}",
                        name=rates.up_name, size=k, value=0.0)
