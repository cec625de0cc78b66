"""Log-likelihood of head counts under a birth–death chain, with gradients, for NUTS.

Exact counts: Π_sites Π_i P_{n_i, n_{i+1}}(t_{i+1} − t_i), each site conditioned on its
first count. A missing count (NaN) means the survey was not made: the transition spans
the gap. Transition probabilities come from chain.uniformization on a window of sizes
around each pair; the window is widened until the probability it leaves out is below
the tolerance relative to the pair's probability, so the reported ``error_bound``
(a bound on |log L_true − log L|, rounding aside) stays below ``tol``.

With a detection model the true size is hidden and each replicate count is
Binomial(N_true, p). The forward algorithm runs in scaled (log) form over the plausible
hidden sizes at each occasion; the first hidden size has a uniform prior over 0..N
(so the likelihood is that of the later counts given the first occasion's counts).
Sizes left out (above a binomial bound) and probability leaving the transition windows
are bounded and included in ``error_bound``.

Gradients are exact derivatives of the computed (windowed) value, by the adjoint of the
uniformization steps (chain.uniformization).
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from scipy.special import gammaln, logsumexp

from tallyfit.chain.uniformization import hidden_forward_backward, pair_log_likelihood_grad

from .errors import (CapTooSmallError, CountValueError, InvalidRatesError,
                     LikelihoodUnderflowError, ReplicateMismatchError)

__all__ = [
    "LikelihoodResult",
    "PreparedCounts",
    "CountSeries",
    "as_series",
    "evaluate_likelihood",
    "log_likelihood",
    "log_likelihood_grad",
    "pointwise_log_likelihood",
    "CountLikelihoodOp",
    "CountLikelihoodGradOp",
]

#: Poisson tails never asked below this (weights below it underflow anyway).
_TAIL_FLOOR = 1e-300
#: Most rounds of widening before giving up.
_MAX_ROUNDS = 40


# --------------------------------------------------------------------------------------
# data
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class CountSeries:
    """One site's survey times and counts as the likelihood uses them.

    Attributes:
        times: 1-D float array, strictly increasing.
        counts: 2-D float array (n_times, n_replicates); NaN = survey not made.
    """

    times: np.ndarray
    counts: np.ndarray


def _one_series(times: Any, counts: Any, site: int) -> CountSeries:
    t = np.asarray(times, dtype=np.float64)
    c = np.asarray(counts, dtype=np.float64)
    if t.ndim != 1:
        raise CountValueError(f"site {site}: times must be 1-D, got shape {t.shape}", site=site)
    if c.ndim == 1:
        c = c[:, None]
    if c.ndim != 2 or c.shape[0] != t.size:
        raise CountValueError(f"site {site}: counts must have shape (n_times,) or (n_times, "
                              f"n_replicates) with n_times = {t.size}, got {c.shape}", site=site)
    if not np.all(np.isfinite(t)):
        i = int(np.flatnonzero(~np.isfinite(t))[0])
        raise CountValueError(f"site {site}: time #{i} is {t[i]!r}; times must be finite",
                              site=site)
    if t.size > 1 and not np.all(np.diff(t) > 0):
        i = int(np.flatnonzero(~(np.diff(t) > 0))[0])
        raise CountValueError(f"site {site}: times must be strictly increasing, but time #{i + 1} "
                              f"({t[i + 1]!r}) follows {t[i]!r}", site=site, time=float(t[i + 1]),
                              hint="sort the rows by time and put replicate surveys in columns")
    present = ~np.isnan(c)
    vals = c[present]
    bad = ~np.isfinite(vals) | (vals < 0) | (vals != np.round(vals))
    if np.any(bad):
        idx = np.argwhere(present)[np.flatnonzero(bad)[0]]
        v = c[idx[0], idx[1]]
        raise CountValueError(f"site {site}: count {v!r} at time {t[idx[0]]!r} is not a whole "
                              f"number ≥ 0", site=site, time=float(t[idx[0]]))
    return CountSeries(times=t, counts=c)


def as_series(times: Any, counts: Any = None) -> list[CountSeries]:
    """Normalise the accepted data forms to a list of CountSeries.

    Accepted: (1-D times, 1-D or 2-D counts) for one site; (list of times arrays, list of
    counts arrays) for several; or ``times`` = an object with ``.series`` (each item with
    ``.times`` and ``.counts``, or a (times, counts) pair) and ``counts`` = None; or a list
    of (times, counts) pairs with ``counts`` = None.

    Args:
        times: see above.
        counts: see above.

    Returns:
        One CountSeries per site.

    Raises:
        CountValueError: shapes that do not match, unsorted or non-finite times, counts
            that are negative or not whole numbers.
    """
    items: list[tuple[Any, Any]]
    if counts is None:
        src = times.series if hasattr(times, "series") else times
        items = []
        try:
            for it in src:
                if hasattr(it, "times") and hasattr(it, "counts"):
                    items.append((it.times, it.counts))
                else:
                    tt, cc = it
                    items.append((tt, cc))
        except (TypeError, ValueError) as exc:
            raise CountValueError("with counts=None, pass a data object with .series or a list "
                                  "of (times, counts) pairs") from exc
    elif (isinstance(times, (list, tuple)) and len(times) > 0 and np.ndim(times[0]) >= 1):
        if not isinstance(counts, (list, tuple)) or len(counts) != len(times):
            raise CountValueError("several sites: give a list of counts arrays as long as the "
                                  "list of times arrays")
        items = list(zip(times, counts))
    else:
        items = [(times, counts)]
    if not items:
        raise CountValueError("no series given")
    return [_one_series(t, c, s) for s, (t, c) in enumerate(items)]


def _check_rates(birth: Any, death: Any) -> tuple[np.ndarray, np.ndarray, int]:
    b = np.ascontiguousarray(birth, dtype=np.float64)
    d = np.ascontiguousarray(death, dtype=np.float64)
    if b.ndim != 1 or d.ndim != 1 or b.shape != d.shape or b.size < 2:
        raise InvalidRatesError(f"birth and death must be 1-D arrays over sizes 0..N of the same "
                                f"length ≥ 2, got shapes {b.shape} and {d.shape}", name="birth")
    for name, arr in (("birth", b), ("death", d)):
        ok = np.isfinite(arr) & (arr >= 0)
        if not ok.all():
            n = int(np.flatnonzero(~ok)[0])
            raise InvalidRatesError(f"{name} rate at size {n} is {arr[n]!r}; rates must be finite "
                                    f"and ≥ 0", name=name, size=n, value=float(arr[n]))
    if d[0] != 0.0:
        raise InvalidRatesError(f"death rate at size 0 must be 0, got {d[0]!r}", name="death",
                                size=0, value=float(d[0]))
    return b, d, b.size - 1


def _check_detection(p: Any) -> float:
    pv = float(p)
    if not (0.0 < pv < 1.0):
        raise InvalidRatesError(f"detection probability must be in (0, 1), got {p!r} (for exact "
                                f"counts pass detection=None)", name="detection", value=pv)
    return pv


def _cap_error(count: int, site: int, time: float, N: int) -> CapTooSmallError:
    return CapTooSmallError(
        f"count {count} at site {site}, time {time:g} exceeds the size cap N = {N} "
        f"(the rate arrays cover sizes 0..{N})",
        hint=f"rebuild the rates with a larger maximum size, e.g. at least {max(2 * count, count + 50)}")


# --------------------------------------------------------------------------------------
# results
# --------------------------------------------------------------------------------------
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


# --------------------------------------------------------------------------------------
# exact counts
# --------------------------------------------------------------------------------------
class _ExactPlan:
    """Pairs of consecutive surveyed counts grouped by (dt, start)."""

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
        self.warm: dict | None = None  # per-group spreads learned from the last evaluation


def _structurally_possible(b: np.ndarray, d: np.ndarray, m: np.ndarray, n: np.ndarray) -> np.ndarray:
    """True where P_{mn}(t) > 0 for t > 0 in exact arithmetic (the monotone path has rates)."""
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


def _eval_exact(plan: _ExactPlan, b: np.ndarray, d: np.ndarray, N: int, tol: float,
                grad: bool) -> LikelihoodResult:
    if plan.max_count > N:
        s, t = plan.max_where
        raise _cap_error(plan.max_count, s, t, N)
    G = plan.n_groups
    zeros = np.zeros(N + 1)
    if G == 0:
        return LikelihoodResult(0.0, zeros.copy() if grad else None, zeros.copy() if grad else None,
                                None, 0.0, [np.zeros(0) for _ in range(plan.n_sites)])
    possible = _structurally_possible(b, d, plan.m, plan.n)
    if not possible.all():
        # an impossible transition: −inf (pointwise still computed for the rest is not needed)
        logp_pair = np.full(plan.n_pairs, -np.inf)
        pw = [logp_pair[plan.site_ptr[s]:plan.site_ptr[s + 1]] for s in range(plan.n_sites)]
        return LikelihoodResult(-np.inf, zeros.copy() if grad else None,
                                zeros.copy() if grad else None, None, 0.0, pw)
    total_mult = float(plan.n_pairs)
    tol_pair = tol / total_mult  # Σ_pairs (leak + drop)/P ≤ tol
    # initial windows: per side, ~z standard deviations of the path beyond the pair's range,
    # or (warm start) the margin that the last evaluation's measured leak says is enough
    tot = b + d
    tot[N] = d[N]
    z = math.sqrt(2.0 * math.log(4.0 / (tol_pair * 1e-3)))
    mlo = (np.ceil(z * np.sqrt(np.maximum(tot[plan.g_min], 1.0) * plan.g_dt)) + 6).astype(np.int64)
    mhi = (np.ceil(z * np.sqrt(np.maximum(tot[plan.g_max], 1.0) * plan.g_dt)) + 6).astype(np.int64)
    tail = np.full(G, max(tol_pair * 1e-4, _TAIL_FLOOR))
    warm = plan.warm
    if warm is not None and warm["sig_lo"].size == G:
        zt = np.sqrt(2.0 * np.log(1.0 / (0.4 * tol_pair * warm["pmin"])))
        for m_, sig, last in ((mlo, warm["sig_lo"], warm["m_lo"]),
                              (mhi, warm["sig_hi"], warm["m_hi"])):
            known = np.isfinite(sig)
            # Gaussian-tail model of leak vs margin, shrinking at most 10% per evaluation
            model = np.ceil(1.1 * sig[known] * zt[known]) + 2
            keep = np.where(warm["failed"][known], 1.0, 0.9)
            m_[known] = np.maximum(model, np.ceil(keep * last[known])).astype(np.int64)
            unknown = ~known & np.isfinite(last)
            m_[unknown] = np.ceil(last[unknown]).astype(np.int64)  # clipped or underflowed
        tail = np.maximum(np.minimum(tail, 0.05 * tol_pair * warm["pmin"]), _TAIL_FLOOR)
    lo = np.maximum(plan.g_min - mlo, 0)
    hi = np.minimum(plan.g_max + mhi, N)
    prob = np.zeros(plan.end_size.size)
    leak = np.zeros(G)
    leak_lo = np.zeros(G)
    leak_hi = np.zeros(G)
    drop = np.zeros(G)
    pmin_all = np.zeros(G)
    failed = np.zeros(G, dtype=bool)
    gb_flat: list = []
    pending = np.arange(G)
    sweeps = 0
    steps = 0
    rounds = 0
    ends_owner = plan.end_group
    while pending.size:
        rounds += 1
        if rounds > _MAX_ROUNDS:
            raise LikelihoodUnderflowError("window widening did not converge")
        # CSR for the pending groups
        if pending.size < G:
            cnt = plan.end_ptr[pending + 1] - plan.end_ptr[pending]
            eptr = np.zeros(pending.size + 1, dtype=np.int64)
            np.cumsum(cnt, out=eptr[1:])
            eidx = np.concatenate([np.arange(plan.end_ptr[g], plan.end_ptr[g + 1]) for g in pending])
        else:
            eptr = plan.end_ptr
            eidx = np.arange(plan.end_size.size)
        r = pair_log_likelihood_grad(b, d, plan.g_start[pending], plan.g_dt[pending], lo[pending],
                                     hi[pending], tail[pending], eptr, plan.end_size[eidx],
                                     plan.end_mult[eidx], grad=grad)
        sweeps += pending.size
        steps += int(r.steps.sum())
        prob[eidx] = r.prob
        leak[pending] = r.leaked
        leak_lo[pending] = r.leaked_low
        leak_hi[pending] = r.leaked_high
        drop[pending] = r.dropped
        # per group: smallest probability among its ends
        pmin = np.minimum.reduceat(r.prob, eptr[:-1]) if r.prob.size else np.zeros(0)
        pmin_all[pending] = pmin
        need = tol_pair * pmin
        ok = (r.leaked + r.dropped) <= need
        if grad and ok.any():
            gb_flat.append((pending[np.flatnonzero(ok)], np.flatnonzero(ok), r))
        bad = np.flatnonzero(~ok)
        if not bad.size:
            break
        gbad = pending[bad]
        failed[gbad] = True
        nb = need[bad]
        zero = pmin[bad] <= 0.0
        clip_lo = lo[gbad] == 0
        clip_hi = hi[gbad] == N
        at_floor = tail[gbad] <= _TAIL_FLOOR
        lo_bad = (r.leaked_low[bad] > 0.45 * nb) & ~clip_lo
        hi_bad = (r.leaked_high[bad] > 0.45 * nb) & ~clip_hi
        tail_bad = (r.dropped[bad] > 0.1 * nb) | zero
        stuck = ~lo_bad & ~hi_bad & (~tail_bad | at_floor)
        if np.any(stuck):
            k = int(np.flatnonzero(stuck)[0])
            g = int(gbad[k])
            e = plan.end_ptr[g] + int(np.argmin(prob[plan.end_ptr[g]:plan.end_ptr[g + 1]]))
            pair = int(np.flatnonzero(plan.pair_end == e)[0])
            raise LikelihoodUnderflowError(
                f"site {int(plan.site[pair])}: the transition {int(plan.m[pair])} -> "
                f"{int(plan.n[pair])} over dt = {plan.g_dt[g]:g} ending at time "
                f"{plan.tend[pair]:g} has probability {prob[e]:.3g}, too small for double "
                f"precision to bound within tol = {tol:g} even on the whole range 0..{N}",
                site=int(plan.site[pair]), time=float(plan.tend[pair]),
                start=int(plan.m[pair]), end=int(plan.n[pair]))
        # smaller Poisson tail where the cut mass is the problem (or P vanished by the cut)
        newtail = np.where(zero, _TAIL_FLOOR, np.maximum(0.05 * nb, _TAIL_FLOOR))
        tail[gbad] = np.where(tail_bad, np.minimum(tail[gbad], newtail), tail[gbad])
        # wider windows on the side that leaks: Gaussian-tail extrapolation of the leak
        with np.errstate(divide="ignore", invalid="ignore"):
            zt = np.sqrt(2.0 * np.log(1.0 / (0.4 * np.maximum(nb, 1e-300))))
            for side_bad, m_, lk in ((lo_bad, mlo, r.leaked_low[bad]),
                                     (hi_bad, mhi, r.leaked_high[bad])):
                cur = m_[gbad]
                sig = cur / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.5)))
                want = np.ceil(1.15 * sig * zt) + 3
                grown = np.where(lk < 0.1, np.maximum(want, np.ceil(1.25 * cur)), 2 * cur)
                m_[gbad] = np.where(side_bad, grown, cur).astype(np.int64)
        lo[gbad] = np.maximum(plan.g_min[gbad] - mlo[gbad], 0)
        hi[gbad] = np.minimum(plan.g_max[gbad] + mhi[gbad], N)
        pending = gbad
    # learn, per side, the spread that the measured leaks imply (for the next evaluation)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigs = []
        for m_, lk, clip in ((mlo, leak_lo, lo == 0), (mhi, leak_hi, hi == N)):
            sg = m_ / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.1)))
            sg[clip | (pmin_all <= 0) | (lk < 1e-250)] = np.nan
            sigs.append(sg)
    plan.warm = {"sig_lo": sigs[0], "sig_hi": sigs[1], "m_lo": mlo.astype(float),
                 "m_hi": mhi.astype(float), "failed": failed, "pmin": np.maximum(pmin_all, 1e-300)}
    P = prob[plan.pair_end]
    logp_pair = np.log(P)
    ll = float(logp_pair.sum())
    bound_pair = (leak + drop)[ends_owner[plan.pair_end]] / P
    error_bound = float(np.sum(np.log1p(bound_pair)))
    pw = [logp_pair[plan.site_ptr[s]:plan.site_ptr[s + 1]] for s in range(plan.n_sites)]
    d_birth = d_death = None
    if grad:
        idx_parts, gb_parts, gd_parts = [], [], []
        for groups, sel, r in gb_flat:  # type: ignore[misc]
            off = r.grad_offsets
            for g, k in zip(groups, sel):
                a, z_ = off[k], off[k + 1]
                idx_parts.append(np.arange(lo[g], lo[g] + (z_ - a)))
                gb_parts.append(r.grad_birth[a:z_])
                gd_parts.append(r.grad_death[a:z_])
        idx = np.concatenate(idx_parts)
        d_birth = np.bincount(idx, weights=np.concatenate(gb_parts), minlength=N + 1)
        d_death = np.bincount(idx, weights=np.concatenate(gd_parts), minlength=N + 1)
    return LikelihoodResult(ll, d_birth, d_death, None, error_bound, pw, sweeps, steps, rounds)


# --------------------------------------------------------------------------------------
# detection model
# --------------------------------------------------------------------------------------
class _DetectionPlan:
    """Surveyed occasions per site with their replicate counts."""

    def __init__(self, series: list[CountSeries]) -> None:
        self.n_sites = len(series)
        occ_counts: list[np.ndarray] = []
        ptr = [0]
        dts: list[float] = []
        tocc: list[float] = []
        site_of: list[int] = []
        for s, ser in enumerate(series):
            present = ~np.isnan(ser.counts)
            has = np.flatnonzero(present.any(axis=1))
            if has.size == 0:
                raise CountValueError(f"site {s} has no counts at all", site=s)
            prev = None
            for i in has:
                occ_counts.append(ser.counts[i][present[i]])
                t = float(ser.times[i])
                dts.append(0.0 if prev is None else t - prev)
                tocc.append(t)
                site_of.append(s)
                prev = t
            ptr.append(ptr[-1] + has.size)
        self.occ_ptr = np.array(ptr, dtype=np.int64)
        self.n_occ = len(occ_counts)
        self.ymax = np.array([int(c.max()) for c in occ_counts], dtype=np.int64)
        self.S = np.array([float(c.sum()) for c in occ_counts])
        self.R = np.array([float(c.size) for c in occ_counts])
        self.y = occ_counts
        self.dt = np.array(dts)
        self.time = np.array(tocc)
        self.site = np.array(site_of, dtype=np.int64)
        self.first = np.zeros(self.n_occ, dtype=bool)
        self.first[self.occ_ptr[:-1]] = True
        # occasions still to come (including this one) within each site
        self.remaining = np.empty(self.n_occ)
        for s in range(self.n_sites):
            a, z = self.occ_ptr[s], self.occ_ptr[s + 1]
            self.remaining[a:z] = np.arange(z - a, 0, -1)
        self._lc_cache: dict[int, np.ndarray] = {}
        self.warm_slack: np.ndarray | None = None
        self.warm: dict | None = None

    def log_choose(self, N: int) -> np.ndarray:
        """Σ_r log C(n, y_r) for n in 0..N per occasion (−inf for n < max_r y_r)."""
        lc = self._lc_cache.get(N)
        if lc is None:
            n = np.arange(N + 1, dtype=float)
            lc = np.full((self.n_occ, N + 1), -np.inf)
            gn = gammaln(n + 1.0)
            for i, yy in enumerate(self.y):
                ym = int(self.ymax[i])
                if ym > N:
                    continue
                nn = n[ym:]
                acc = np.zeros(nn.size)
                for y in yy:
                    acc += gn[ym:] - gammaln(y + 1.0) - gammaln(nn - y + 1.0)
                lc[i, ym:] = acc
            self._lc_cache = {N: lc}
            self._lc_cache[N] = lc
        return lc


def _reachable_any(b: np.ndarray, d: np.ndarray, sets: list[np.ndarray]) -> bool:
    """Whether some hidden path through the allowed boolean sets exists (exact arithmetic)."""
    cur = sets[0].copy()
    N = b.size - 1
    for nxt in sets[1:]:
        up = cur.copy()
        for n in range(1, N + 1):
            up[n] = up[n] or (up[n - 1] and b[n - 1] > 0)
        dn = cur.copy()
        for n in range(N - 1, -1, -1):
            dn[n] = dn[n] or (dn[n + 1] and d[n + 1] > 0)
        cur = (up | dn) & nxt
        if not cur.any():
            return False
    return True


def _eval_detection(plan: _DetectionPlan, b: np.ndarray, d: np.ndarray, N: int, p: float,
                    tol: float, grad: bool) -> LikelihoodResult:
    if plan.ymax.max() > N:
        i = int(np.argmax(plan.ymax))
        raise _cap_error(int(plan.ymax[i]), int(plan.site[i]), float(plan.time[i]), N)
    I = plan.n_occ
    n = np.arange(N + 1, dtype=float)
    lp, l1p = math.log(p), math.log1p(-p)
    lc = plan.log_choose(N)
    logobs = lc + (plan.S * lp)[:, None] + (plan.R[:, None] * n[None, :] - plan.S[:, None]) * l1p
    mx = logobs.max(axis=1)
    mode = logobs.argmax(axis=1)
    first = plan.first
    fidx = np.flatnonzero(first)
    logZ0 = logsumexp(logobs[fidx], axis=1)  # uniform prior over 0..N, given the first counts
    n_terms = 2 * I
    log_target = math.log(tol / n_terms)
    tot = b + d
    tot[N] = d[N]
    # slack = −Σ_{j ≥ i} log c_j (scaled normalisers) bounds how much a left-out path can
    # gain relative to the kept likelihood; guessed first, then measured
    if plan.warm_slack is not None and plan.warm_slack.size == I:
        slack = plan.warm_slack.copy()
    else:
        slack = 1.5 * plan.remaining + 3.0
    prev = np.arange(I) - 1
    prev[first] = np.arange(I)[first]
    dt = np.where(first, 1.0, plan.dt)
    # the posterior bulk sits near the emission modes; margins are measured from there
    bulk_lo = np.minimum(mode, mode[prev])
    bulk_hi = np.maximum(mode, mode[prev])
    sd_lo = np.sqrt(np.maximum(tot[bulk_lo], 1.0) * dt)
    sd_hi = np.sqrt(np.maximum(tot[bulk_hi], 1.0) * dt)
    z0 = np.sqrt(2.0 * np.maximum(-(log_target - slack) + math.log(2.5), 1.0))
    m_lo = (np.ceil(z0 * sd_lo) + 6).astype(np.int64)
    m_hi = (np.ceil(z0 * sd_hi) + 6).astype(np.int64)
    warm = plan.warm
    if warm is not None and warm["sig_lo"].size == I:
        for m_, sig, last in ((m_lo, warm["sig_lo"], warm["m_lo"]),
                              (m_hi, warm["sig_hi"], warm["m_hi"])):
            known = np.isfinite(sig)
            # Gaussian-tail model of leak vs margin, shrinking at most 10% per evaluation
            model = np.ceil(1.1 * sig[known] * z0[known]) + 2
            keep = np.where(warm["failed"][known], 1.0, 0.9)
            m_[known] = np.maximum(model, np.ceil(keep * last[known])).astype(np.int64)
            unknown = ~known & np.isfinite(last)
            m_[unknown] = np.ceil(last[unknown]).astype(np.int64)  # clipped or underflowed
    tailfix = np.full(I, np.inf)
    failed = np.zeros(I, dtype=bool)
    rounds = 0
    sweeps = 0
    steps = 0
    force_full = False
    while True:
        rounds += 1
        if rounds > _MAX_ROUNDS:
            raise LikelihoodUnderflowError("widening of the hidden sizes did not converge")
        thr = log_target - slack  # relative log level below which hidden sizes are left out
        # upper plausible size: first n above the mode with logobs − max ≤ thr, minus one
        rel = logobs - mx[:, None]
        beyond = (n[None, :] > mode[:, None]) & (rel <= thr[:, None])
        has = beyond.any(axis=1)
        U = np.where(has, beyond.argmax(axis=1) - 1, N)
        if force_full:
            U[:] = N
        alo = plan.ymax.copy()
        ahi = np.maximum(U, alo)
        wptr = np.zeros(I + 1, dtype=np.int64)
        np.cumsum(ahi - alo + 1, out=wptr[1:])
        lw_parts = []
        for i in range(I):
            row = logobs[i, alo[i]:ahi[i] + 1]
            if first[i]:
                row = row - logZ0[np.searchsorted(fidx, i)]
            lw_parts.append(row)
        logw = np.concatenate(lw_parts)
        # windows for the interval ending at each occasion: contain both allowed ranges
        # and reach the margins beyond the bulk
        rlo = np.minimum(alo, alo[prev])
        rhi = np.maximum(ahi, ahi[prev])
        wlo = np.maximum(np.minimum(rlo, bulk_lo - m_lo), 0)
        whi = np.minimum(np.maximum(rhi, bulk_hi + m_hi), N)
        if force_full:
            wlo[:] = 0
            whi[:] = N
        tails = np.maximum(np.minimum(np.exp(thr) * 0.1, tailfix), _TAIL_FLOOR)
        dt_in = np.where(first, 1.0, plan.dt)
        r = hidden_forward_backward(b, d, plan.occ_ptr, alo, ahi, wptr, logw, wlo, whi, dt_in,
                                    tails, grad=grad)
        sweeps += int((~first).sum()) * (3 if grad else 2)
        steps += int(r.steps.sum())
        logc = r.log_norm
        if not np.all(np.isfinite(logc)):
            # dead: impossible in exact arithmetic, or lost to truncation / underflow
            s = int(plan.site[np.flatnonzero(~np.isfinite(logc))[0]])
            a, zz = plan.occ_ptr[s], plan.occ_ptr[s + 1]
            sets = [np.isfinite(logobs[i]) for i in range(a, zz)]
            if not _reachable_any(b, d, sets):
                zeros = np.zeros(N + 1)
                pw = [np.full(max(int(plan.occ_ptr[k + 1] - plan.occ_ptr[k]) - 1, 0), -np.inf)
                      for k in range(plan.n_sites)]
                return LikelihoodResult(-np.inf, zeros if grad else None,
                                        zeros.copy() if grad else None, 0.0 if grad else None,
                                        0.0, pw, sweeps, steps, rounds)
            if not force_full:
                force_full = True
                tailfix[:] = _TAIL_FLOOR
                continue
            raise LikelihoodUnderflowError(
                f"site {s}: the hidden-size likelihood underflows even on the whole range 0..{N}",
                site=s)
        # scaled normalisers: occasion 0 keeps its prior mass, later ones relative to max obs
        lcs = np.where(first, logc, logc - mx)
        lcs = np.minimum(lcs, 0.0)
        suf = np.empty(I)
        for s in range(plan.n_sites):
            a, zz = plan.occ_ptr[s], plan.occ_ptr[s + 1]
            suf[a:zz] = np.cumsum(lcs[a:zz][::-1])[::-1]
        measured = -suf
        # left-out hidden sizes
        with np.errstate(divide="ignore"):
            nxt_rel = np.where(ahi < N, rel[np.arange(I), np.minimum(ahi + 1, N)], -np.inf)
            rho_hid = nxt_rel - suf
            for k, i in enumerate(fidx):
                if ahi[i] < N:
                    ld = logsumexp(logobs[i, ahi[i] + 1:]) - logZ0[k]
                else:
                    ld = -np.inf
                rho_hid[i] = ld - suf[i]
            ll_leak = np.log(r.leaked + r.dropped)
        rho_leak = np.where(first, -np.inf, ll_leak - suf)
        bad_hid = rho_hid > log_target
        bad_leak = rho_leak > log_target
        if not (bad_hid.any() or bad_leak.any()):
            break
        if force_full and not bad_hid.any() and np.all(r.dropped[bad_leak] * 0 + tails[bad_leak]
                                                        <= _TAIL_FLOOR):
            raise LikelihoodUnderflowError(
                f"the hidden-size likelihood is too small to bound within tol = {tol:g} even on "
                f"the whole range 0..{N}", site=int(plan.site[np.flatnonzero(bad_leak)[0]]))
        failed |= bad_leak
        # measured slack (plus a little) where the guess was short
        slack = np.where(bad_hid | bad_leak, np.maximum(slack, measured + 3.0), slack)
        slack = np.maximum(slack, measured + 1.0)
        allowed = np.exp(log_target + suf)
        # smaller tails where the cut Poisson mass is the problem
        drop_bad = bad_leak & (r.dropped > 0.1 * allowed)
        tailfix = np.where(drop_bad, np.maximum(0.05 * allowed, _TAIL_FLOOR), tailfix)
        # wider windows on the side that leaks (Gaussian-tail extrapolation)
        with np.errstate(divide="ignore", invalid="ignore"):
            zt = np.sqrt(2.0 * np.log(1.0 / (0.4 * np.maximum(allowed, 1e-300))))
            for m_, lk, eff, clip in ((m_lo, r.leaked_low, bulk_lo - wlo, wlo == 0),
                                      (m_hi, r.leaked_high, whi - bulk_hi, whi == N)):
                side_bad = bad_leak & (lk > 0.45 * allowed) & ~clip
                sig = eff / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.5)))
                want = np.ceil(1.15 * sig * zt) + 3
                grown = np.where(lk < 0.1, np.maximum(want, np.ceil(1.25 * eff)), 2 * eff)
                m_[:] = np.where(side_bad, np.maximum(grown, m_), m_).astype(np.int64)
        full = (wlo == 0) & (whi == N)
        if np.any(bad_leak & full & ~drop_bad) and not force_full:
            force_full = True
    # learn what the measured leaks say about the spread beyond the bulk, and the slack
    with np.errstate(divide="ignore", invalid="ignore"):
        sigs = []
        for lk, eff, clip in ((r.leaked_low, bulk_lo - wlo, wlo == 0),
                              (r.leaked_high, whi - bulk_hi, whi == N)):
            sg = eff / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.1)))
            sg[clip | first | (eff <= 0) | (lk < 1e-250)] = np.nan
            sigs.append(sg)
    m_last = [np.where(first, np.nan, np.maximum(e, 1).astype(float))
              for e in (bulk_lo - wlo, whi - bulk_hi)]
    plan.warm = {"sig_lo": sigs[0], "sig_hi": sigs[1], "m_lo": m_last[0], "m_hi": m_last[1],
                 "failed": failed}
    slack = measured + 2.0
    plan.warm_slack = slack
    ll = float(logc.sum())
    bound = float(np.sum(np.exp(rho_hid[np.isfinite(rho_hid)]))
                  + np.sum(np.exp(rho_leak[np.isfinite(rho_leak)])))
    error_bound = float(math.log1p(bound))
    pw = []
    for s in range(plan.n_sites):
        a, zz = plan.occ_ptr[s], plan.occ_ptr[s + 1]
        terms = logc[a + 1:zz].copy()
        if terms.size:
            terms[0] += logc[a]
        pw.append(terms)
    d_birth = d_death = None
    d_det = None
    if grad:
        d_birth = r.grad_birth.sum(axis=0)
        d_death = r.grad_death.sum(axis=0)
        # ∂/∂p: posterior mean of ∂ log obs over the kept sizes, minus ∂ log Z0
        owner = np.repeat(np.arange(I), wptr[1:] - wptr[:-1])
        nn = np.concatenate([np.arange(alo[i], ahi[i] + 1) for i in range(I)]).astype(float)
        dlo = plan.S[owner] / p - (plan.R[owner] * nn - plan.S[owner]) / (1.0 - p)
        d_det = float(np.sum(r.marginals * dlo))
        for k, i in enumerate(fidx):
            w = np.exp(logobs[i] - logZ0[k])
            ok = np.isfinite(logobs[i])
            dl = plan.S[i] / p - (plan.R[i] * n - plan.S[i]) / (1.0 - p)
            d_det -= float(np.sum(w[ok] * dl[ok]))
    return LikelihoodResult(ll, d_birth, d_death, d_det, error_bound, pw, sweeps, steps, rounds)


# --------------------------------------------------------------------------------------
# public functions
# --------------------------------------------------------------------------------------
class PreparedCounts:
    """Count data checked and arranged once, reused across evaluations (as inside the Op).

    Keeps the pair grouping (exact counts) or the hidden-size tables (detection) and the
    window sizes that the last evaluation found sufficient, so repeated evaluations at
    nearby rates (a sampler's trajectory) start from tight windows.

    Args:
        times, counts: as for :func:`log_likelihood`.
        detection: kept for reference; the model used is chosen per evaluate() call.

    Raises:
        CountValueError: unusable times or counts.
    """

    def __init__(self, times: Any, counts: Any, detection: Any = None) -> None:
        self.series = as_series(times, counts)
        self.detection = detection
        self._exact: _ExactPlan | None = None
        self._hidden: _DetectionPlan | None = None

    def evaluate(self, birth: Any, death: Any, detection: Any = None, tol: float = 1e-10,
                 grad: bool = True) -> LikelihoodResult:
        """Evaluate at these rates (see :func:`evaluate_likelihood` for arguments and errors).

        Returns:
            LikelihoodResult.
        """
        if not (tol > 0):
            raise InvalidRatesError(f"tol must be > 0, got {tol!r}")
        b, d, N = _check_rates(birth, death)
        if detection is None:
            if self._exact is None:
                self._exact = _ExactPlan(self.series)
            return _eval_exact(self._exact, b, d, N, float(tol), grad)
        p = _check_detection(detection)
        if self._hidden is None:
            self._hidden = _DetectionPlan(self.series)
        return _eval_detection(self._hidden, b, d, N, p, float(tol), grad)


_Prepared = PreparedCounts  # older name, used by infer.model


def evaluate_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                        detection: float | None = None, tol: float = 1e-10,
                        grad: bool = True) -> LikelihoodResult:
    """Log-likelihood, gradients and the achieved truncation bound in one result.

    Args:
        times, counts: see :func:`log_likelihood`.
        birth, death: rates over sizes 0..N (birth[N] ignored; death[0] = 0).
        detection: None for exact counts, else the detection probability p in (0, 1).
        tol: wanted bound on |log L_true − log L| (windows are widened until met).
        grad: compute gradients.

    Returns:
        LikelihoodResult with ll, d_birth, d_death, d_detection, error_bound, pointwise,
        and cost counters.

    Raises:
        CountValueError, ReplicateMismatchError: unusable times or counts.
        InvalidRatesError: unusable rates or detection probability.
        CapTooSmallError: a count exceeds the cap N.
        LikelihoodUnderflowError: a possible transition has a probability too small for
            double precision to bound within tol.
    """
    return PreparedCounts(times, counts, detection).evaluate(birth, death, detection, tol, grad)


def log_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                   detection: float | None = None, tol: float = 1e-10) -> float:
    """Log-likelihood of head counts under the birth–death chain with these rates.

    Args:
        times: 1-D survey times of one site; or a list of such arrays (several sites); or
            a data object with ``.series`` (items with ``.times``, ``.counts``), with
            ``counts`` = None.
        counts: matching counts, 1-D or 2-D (n_times, n_replicates), NaN = survey not
            made; or a list of such arrays; or None with a data object.
        birth, death: rates λ_n, μ_n over sizes 0..N.
        detection: None for exact counts (replicates at one time must agree); else the
            detection probability p: each count ~ Binomial(true size, p), the first true
            size with a uniform prior over 0..N.
        tol: bound on the error of the returned value from windows and truncation.

    Returns:
        The log-likelihood, each site conditioned on its first count (or its first
        occasion's counts). −inf when a transition is impossible in exact arithmetic.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    return evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol,
                               grad=False).ll


def log_likelihood_grad(times: Any, counts: Any, birth: Any, death: Any, *,
                        detection: float | None = None, tol: float = 1e-10) -> tuple:
    """Log-likelihood and its gradients with respect to every birth and death rate.

    Args:
        times, counts, birth, death, detection, tol: as for :func:`log_likelihood`.

    Returns:
        (ll, d_birth, d_death) for exact counts; (ll, d_birth, d_death, d_detection) when
        a detection probability is given (d_detection = ∂ll/∂p). d_birth and d_death are
        arrays over sizes 0..N; d_birth[N] and d_death[0] are 0. When ll is −inf the
        gradients are zeros.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    r = evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol, grad=True)
    if detection is None:
        return r.ll, r.d_birth, r.d_death
    return r.ll, r.d_birth, r.d_death, r.d_detection


def pointwise_log_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                             detection: float | None = None,
                             tol: float = 1e-10) -> list[np.ndarray]:
    """One log-likelihood term per transition and site (for PSIS-LOO).

    Args:
        times, counts, birth, death, detection, tol: as for :func:`log_likelihood`.

    Returns:
        A list with one 1-D array per site: exact counts, log P over each pair of
        consecutive surveyed times; detection, log p(counts at occasion i | earlier
        counts) for each surveyed occasion after the first (the first occasion's kept
        prior mass folded into the second term). Each site's terms sum to its
        log-likelihood.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    return evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol,
                               grad=False).pointwise


