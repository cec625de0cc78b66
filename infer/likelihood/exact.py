"""Exact counts: Π_sites Π_i P_{n_i, n_{i+1}}(t_{i+1} − t_i), each site given its first count.

A missing count (NaN) means the survey was not made: the transition spans the gap. The
pairs of consecutive surveyed counts are grouped by (interval, start count) once
(:class:`ExactPlan`); each evaluation computes the groups' transition probabilities with
chain.uniformization on a window of sizes around each group, widened until the probability
it leaves out is below the tolerance relative to the pair's probability, so the reported
``error_bound`` (a bound on |log L_true − log L|, rounding aside) stays below ``tol``.
Gradients are exact derivatives of the windowed value (the adjoint of the uniformization
steps).
"""
from __future__ import annotations

import numpy as np

from tallyfit.infer.errors import LikelihoodUnderflowError, ReplicateMismatchError

from .result import LikelihoodResult, cap_error
from .series import CountSeries
from .sweeps import Groups, sweep_groups

__all__ = ["ExactPlan", "structurally_possible", "evaluate_exact"]


class ExactPlan:
    """Pairs of consecutive surveyed counts grouped by (dt, start), built once per data set.

    Each group is one uniformization sweep from its start count over its interval, with
    the distinct end counts (and their multiplicities) it must give probabilities for.
    ``groups`` (the sweeps, :mod:`.sweeps`) keep what the last evaluation learned about the windows (see
    :func:`evaluate_exact`).

    Args:
        series: the checked series, one per site.

    Raises:
        ReplicateMismatchError: replicate counts at one time disagree (exact counts).
    """

    def __init__(self, series: list[CountSeries]) -> None:
        starts, ends, dts, sites, tend = [], [], [], [], []
        self.n_sites = len(series)
        self.max_count = -1
        self.max_where = (0, 0.0)
        for s, ser in enumerate(series):
            c = ser.counts
            present = ~np.isnan(c)
            has = present.any(axis=1)
            vals = np.where(present, c, np.nan)
            lo = np.nanmin(vals[has], axis=1) if has.any() else np.zeros(0)
            hi = np.nanmax(vals[has], axis=1) if has.any() else np.zeros(0)
            tt = ser.times[has]
            if np.any(lo != hi):
                i = int(np.flatnonzero(lo != hi)[0])
                raise ReplicateMismatchError(
                    f"site {s}: replicate counts at time {tt[i]:g} disagree ({lo[i]:g} vs {hi[i]:g}) "
                    f"but the counts are treated as exact", site=s, time=float(tt[i]),
                    hint="pass a detection probability (detection=...) to model counting error")
            cnt = lo.astype(np.int64)
            if cnt.size and cnt.max() > self.max_count:
                self.max_count = int(cnt.max())
                self.max_where = (s, float(tt[int(np.argmax(cnt))]))
            starts.append(cnt[:-1])
            ends.append(cnt[1:])
            dts.append(np.diff(tt))
            sites.append(np.full(max(cnt.size - 1, 0), s, dtype=np.int64))
            tend.append(tt[1:])
        self.m = np.concatenate(starts) if starts else np.zeros(0, np.int64)
        self.n = np.concatenate(ends) if ends else np.zeros(0, np.int64)
        self.dt = np.concatenate(dts) if dts else np.zeros(0)
        self.site = np.concatenate(sites) if sites else np.zeros(0, np.int64)
        self.tend = np.concatenate(tend) if tend else np.zeros(0)
        P = self.m.size
        self.n_pairs = P
        # unique (dt, m, n) -> ends with multiplicity; then groups (dt, m)
        if P:
            keys = np.stack([self.dt, self.m.astype(float), self.n.astype(float)], axis=1)
            uniq, inv, mult = np.unique(keys, axis=0, return_inverse=True, return_counts=True)
            inv = inv.ravel()
            # uniq is sorted by dt, then m, then n: groups are runs of equal (dt, m)
            new_group = np.ones(uniq.shape[0], dtype=bool)
            new_group[1:] = (uniq[1:, 0] != uniq[:-1, 0]) | (uniq[1:, 1] != uniq[:-1, 1])
            gidx = np.cumsum(new_group) - 1
            G = int(gidx[-1]) + 1
            self.end_size = uniq[:, 2].astype(np.int64)
            self.end_mult = mult.astype(np.float64)
            self.end_group = gidx
            self.pair_end = inv
            self.end_ptr = np.zeros(G + 1, dtype=np.int64)
            np.cumsum(np.bincount(gidx, minlength=G), out=self.end_ptr[1:])
            first = self.end_ptr[:-1]
            self.g_dt = uniq[first, 0].copy()
            self.g_start = uniq[first, 1].astype(np.int64)
            self.g_min = np.minimum(self.g_start, np.minimum.reduceat(self.end_size, first))
            self.g_max = np.maximum(self.g_start, np.maximum.reduceat(self.end_size, first))
        else:
            G = 0
            self.end_size = np.zeros(0, np.int64)
            self.end_mult = np.zeros(0)
            self.end_group = np.zeros(0, np.int64)
            self.pair_end = np.zeros(0, np.int64)
            self.end_ptr = np.zeros(1, np.int64)
            self.g_dt = np.zeros(0)
            self.g_start = np.zeros(0, np.int64)
            self.g_min = np.zeros(0, np.int64)
            self.g_max = np.zeros(0, np.int64)
        self.n_groups = G
        self.site_ptr = np.searchsorted(self.site, np.arange(self.n_sites + 1))
        self.groups = Groups(start=self.g_start, dt=self.g_dt, lowest=self.g_min, highest=self.g_max,
                             end_ptr=self.end_ptr, end_size=self.end_size, end_weight=self.end_mult,
                             underflow=self.underflow)

    def per_site(self, values: np.ndarray) -> list[np.ndarray]:
        """Split one value per pair into one array per site."""
        return [values[self.site_ptr[s]:self.site_ptr[s + 1]] for s in range(self.n_sites)]

    def underflow(self, group: int, end: int, prob: float) -> LikelihoodUnderflowError:
        """The error for an end whose probability cannot be bounded (names site, counts and time)."""
        pair = int(np.flatnonzero(self.pair_end == end)[0])
        return LikelihoodUnderflowError(
            f"site {int(self.site[pair])}: the transition {int(self.m[pair])} -> {int(self.n[pair])} over "
            f"dt = {self.g_dt[group]:g} ending at time {self.tend[pair]:g} has probability {prob:.3g}, too small "
            "for double precision to bound within the tolerance even on the whole range of sizes",
            site=int(self.site[pair]), time=float(self.tend[pair]), start=int(self.m[pair]), end=int(self.n[pair]))


