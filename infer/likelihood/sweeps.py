"""Transition probabilities of groups of pairs on windows widened until within tolerance.

A *group* is one uniformization sweep: a start count, an interval, a window of sizes
and (for an environment or a covariate) factors on the births and deaths; its ends are
the end counts it must give probabilities for. :func:`sweep_groups` starts each window
at a few standard deviations of the path beyond the group's range, or (warm start) at
the margin the previous evaluation's measured leaks call for, and widens it on the side
that leaks until the probability it leaves out (plus the Poisson mass cut off) is within
``tol_pair`` of each end's probability. Both the exact-count likelihood and the
environment-averaged likelihood use it.

Every comparison is made between logarithms. A group whose plain sweep gives an end a
probability below LOG_SPACE_BELOW (or 0: it underflowed) is swept again in log space
(chain.uniformization, ``group_log_space``), where probabilities far below the smallest
double keep their relative accuracy and the bound stays relative to each end's own
probability; the next evaluation starts such groups in log space directly while their
smallest probability stays below LOG_SPACE_KEEP_BELOW.
"""
from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np

from tallyfit.chain.errors import RateError
from tallyfit.chain.uniformization import pair_log_likelihood_grad
from tallyfit.infer.errors import LikelihoodUnderflowError

from .windows import MAX_ROUNDS, TAIL_FLOOR, warm_margins

__all__ = ["Groups", "Sweeps", "sweep_groups", "MAX_STEPS", "MAX_STORE_BYTES", "LOG_SPACE_BELOW",
           "LOG_SPACE_KEEP_BELOW", "check_cost"]

#: Largest number of uniformization steps (total rate × interval) one sweep may need before
#: the point is treated as impossible: a sampler's far-off trial point, not a plausible year.
MAX_STEPS = 2e6
#: Largest forward store one gradient sweep may keep (steps × window × 8 bytes); fixed, not
#: the machine's free memory, so that which points are refused does not depend on the machine.
MAX_STORE_BYTES = 2 * 1024 ** 3
#: A plain sweep is trusted for probabilities down to here; a group with a smaller end
#: probability is swept in log space. Above it, what underflows in a plain sweep (entries
#: below ~1e-308, each step's error at most one subnormal per size) is negligible
#: relative to the probability, and the Poisson tail it needs stays above TAIL_FLOOR.
LOG_SPACE_BELOW = 1e-250
#: A log-space group goes back to plain sweeps at the next evaluation once its smallest
#: probability is above this (the gap to LOG_SPACE_BELOW keeps a group near the switch from
#: flipping at every step of a sampler).
LOG_SPACE_KEEP_BELOW = 1e-200


@dataclass
class Groups:
    """Groups of pairs, one uniformization sweep each.

    Attributes:
        start, dt: start count and interval per group.
        lowest, highest: smallest and largest of the start and ends per group.
        end_ptr: CSR pointer (n_groups + 1) into end_size / end_weight.
        end_size: end count per end; end_weight: its weight in the gradient (multiplicity).
        birth_scale, death_scale: factors on the group's births and deaths (None: 1).
        underflow: called with (group, end) when an end's probability cannot be bounded;
            returns the LikelihoodUnderflowError to raise (naming the site and counts).
        warm: what the last evaluation learned about the windows (kept between calls).
    """

    start: np.ndarray
    dt: np.ndarray
    lowest: np.ndarray
    highest: np.ndarray
    end_ptr: np.ndarray
    end_size: np.ndarray
    end_weight: np.ndarray
    underflow: Callable[[int, int, float], LikelihoodUnderflowError]
    birth_scale: np.ndarray | None = None
    death_scale: np.ndarray | None = None
    warm: dict | None = field(default=None, repr=False)

    @property
    def n_groups(self) -> int:
        """Number of groups."""
        return int(self.start.size)


@dataclass
class Sweeps:
    """The windowed probabilities of every end, their bounds, and per-group gradients.

    Attributes:
        log_prob: per end, log of the windowed probability (≤ the true one), finite
            wherever the probability is positive however small.
        log_bound: per group, log of the leaked + dropped probability (true P ≤ P + bound).
        rel_bound: per end, bound / P (computed in log space): within tol_pair.
        lo: per group, the window's lowest size (gradient entry j is size lo + j).
        grad_birth, grad_death: per group, ∂ Σ_e w_e log P_e / ∂ (scaled) rate over the
            window (empty list without gradients).
        sweeps, steps, rounds: cost counters.
    """

    log_prob: np.ndarray
    log_bound: np.ndarray
    rel_bound: np.ndarray
    lo: np.ndarray
    grad_birth: list[np.ndarray]
    grad_death: list[np.ndarray]
    sweeps: int
    steps: int
    rounds: int

    @property
    def prob(self) -> np.ndarray:
        """Per end, the windowed probability as a double (0 where it underflows)."""
        return np.exp(self.log_prob)

    @property
    def bound(self) -> np.ndarray:
        """Per group, leaked + dropped probability as a double (0 where it underflows)."""
        return np.exp(self.log_bound)


