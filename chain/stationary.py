"""Stationary distribution of a birth–death chain by detailed balance.

Neighbouring sizes balance flow, π_n λ_n = π_{n+1} μ_{n+1}, so

    π_n ∝ Π_{k=1..n} λ_{k-1} / μ_k,

computed as cumulative sums of logs (the products over- and underflow long before
N = 1000). The global-balance residual is checked anyway and kept on the result.
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

from .logspace import log_sum_exp as logsumexp
from .rates import Rates
from .series import sum_log_series


@dataclass(frozen=True)
class Stationary:
    """A stationary distribution, or the reason there is none.

    Attributes:
        pmf: probabilities over sizes 0..M (empty when ``exists`` is False).
        log_pmf: their logs.
        exists: whether a (non-degenerate) stationary distribution exists.
        mean: mean size (nan if none).
        tail_bound: bound on the probability beyond size M (0 for a finite chain).
        residual: largest relative global-balance residual over the sizes.
        reason: a sentence explaining the answer.
    """

    pmf: np.ndarray
    log_pmf: np.ndarray
    exists: bool
    mean: float
    tail_bound: float
    residual: float
    reason: str
    sizes: np.ndarray = field(default_factory=lambda: np.zeros(0, dtype=int))


def _none(reason: str) -> Stationary:
    empty = np.zeros(0)
    return Stationary(empty, empty, False, float("nan"), float("nan"), float("nan"), reason)


def log_product_terms(up: np.ndarray, down: np.ndarray) -> np.ndarray:
    """log Π_{k=1..n} up_{k-1}/down_k for n = 0..len-1 (-inf after a zero up rate).

    Raises nothing; a zero down rate at k >= 1 gives +inf (the caller decides).
    """
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.log(up[:-1]) - np.log(down[1:])
    step[up[:-1] == 0] = -np.inf
    zero_up = np.flatnonzero(up[:-1] == 0)
    if zero_up.size:
        step[zero_up[0]:] = -np.inf  # sizes above a zero up rate are never reached from below
    return np.concatenate([[0.0], np.cumsum(step)])


def balance_residual(pmf: np.ndarray, up: np.ndarray, down: np.ndarray) -> float:
    """Largest relative global-balance residual |inflow − outflow| / outflow over the sizes
    whose probability is a normal float (> 1e-290).

    ``up`` at the last size is taken as 0 (the cap reflects / the truncation point).
    """
    up = up.copy()
    up[-1] = 0.0
    out = pmf * (up + down)
    inflow = np.zeros_like(pmf)
    inflow[1:] += pmf[:-1] * up[:-1]
    inflow[:-1] += pmf[1:] * down[1:]
    scale = np.maximum(out, inflow)
    # judge balance where the probabilities are normal floats: subnormal ones carry few digits
    ok = (scale > 0) & (pmf > 1e-290)
    if not ok.any():
        return 0.0
    return float(np.max(np.abs(inflow[ok] - out[ok]) / scale[ok]))


def stationary(rates: Rates, *, target: float = 1e-12) -> Stationary:
    """Stationary distribution from the product formula.

    Args:
        rates: validated rates (continuous-time rates or step probabilities: same formula).
        target: for unbounded chains, the wanted bound on the mass beyond the truncation.

    Returns:
        Stationary. ``exists`` is False, with the reason, when 0 is absorbing (see the
        quasi-stationary distribution instead), when the chain is reducible above 0, or
        when the normalising sum diverges (the population is not regulated).
    """
    up0, _ = rates.upto(1)
    if up0[0] == 0:
        return _none(f"size 0 is absorbing ({rates.up_name} rate 0 at size 0): the only stationary "
                     "distribution is extinction; use quasi_stationary() for the behaviour of a "
                     "population that has not yet died out")

    def terms(m: int) -> np.ndarray:
        up, down = rates.upto(m)
        lt = log_product_terms(up, down)
        if np.isposinf(lt).any():
            k = int(np.flatnonzero(np.isposinf(lt))[0])
            raise _Reducible(k)
        return lt

    try:
        if rates.finite:
            lt = terms(rates.cap)
            finite_lt = lt[np.isfinite(lt)]
            log_z = float(logsumexp(finite_lt))
            tail, status, reason = 0.0, "converged", "finite chain: the normalising sum is finite"
        else:
            def log_ratio(n: np.ndarray) -> np.ndarray:  # π_{n+1}/π_n = λ_n/μ_{n+1}
                up_n, _ = rates.at(n)
                _, down_n1 = rates.at(n + 1)
                return np.log(up_n) - np.log(down_n1)
            s = sum_log_series(terms, target=target, what="the normalising sum of the stationary measure",
                               log_ratio=log_ratio)
            if not s.converged:
                return _none(s.reason + ("; no stationary distribution exists (the population is "
                                         "not regulated)" if s.status == "diverged" else
                                         "; no stationary distribution could be established"))
            lt, log_z, tail, reason = s.log_terms, s.log_total, s.tail_bound, s.reason
    except _Reducible as exc:
        return _none(f"{rates.down_name} rate is 0 at size {exc.size}: sizes below {exc.size} are never "
                     "re-entered, so the chain is reducible; give a positive rate there")
    log_pmf = lt - log_z
    pmf = np.exp(log_pmf)
    up, down = rates.upto(pmf.size - 1)
    sizes = np.arange(pmf.size)
    residual = balance_residual(pmf, np.asarray(up, float), np.asarray(down, float))
    return Stationary(pmf, log_pmf, True, float(np.dot(sizes, pmf)), tail, residual, reason, sizes)


class _Reducible(Exception):
    def __init__(self, size: int) -> None:
        self.size = size