# --------------------------------------------------------------------------------------
# PyTensor Ops
# --------------------------------------------------------------------------------------
import pytensor.tensor as pt  # noqa: E402
from pytensor.graph.basic import Apply  # noqa: E402
from pytensor.graph.op import Op  # noqa: E402


class _Evaluator:
    """Shared between the value Op and its gradient Op; caches the last evaluation."""

    def __init__(self, data: Any, detection: Any, tol: float) -> None:
        if isinstance(data, tuple) and len(data) == 2 and not hasattr(data, "series"):
            self.prepared = PreparedCounts(data[0], data[1], detection)
        else:
            self.prepared = PreparedCounts(data, None, detection)
        self.estimate = isinstance(detection, str)
        if self.estimate and detection != "estimate":
            raise InvalidRatesError(f"detection must be None, a probability or 'estimate', got "
                                    f"{detection!r}", name="detection")
        self.fixed_p = None if (detection is None or self.estimate) else _check_detection(detection)
        self.tol = float(tol)
        self._key: bytes | None = None
        self._res: LikelihoodResult | None = None

    def __call__(self, birth: np.ndarray, death: np.ndarray, p: Any = None) -> LikelihoodResult:
        pv = float(p) if self.estimate else self.fixed_p
        key = (np.asarray(birth, dtype=np.float64).tobytes()
               + np.asarray(death, dtype=np.float64).tobytes()
               + (b"" if pv is None else np.float64(pv).tobytes()))
        if key != self._key or self._res is None:
            self._res = self.prepared.evaluate(birth, death, pv, self.tol, True)
            self._key = key
        return self._res