def _initial_margins(groups: Groups, b: np.ndarray, d: np.ndarray, N: int,
                     tol_pair: float) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    tot = b + d
    tot[N] = d[N]
    scale = np.ones(groups.n_groups)
    for s in (groups.birth_scale, groups.death_scale):
        if s is not None:
            scale = np.maximum(scale, s)
    z = math.sqrt(2.0 * math.log(4.0 / (tol_pair * 1e-3)))
    mlo = (np.ceil(z * np.sqrt(np.maximum(tot[groups.lowest] * scale, 1.0) * groups.dt)) + 6).astype(np.int64)
    mhi = (np.ceil(z * np.sqrt(np.maximum(tot[groups.highest] * scale, 1.0) * groups.dt)) + 6).astype(np.int64)
    tail = np.full(groups.n_groups, max(tol_pair * 1e-4, TAIL_FLOOR))
    log_space = np.zeros(groups.n_groups, dtype=bool)
    warm = groups.warm
    if warm is not None and warm["sig_lo"].size == groups.n_groups:
        zt = np.sqrt(2.0 * (math.log(1.0 / (0.4 * tol_pair)) - warm["log_pmin"]))
        warm_margins(mlo, warm["sig_lo"], warm["m_lo"], warm["failed"], zt)
        warm_margins(mhi, warm["sig_hi"], warm["m_hi"], warm["failed"], zt)
        tail = np.maximum(np.minimum(tail, 0.05 * tol_pair * np.exp(warm["log_pmin"])), TAIL_FLOOR)
        log_space = warm["log_space"].copy()
    return mlo, mhi, tail, log_space


def check_cost(b: np.ndarray, d: np.ndarray, lo: np.ndarray, hi: np.ndarray, dt: np.ndarray,
               birth_scale: np.ndarray, death_scale: np.ndarray, grad: bool) -> None:
    """Refuse sweeps that would take more than MAX_STEPS steps or a gradient store over
    MAX_STORE_BYTES (a far year of good and bad years, a rate scale far out in the tails).

    Raises:
        RateError: naming the steps or bytes (the guarded Op turns it into a refused point).
    """
    iota = float(b[0])

    def steps(top_b: np.ndarray, top_d: np.ndarray, g: np.ndarray) -> np.ndarray:
        return (iota + birth_scale[g] * np.maximum(top_b - iota, 0.0) + death_scale[g] * top_d) * dt[g]

    def too_costly(lam: np.ndarray, g: np.ndarray) -> np.ndarray:
        bad = ~np.isfinite(lam) | (lam > MAX_STEPS)
        if grad:
            bad |= (lam + 10 * np.sqrt(lam) + 20) * (hi[g] - lo[g] + 1) * 8 > MAX_STORE_BYTES
        return bad

    every = np.arange(lo.size)
    # the whole range's largest rates first (cheap, and enough almost always); then each
    # suspect sweep on its own window
    lam = steps(np.full(lo.size, float(np.max(b[:-1], initial=0.0))), np.full(lo.size, float(np.max(d))), every)
    for g in every[too_costly(lam, every)]:
        top_b = float(np.max(b[lo[g]:max(min(hi[g], b.size - 2), lo[g]) + 1]))
        one = steps(np.array([top_b]), np.array([float(np.max(d[lo[g]:hi[g] + 1]))]), np.array([g]))
        if too_costly(one, np.array([g]))[0]:
            raise RateError(f"a census interval would need {one[0]:.3g} uniformization steps on a window of "
                            f"{hi[g] - lo[g] + 1} sizes (limits: {MAX_STEPS:.0e} steps, a gradient store of "
                            f"{MAX_STORE_BYTES / 1024 ** 3:.0f} GiB)")


