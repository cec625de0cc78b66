"""Quasi-stationary distribution: the long-run law of a population not yet extinct.

It is the left eigenvector x of the generator restricted to sizes 1..N for the eigenvalue
−θ nearest 0; θ is the extinction rate from quasi-stationarity (θ = μ_1 x_1).

Two steps. (1) The restricted generator is similar to a symmetric tridiagonal matrix
(detailed balance with the measure π̃_1 = 1, π̃_{n+1} = π̃_n λ_n/μ_{n+1}), whose lowest
eigenpair scipy.linalg.eigh_tridiagonal gives in O(N). That start is accurate only in
absolute terms. (2) Inverse iteration with the exact, all-positive inverse of the
restricted generator — the expected occupation times G_ij = π̃_j Σ_{k≤min(i,j)} 1/(μ_k π̃_k)
— done in log space:

    x'_j = π̃_j Σ_{k=1..j} (1/(μ_k π̃_k)) Σ_{i≥k} x_i,        θ = 1 / Σ_j x'_j  (Σ x = 1),

restores relative accuracy in tiny probabilities and in tiny θ (the iteration of
Nåsell 2001 for the stochastic logistic model is this same map).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.linalg import eigh_tridiagonal

from .errors import ChainError
from .logspace import log_sum_exp as logsumexp, suffix_log_sum_exp as _suffix_logsumexp


@dataclass(frozen=True)
class QuasiStationary:
    """The quasi-stationary distribution.

    Attributes:
        pmf: probabilities over sizes 0..N (pmf[0] = 0).
        log_pmf: their logs (-inf at 0).
        decay_rate: θ; P(not extinct by t) ~ e^{−θt} from quasi-stationarity (0.0 when θ is
            below the float range; see ``log_decay_rate``).
        log_decay_rate: log θ, finite even when θ underflows.
        mean: mean size under the distribution.
        converged: whether the inverse iteration met its tolerance.
        iterations: inverse iterations used.
    """

    pmf: np.ndarray
    log_pmf: np.ndarray
    decay_rate: float
    mean: float
    converged: bool
    iterations: int
    log_decay_rate: float = float("nan")

    @property
    def mean_time_to_extinction(self) -> float:
        """1/θ: the mean time to extinction when starting from this distribution."""
        return float(np.exp(-self.log_decay_rate)) if np.isfinite(self.log_decay_rate) else 1.0 / self.decay_rate


def quasi_stationary(up: np.ndarray, down: np.ndarray, *, rtol: float = 1e-13,
                     max_iter: int = 500) -> QuasiStationary:
    """Quasi-stationary distribution of a finite chain with rates over sizes 0..N.

    Args:
        up, down: rates (or step probabilities) over 0..N; up[N] is taken as 0.
        rtol: stop when the log pmf and θ change by less than this.
        max_iter: iteration limit (``converged`` False if reached).

    Returns:
        QuasiStationary.

    Raises:
        ChainError: a death rate is 0 at some size >= 1 (extinction is not certain from
            there, so the law conditioned on survival is not the one computed here), or N < 1.
    """
    up = np.asarray(up, dtype=float).copy()
    down = np.asarray(down, dtype=float)
    n_cap = up.size - 1
    if n_cap < 1:
        raise ChainError("the quasi-stationary distribution needs sizes up to at least 1")
    up[-1] = 0.0
    zero_down = np.flatnonzero(down[1:] == 0)
    if zero_down.size:
        k = int(zero_down[0]) + 1
        raise ChainError(f"death rate is 0 at size {k}: the population can avoid extinction from there, "
                         "so there is no single quasi-stationary distribution on sizes 1..N")
    lam, mu = up[1:], down[1:]  # sizes 1..N
    with np.errstate(divide="ignore"):
        log_lam, log_mu = np.log(lam), np.log(mu)
    zero_up = np.flatnonzero(lam[:-1] == 0)
    top = int(zero_up[0]) + 1 if zero_up.size else n_cap  # sizes above a zero birth rate are transient
    m = top  # work on sizes 1..top
    log_pit = np.concatenate([[0.0], np.cumsum(log_lam[: m - 1] - log_mu[1:m])])  # log π̃_1..π̃_top

    # (1) symmetric tridiagonal start
    diag = lam[:m] + mu[:m]  # lam[m-1] is 0: the cap, or the zero birth rate closing 1..top
    off = -np.sqrt(lam[: m - 1] * mu[1:m])
    if m == 1:
        log_x = np.array([0.0])
    else:
        _, vec = eigh_tridiagonal(diag, off, select="i", select_range=(0, 0))
        with np.errstate(divide="ignore"):
            log_x = np.log(np.abs(vec[:, 0])) + 0.5 * log_pit
        log_x = np.where(np.isfinite(log_x), log_x, log_x[np.isfinite(log_x)].min() - 50.0)
    log_x -= logsumexp(log_x)

    # (2) positive inverse iteration in log space
    log_c = -log_mu[:m] - log_pit
    theta = np.nan
    log_theta = np.nan
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        log_s = _suffix_logsumexp(log_x)
        log_new = log_pit + np.logaddexp.accumulate(log_c + log_s)
        log_norm = logsumexp(log_new)
        log_theta = -float(log_norm)
        new_theta = float(np.exp(log_theta))
        log_new -= log_norm
        weight = log_new > np.log(1e-300)
        change = np.max(np.abs(log_new[weight] - log_x[weight]))
        log_x = log_new
        if np.isfinite(theta) and change < rtol and abs(new_theta - theta) <= rtol * new_theta and it > 1:
            theta = new_theta
            converged = True
            break
        theta = new_theta
    log_pmf = np.full(n_cap + 1, -np.inf)
    log_pmf[1: m + 1] = log_x
    pmf = np.exp(log_pmf)
    return QuasiStationary(pmf, log_pmf, theta, float(np.dot(np.arange(n_cap + 1), pmf)),
                           converged, it, log_theta)