class CountLikelihoodGradOp(Op):
    """Gradients of :class:`CountLikelihoodOp`: outputs d_birth, d_death (and d_p)."""

    def __init__(self, evaluator: _Evaluator) -> None:
        self._ev = evaluator

    def make_node(self, *inputs: Any) -> Apply:
        """Build the Apply node: inputs (birth, death[, p]), outputs the gradients."""
        ins = [pt.as_tensor_variable(x) for x in inputs]
        outs = [pt.dvector(), pt.dvector()] + ([pt.dscalar()] if self._ev.estimate else [])
        return Apply(self, ins, outs)

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Evaluate (or reuse the cached evaluation) and write the gradients."""
        r = self._ev(*inputs)
        outputs[0][0] = np.asarray(r.d_birth, dtype=np.float64)
        outputs[1][0] = np.asarray(r.d_death, dtype=np.float64)
        if self._ev.estimate:
            outputs[2][0] = np.asarray(r.d_detection, dtype=np.float64)


class CountLikelihoodOp(Op):
    """PyTensor Op: (birth, death[, p]) -> scalar log-likelihood of fixed count data.

    Args:
        data: a data object with ``.series``, a (times, counts) pair, or a list of
            (times, counts) pairs.
        detection: None (exact counts), a fixed probability in (0, 1), or "estimate"
            (then p is a third, scalar input and gets a gradient).
        tol: truncation tolerance passed to the likelihood.

    Raises:
        CountValueError, ReplicateMismatchError, InvalidRatesError: at construction for
        bad data or detection; the evaluation errors of :func:`evaluate_likelihood` when run.
    """

    def __init__(self, data: Any, *, detection: float | str | None = None,
                 tol: float = 1e-10) -> None:
        self._ev = _Evaluator(data, detection, tol)
        self.grad_op = CountLikelihoodGradOp(self._ev)

    def make_node(self, *inputs: Any) -> Apply:
        """Build the Apply node: inputs (birth, death[, p]) as float64, output a scalar.

        Raises:
            TypeError: wrong number of inputs.
        """
        want = 3 if self._ev.estimate else 2
        if len(inputs) != want:
            raise TypeError(f"CountLikelihoodOp takes {want} inputs (birth, death"
                            f"{', p' if want == 3 else ''}), got {len(inputs)}")
        ins = [pt.as_tensor_variable(x).astype("float64") for x in inputs]
        return Apply(self, ins, [pt.dscalar()])

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Evaluate the log-likelihood (value and gradients are computed and cached together)."""
        outputs[0][0] = np.asarray(self._ev(*inputs).ll, dtype=np.float64)

    def grad(self, inputs: list, output_grads: list) -> list:
        """Symbolic gradient: the companion Op's outputs times the output gradient."""
        gz = output_grads[0]
        grads = self.grad_op(*inputs)
        return [gz * g for g in grads]

    def last_result(self) -> LikelihoodResult | None:
        """The cached result of the last evaluation (ll, gradients, error bound), or None."""
        return self._ev._res