def sweep_groups(groups: Groups, b: np.ndarray, d: np.ndarray, N: int, tol_pair: float,
                 grad: bool) -> Sweeps:
    """Windowed probabilities of every group's ends, each within ``tol_pair`` relatively.

    Args:
        groups: the groups (their ``warm`` is updated).
        b, d: checked birth and death rates over sizes 0..N.
        N: the cap.
        tol_pair: wanted bound on (leaked + dropped) / P for every end.
        grad: compute the per-group gradients.

    Returns:
        Sweeps.

    Raises:
        LikelihoodUnderflowError: an end's probability cannot be bounded within tol_pair
            even on the whole range 0..N (from ``groups.underflow``), or the widening did
            not converge.
        RateError: a sweep would cost more than the limits of :func:`check_cost`, or a
            log-space sweep reached its step limit.
    """
    G = groups.n_groups
    mlo, mhi, tail, logsp = _initial_margins(groups, b, d, N, tol_pair)
    lo = np.maximum(groups.lowest - mlo, 0)
    hi = np.minimum(groups.highest + mhi, N)
    bs = np.ones(G) if groups.birth_scale is None else groups.birth_scale
    ds = np.ones(G) if groups.death_scale is None else groups.death_scale
    rel = np.full(G, min(0.05 * tol_pair, 0.5))  # log-space groups: Poisson cut relative to P
    lprob = np.full(groups.end_size.size, -np.inf)
    llo_all = np.full(G, -np.inf)
    lhi_all = np.full(G, -np.inf)
    lbound_all = np.full(G, -np.inf)
    lpmin_all = np.full(G, -np.inf)
    failed = np.zeros(G, dtype=bool)
    gb: list[np.ndarray] = [np.zeros(0)] * G if grad else []
    gd: list[np.ndarray] = [np.zeros(0)] * G if grad else []
    pending = np.arange(G)
    sweeps = steps = rounds = 0
    ptr = groups.end_ptr
    ltol = math.log(tol_pair)
    # groups newly swept in log space are first sized without gradients (a log-space backward
    # sweep costs several forward ones), then swept once more with them
    probing = np.zeros(G, dtype=bool)
    log_switch = max(math.log(LOG_SPACE_BELOW), math.log(TAIL_FLOOR) + 23.0 - math.log(0.05 * tol_pair))
    while pending.size:
        rounds += 1
        if rounds > MAX_ROUNDS:
            raise LikelihoodUnderflowError("window widening did not converge")
        check_cost(b, d, lo[pending], hi[pending], groups.dt[pending], bs[pending], ds[pending], grad)
        if pending.size < G:
            cnt = ptr[pending + 1] - ptr[pending]
            eptr = np.zeros(pending.size + 1, dtype=np.int64)
            np.cumsum(cnt, out=eptr[1:])
            eidx = np.concatenate([np.arange(ptr[g], ptr[g + 1]) for g in pending])
        else:
            eptr = ptr
            eidx = np.arange(groups.end_size.size)
        lsp = logsp[pending]
        lsp_any = bool(lsp.any())
        round_grad = grad and not (lsp_any and probing[pending].any())
        kmax = width = None
        if lsp_any:
            width = hi[pending] - lo[pending] + 1
            kmax = np.full(pending.size, int(MAX_STEPS), dtype=np.int64)
            if round_grad:
                kmax = np.maximum(np.minimum(kmax, MAX_STORE_BYTES // (8 * width) - 1), 1)
        r = pair_log_likelihood_grad(b, d, groups.start[pending], groups.dt[pending], lo[pending], hi[pending],
                                     tail[pending], eptr, groups.end_size[eidx], groups.end_weight[eidx],
                                     grad=round_grad, group_birth_scale=bs[pending], group_death_scale=ds[pending],
                                     group_log_space=lsp if lsp_any else None,
                                     group_relative_tail=rel[pending] if lsp_any else None,
                                     group_max_steps=kmax)
        sweeps += pending.size
        steps += int(r.steps.sum())
        lprob[eidx] = r.log_prob
        lpmin = np.minimum.reduceat(r.log_prob, eptr[:-1]) if r.log_prob.size else np.zeros(0)
        lbound = np.logaddexp(np.logaddexp(r.log_leaked_low, r.log_leaked_high), r.log_dropped)
        llo_all[pending], lhi_all[pending], lbound_all[pending] = r.log_leaked_low, r.log_leaked_high, lbound
        lpmin_all[pending] = lpmin
        lneed = ltol + lpmin
        # a plain sweep whose smallest probability is too small to trust: sweep it in log space
        to_log = lpmin < log_switch  # (P = 0 included; a log-space group's bound is never 0)
        if lsp_any:
            to_log &= ~lsp
        ok = (lbound <= lneed) & ~to_log
        redo = pending[ok] if grad and not round_grad else None
        if redo is not None:
            probing[redo] = False
        if round_grad:
            for k in np.flatnonzero(ok):
                a, z_ = r.grad_offsets[k], r.grad_offsets[k + 1]
                gb[pending[k]] = r.grad_birth[a:z_]
                gd[pending[k]] = r.grad_death[a:z_]
        switched = pending[to_log] if to_log.any() else None
        if switched is not None:
            logsp[switched] = True
            probing[switched] = True
        bad = np.flatnonzero(~(ok | to_log))
        again = [x for x in (switched, redo) if x is not None]
        if not bad.size:
            if not again:
                break
            pending = np.unique(np.concatenate(again))
            continue
        gbad = pending[bad]
        failed[gbad] = True
        nb = lneed[bad]
        zero = lpmin[bad] == -np.inf
        in_log = lsp[bad]
        lo_bad = (r.log_leaked_low[bad] > math.log(0.45) + nb) & (lo[gbad] > 0)
        hi_bad = (r.log_leaked_high[bad] > math.log(0.45) + nb) & (hi[gbad] < N)
        tail_bad = (r.log_dropped[bad] > math.log(0.1) + nb) | zero
        capped = in_log & tail_bad & (r.steps[bad] >= (kmax[bad] if kmax is not None else 0))
        if np.any(capped):
            k = int(bad[int(np.flatnonzero(capped)[0])])
            raise RateError(f"a census interval's log-space sweep reached its limit of {int(kmax[k])} "
                            f"uniformization steps on a window of {int(width[k])} sizes before its Poisson "
                            f"tail was within tolerance (limits: {MAX_STEPS:.0e} steps, a gradient store of "
                            f"{MAX_STORE_BYTES / 1024 ** 3:.0f} GiB)")
        stuck = ~lo_bad & ~hi_bad & (~tail_bad | in_log | (tail[gbad] <= TAIL_FLOOR))
        if np.any(stuck):
            g = int(gbad[int(np.flatnonzero(stuck)[0])])
            e = int(ptr[g] + np.argmin(lprob[ptr[g]:ptr[g + 1]]))
            raise groups.underflow(g, e, float(np.exp(lprob[e])))
        # smaller Poisson tail where the cut mass is the problem (plain sweeps)
        with np.errstate(over="ignore"):
            newtail = np.where(zero, TAIL_FLOOR, np.maximum(0.05 * np.exp(nb), TAIL_FLOOR))
        tail[gbad] = np.where(tail_bad & ~in_log, np.minimum(tail[gbad], newtail), tail[gbad])
        # wider windows on the side that leaks: Gaussian-tail extrapolation of the leak
        with np.errstate(divide="ignore", invalid="ignore"):
            zt = np.sqrt(2.0 * (math.log(1.0 / 0.4) - nb))
            for side_bad, m_, lk in ((lo_bad, mlo, r.log_leaked_low[bad]), (hi_bad, mhi, r.log_leaked_high[bad])):
                cur = m_[gbad]
                sig = cur / np.sqrt(2.0 * np.maximum(-lk, math.log(2.0)))
                want = np.ceil(1.15 * sig * zt) + 3
                grown = np.where(lk < math.log(0.1), np.maximum(want, np.ceil(1.25 * cur)), 2 * cur)
                m_[gbad] = np.where(side_bad, grown, cur).astype(np.int64)
        lo[gbad] = np.maximum(groups.lowest[gbad] - mlo[gbad], 0)
        hi[gbad] = np.minimum(groups.highest[gbad] + mhi[gbad], N)
        pending = np.unique(np.concatenate([gbad, *again]))
    # learn, per side, the spread that the measured leaks imply (for the next evaluation)
    owner = np.repeat(np.arange(G), np.diff(ptr))
    with np.errstate(divide="ignore", invalid="ignore"):
        rel_bound = np.exp(lbound_all[owner] - lprob)
        sigs = []
        for m_, lk, clip in ((mlo, llo_all, lo == 0), (mhi, lhi_all, hi == N)):
            sg = m_ / np.sqrt(2.0 * np.maximum(-lk, math.log(10.0)))
            sg[clip | (lpmin_all == -np.inf) | (lk == -np.inf) | (~logsp & (lk < math.log(1e-250)))] = np.nan
            sigs.append(sg)
    groups.warm = {"sig_lo": sigs[0], "sig_hi": sigs[1], "m_lo": mlo.astype(float), "m_hi": mhi.astype(float),
                   "failed": failed, "log_pmin": np.maximum(lpmin_all, -1e300),
                   "log_space": logsp & (lpmin_all < math.log(LOG_SPACE_KEEP_BELOW))}
    return Sweeps(log_prob=lprob, log_bound=lbound_all, rel_bound=rel_bound, lo=lo,
                  grad_birth=gb, grad_death=gd, sweeps=sweeps, steps=steps, rounds=rounds)
