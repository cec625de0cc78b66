"""Exact counts under environmental variation and known covariates.

Between two censuses the population lives through conditions drawn afresh: the
per-capita births of the interval are multiplied by exp(ε − σ_t²/2 + z_b·β_b) and, with
``affects = "birth_and_death"``, the per-capita deaths by exp(−ε − σ_t²/2 + z_d·β_d)
(a good year raises births and lowers deaths; without environment on deaths only the
covariates z_d·β_d move them), with ε ~ Normal(0, σ_t²) independent between intervals.
Immigration is not scaled. The factor is mean-corrected (E exp(ε − σ_t²/2) = 1), so
the family's birth rate stays the average birth rate over years and σ only spreads it;
σ = 0 is the plain model exactly. The environment is one draw per interval with
σ_t² = σ²/max(t, 1) for an interval of t time units: over a gap of several years the
environmental variance of log growth is then σ²·b²·t, as for t independent years in the
diffusion limit (Dennis, Munholland & Scott 1991, Ecol. Monogr. 61:115–143), while
intervals of a year or less draw one year's conditions.

The counts at census times stay a Markov chain with transition probabilities
P̄_{mn} = E_ε[P_{mn}(t; ε)]. Each pair's average is computed by Gauss–Hermite quadrature
centred on that pair's own posterior over ε (a Gaussian guide, :mod:`.proposal`), with
weights that correct exactly for the guide:

    P̄_{mn} ≈ Σ_k w_k e^{u_k²} √2 s φ(x_k) P_{mn}(t; σ_t x_k),   x_k = x̂ + √2 s u_k,

(u_k, w_k the Gauss–Hermite rule, φ the standard normal density). The windows' leak
bounds are kept per node; the quadrature's own error is measured by comparing rules
(:func:`quadrature_shift`), as the fit's checks do on posterior draws. Gradients: exact
derivatives of the computed sum with the guide held fixed (the guide only places the
nodes; moving it changes the sum by no more than the quadrature error).
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numpy.polynomial.hermite import hermgauss

from tallyfit.chain.errors import RateError

from .exact import ExactPlan, structurally_possible
from .proposal import gaussian_guide
from .result import LikelihoodResult, cap_error
from .sweeps import Groups, sweep_groups

__all__ = ["AFFECTS", "DEFAULT_NODES", "EnvironmentPlan", "evaluate_environment", "quadrature_shift"]

#: Which rates the environment moves.
AFFECTS = ("birth", "birth_and_death")
#: Gauss–Hermite nodes per pair. Measured on heron-like counts at σ = 0.3 against a fine-grid
#: average of scipy expm, |Δ log L| over 11 transitions: 5 nodes 4e-5, 7 nodes 1.3e-5, 9 nodes
#: 3e-6, 13 nodes 5e-10; each node costs one sweep, and 1e-5 is far below the posterior's scale
#: (the fit re-checks on its own draws, draws.quadrature_check).
DEFAULT_NODES = 7


@dataclass
class EnvironmentPlan:
    """The pairs of an exact-count data set with their covariates, built once.

    Args:
        exact: the pair grouping of the counts.
        birth_covariates: (n_pairs, J) covariate values of each pair's interval acting on
            births (in the plan's pair order), or None.
        death_covariates: (n_pairs, L) likewise on deaths, or None.
        affects: "birth" or "birth_and_death".

    Raises:
        RateError: unknown ``affects``, or covariates of the wrong shape or not finite.
    """

    exact: ExactPlan
    birth_covariates: np.ndarray | None = None
    death_covariates: np.ndarray | None = None
    affects: str = "birth"

    def __post_init__(self) -> None:
        if self.affects not in AFFECTS:
            raise RateError(f"environment must act on one of {AFFECTS}, not {self.affects!r}", name="environment")
        P = self.exact.n_pairs
        self.zb = self._design(self.birth_covariates, P, "birth")
        self.zd = self._design(self.death_covariates, P, "death")
        e = self.exact
        keys = np.column_stack([e.dt, e.m, e.n, self.zb, self.zd]) if P else np.zeros((0, 3))
        uniq, inv, mult = np.unique(keys, axis=0, return_inverse=True, return_counts=True)
        self.u_dt, self.u_m, self.u_n = uniq[:, 0], uniq[:, 1].astype(np.int64), uniq[:, 2].astype(np.int64)
        J = self.zb.shape[1]
        self.u_zb = uniq[:, 3:3 + J]
        self.u_zd = uniq[:, 3 + J:]
        self.pair_unique = inv.ravel()
        self.u_mult = mult.astype(float)
        self.u_first = np.array([int(np.flatnonzero(self.pair_unique == u)[0]) for u in range(uniq.shape[0])],
                                dtype=np.int64)
        self.groups: Groups | None = None

    @staticmethod
    def _design(z: np.ndarray | None, P: int, what: str) -> np.ndarray:
        if z is None:
            return np.zeros((P, 0))
        z = np.asarray(z, dtype=float)
        if z.ndim != 2 or z.shape[0] != P or not np.all(np.isfinite(z)):
            raise RateError(f"{what} covariates must be finite with one row per transition ({P}), got shape "
                            f"{z.shape}", name="covariates")
        return z

    @property
    def death_sign(self) -> float:
        """−1 when a good year lowers deaths, 0 when the environment moves births only."""
        return -1.0 if self.affects == "birth_and_death" else 0.0

    def nodes(self, sigma: float, b: np.ndarray, d: np.ndarray, beta_b: np.ndarray, beta_d: np.ndarray,
              n_nodes: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """Quadrature nodes of every distinct pair.

        Returns:
            (x, weight, log_birth_scale, log_death_scale, sigma_t): x, weight and the log
            scales with shape (n_unique, K); sigma_t (n_unique,).
        """
        c = 1.0 / np.sqrt(np.maximum(self.u_dt, 1.0))
        st = sigma * c
        shift_b = self.u_zb @ beta_b
        shift_d = self.u_zd @ beta_d
        if sigma == 0.0:
            x = np.zeros((self.u_m.size, 1))
            w = np.ones_like(x)
        else:
            u, wg = hermgauss(n_nodes)
            xh, s = gaussian_guide(b, d, self.u_m, self.u_n, self.u_dt, st, shift_b, shift_d, self.death_sign)
            x = xh[:, None] + math.sqrt(2.0) * s[:, None] * u[None, :]
            w = (wg * np.exp(u ** 2))[None, :] * math.sqrt(2.0) * s[:, None] * np.exp(-0.5 * x ** 2) / math.sqrt(2 * math.pi)
        lb = st[:, None] * x - 0.5 * st[:, None] ** 2 + shift_b[:, None]
        ds = self.death_sign
        ld = ds * st[:, None] * x - 0.5 * abs(ds) * st[:, None] ** 2 + shift_d[:, None]
        return x, w, lb, ld, st


def _groups(plan: EnvironmentPlan, lb: np.ndarray, ld: np.ndarray) -> Groups:
    U, K = lb.shape
    start = np.repeat(plan.u_m, K)
    end = np.repeat(plan.u_n, K)
    e = plan.exact
    warm = plan.groups.warm if plan.groups is not None and plan.groups.n_groups == U * K else None

    def underflow(group: int, _end: int, prob: float):
        return e.underflow(e.end_group[e.pair_end[plan.u_first[group // K]]],
                           int(e.pair_end[plan.u_first[group // K]]), prob)

    return Groups(start=start, dt=np.repeat(plan.u_dt, K), lowest=np.minimum(start, end),
                  highest=np.maximum(start, end), end_ptr=np.arange(U * K + 1, dtype=np.int64), end_size=end,
                  end_weight=np.ones(U * K), underflow=underflow, birth_scale=np.exp(lb).ravel(),
                  death_scale=np.exp(ld).ravel(), warm=warm)


def evaluate_environment(plan: EnvironmentPlan, b: np.ndarray, d: np.ndarray, N: int, sigma: float,
                         beta_b: np.ndarray, beta_d: np.ndarray, tol: float, grad: bool,
                         n_nodes: int = DEFAULT_NODES) -> LikelihoodResult:
    """Log-likelihood of exact counts under environmental variation and covariates.

    Args:
        plan: the pairs and covariates (its window warm start is updated).
        b, d: checked base rates over 0..N.
        N: the cap.
        sigma: σ ≥ 0, the environment's standard deviation per time unit.
        beta_b, beta_d: covariate effects on log births and log deaths (lengths J, L).
        tol: wanted bound on the windows' share of |log L_true − log L| (the quadrature's
            own error is measured separately, :func:`quadrature_shift`).
        grad: compute the gradients.
        n_nodes: Gauss–Hermite nodes per pair.

    Returns:
        LikelihoodResult with d_birth, d_death, d_sigma, d_birth_effects, d_death_effects.

    Raises:
        RateError: σ negative or not finite, effects of the wrong length, births below the
            immigration rate (they cannot be scaled).
        CapTooSmallError, LikelihoodUnderflowError: as for exact counts.
    """
    e = plan.exact
    if not (math.isfinite(sigma) and sigma >= 0):
        raise RateError(f"the environment's standard deviation must be finite and >= 0, got {sigma!r}",
                        name="environment", value=float(sigma))
    beta_b = np.asarray(beta_b, dtype=float).reshape(-1)
    beta_d = np.asarray(beta_d, dtype=float).reshape(-1)
    if beta_b.size != plan.zb.shape[1] or beta_d.size != plan.zd.shape[1] or not (
            np.all(np.isfinite(beta_b)) and np.all(np.isfinite(beta_d))):
        raise RateError(f"covariate effects must be finite with {plan.zb.shape[1]} (births) and "
                        f"{plan.zd.shape[1]} (deaths) values", name="covariates")
    if e.max_count > N:
        raise cap_error(e.max_count, *e.max_where, N)
    zeros = np.zeros(N + 1)
    empty = LikelihoodResult(0.0, zeros.copy() if grad else None, zeros.copy() if grad else None, None, 0.0,
                             [np.zeros(0) for _ in range(e.n_sites)])
    if e.n_pairs == 0:
        return empty
    if not structurally_possible(b, d, e.m, e.n).all():
        empty.ll = -np.inf
        empty.pointwise = e.per_site(np.full(e.n_pairs, -np.inf))
        return empty
    x, w, lb, ld, st = plan.nodes(float(sigma), b, d, beta_b, beta_d, n_nodes)
    U, K = x.shape
    plan.groups = _groups(plan, lb, ld)
    sw = sweep_groups(plan.groups, b, d, N, tol / e.n_pairs, grad)
    # in log space: a node's P may be far below the smallest double
    with np.errstate(divide="ignore"):
        lwp = np.log(w) + sw.log_prob.reshape(U, K)
    top = lwp.max(axis=1, keepdims=True)
    log_l = np.log(np.exp(lwp - top).sum(axis=1)) + top[:, 0]
    share = np.exp(lwp - log_l[:, None])  # each node's part of the pair's average
    bound = np.sum(plan.u_mult * np.log1p((share * sw.rel_bound.reshape(U, K)).sum(axis=1)))
    logp_pair = log_l[plan.pair_unique]
    res = LikelihoodResult(float(logp_pair.sum()), None, None, None, float(bound), e.per_site(logp_pair),
                           sw.sweeps, sw.steps, sw.rounds)
    if not grad:
        return res
    coef = (plan.u_mult[:, None] * share).ravel()  # posterior weight of each node, × multiplicity
    sb, sd = np.exp(lb).ravel(), np.exp(ld).ravel()
    d_birth, d_death = np.zeros(N + 1), np.zeros(N + 1)
    dlb, dld = np.zeros(U * K), np.zeros(U * K)
    for g in range(U * K):
        lo = int(sw.lo[g])
        gb, gd = sw.grad_birth[g], sw.grad_death[g]
        hi = lo + gb.size
        base = b[lo:hi] - b[0]
        dlb[g] = float(gb @ base) * sb[g]
        dld[g] = float(gd @ d[lo:hi]) * sd[g]
        d_birth[lo:hi] += coef[g] * sb[g] * gb
        # λ'_0 = λ_0 and λ'_n = λ_0(1 − s) + λ_n s: the immigration enters every scaled birth rate
        d_birth[0] += coef[g] * (1.0 - sb[g]) * gb.sum()
        d_death[lo:hi] += coef[g] * sd[g] * gd
    cu = np.repeat(1.0 / np.sqrt(np.maximum(plan.u_dt, 1.0)), K)
    xs, stk = x.ravel(), np.repeat(st, K)
    ds = plan.death_sign
    res.d_birth, res.d_death = d_birth, d_death
    res.d_sigma = float(np.sum(coef * (dlb * cu * (xs - stk) + dld * cu * (ds * xs - abs(ds) * stk))))
    res.d_birth_effects = np.repeat(plan.u_zb, K, axis=0).T @ (coef * dlb)
    res.d_death_effects = np.repeat(plan.u_zd, K, axis=0).T @ (coef * dld)
    return res


def quadrature_shift(plan: EnvironmentPlan, b: np.ndarray, d: np.ndarray, N: int, sigma: float,
                     beta_b: np.ndarray, beta_d: np.ndarray, n_nodes: int = DEFAULT_NODES,
                     tol: float = 1e-10) -> float:
    """How much the log-likelihood moves when the quadrature rule is refined (2K+1 nodes).

    The measured quadrature error of :func:`evaluate_environment` at this point.

    Returns:
        |log L(2K+1 nodes) − log L(K nodes)|.

    Raises:
        As :func:`evaluate_environment`.
    """
    one = evaluate_environment(plan, b, d, N, sigma, beta_b, beta_d, tol, False, n_nodes).ll
    two = evaluate_environment(plan, b, d, N, sigma, beta_b, beta_d, tol, False, 2 * n_nodes + 1).ll
    return abs(two - one)