def structurally_possible(b: np.ndarray, d: np.ndarray, m: np.ndarray, n: np.ndarray) -> np.ndarray:
    """Which transitions m -> n are possible at all (P_{mn}(t) > 0 for t > 0, exact arithmetic).

    A transition is possible when the monotone path between the counts has rates: λ_k > 0
    for k in m..n−1 upward, μ_k > 0 for k in n+1..m downward.

    Args:
        b, d: birth and death rates over sizes 0..N.
        m, n: start and end counts (int arrays of one length, within 0..N).

    Returns:
        Boolean array, True where the transition is possible.

    Raises:
        Nothing for counts within 0..N.
    """
    N = b.size - 1
    zb = np.zeros(N + 2, dtype=np.int64)
    np.cumsum(b[:N] == 0.0, out=zb[1:N + 1])
    zb[N + 1] = zb[N]
    zd = np.zeros(N + 2, dtype=np.int64)
    np.cumsum(d == 0.0, out=zd[1:])
    up = n > m
    ok = np.ones(m.size, dtype=bool)
    ok[up] = (zb[n[up]] - zb[m[up]]) == 0          # λ_k > 0 for k in m..n-1
    dn = n < m
    ok[dn] = (zd[m[dn] + 1] - zd[n[dn] + 1]) == 0  # μ_k > 0 for k in n+1..m
    return ok


def evaluate_exact(plan: ExactPlan, b: np.ndarray, d: np.ndarray, N: int, tol: float,
                   grad: bool) -> LikelihoodResult:
    """Log-likelihood of exact counts at these rates, windows widened until within tol.

    Args:
        plan: the data's pair grouping (its groups' warm-start information is updated).
        b, d: checked birth and death rates over sizes 0..N.
        N: the cap.
        tol: wanted bound on |log L_true − log L| (shared out evenly over the pairs).
        grad: compute d_birth and d_death.

    Returns:
        LikelihoodResult (d_detection None); −inf with zero gradients when a transition is
        impossible in exact arithmetic.

    Raises:
        CapTooSmallError: a count exceeds N.
        LikelihoodUnderflowError: a possible transition's probability cannot be bounded
            within tol even on the whole range 0..N, or the widening did not converge.
        RateError: a sweep would exceed the cost limits of :func:`.sweeps.check_cost`.
    """
    if plan.max_count > N:
        s, t = plan.max_where
        raise cap_error(plan.max_count, s, t, N)
    zeros = np.zeros(N + 1)
    if plan.n_groups == 0:
        return LikelihoodResult(0.0, zeros.copy() if grad else None, zeros.copy() if grad else None,
                                None, 0.0, [np.zeros(0) for _ in range(plan.n_sites)])
    if not structurally_possible(b, d, plan.m, plan.n).all():
        logp_pair = np.full(plan.n_pairs, -np.inf)
        return LikelihoodResult(-np.inf, zeros.copy() if grad else None, zeros.copy() if grad else None, None,
                                0.0, plan.per_site(logp_pair))
    sw = sweep_groups(plan.groups, b, d, N, tol / plan.n_pairs, grad)  # Σ_pairs (leak + drop)/P ≤ tol
    logp_pair = sw.log_prob[plan.pair_end]  # finite however small: log-space sweeps where needed
    bound_pair = sw.rel_bound[plan.pair_end]
    d_birth = d_death = None
    if grad:
        idx = np.concatenate([np.arange(lo, lo + g.size) for lo, g in zip(sw.lo, sw.grad_birth)])
        d_birth = np.bincount(idx, weights=np.concatenate(sw.grad_birth), minlength=N + 1)
        d_death = np.bincount(idx, weights=np.concatenate(sw.grad_death), minlength=N + 1)
    return LikelihoodResult(float(logp_pair.sum()), d_birth, d_death, None, float(np.sum(np.log1p(bound_pair))),
                            plan.per_site(logp_pair), sw.sweeps, sw.steps, sw.rounds)
