"""Transition probabilities of groups of pairs on windows widened until within tolerance.

A *group* is one uniformization sweep: a start count, an interval, a window of sizes
and (for an environment or a covariate) factors on the births and deaths; its ends are
the end counts it must give probabilities for. :func:`sweep_groups` starts each window
at a few standard deviations of the path beyond the group's range, or (warm start) at
the margin the previous evaluation's measured leaks call for, and widens it on the side
that leaks until the probability it leaves out (plus the Poisson mass cut off) is within
``tol_pair`` of each end's probability. Both the exact-count likelihood and the
environment-averaged likelihood use it.
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

__all__ = ["Groups", "Sweeps", "sweep_groups", "MAX_STEPS", "MAX_STORE_BYTES", "check_cost"]

#: Largest number of uniformization steps (total rate × interval) one sweep may need before
#: the point is treated as impossible: a sampler's far-off trial point, not a plausible year.
MAX_STEPS = 2e6
#: Largest forward store one gradient sweep may keep (steps × window × 8 bytes); fixed, not
#: the machine's free memory, so that which points are refused does not depend on the machine.
MAX_STORE_BYTES = 2 * 1024 ** 3


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
        prob: per end, the windowed probability (≤ the true one).
        bound: per group, leaked + dropped probability (true P ≤ prob + bound).
        lo: per group, the window's lowest size (gradient entry j is size lo + j).
        grad_birth, grad_death: per group, ∂ Σ_e w_e log P_e / ∂ (scaled) rate over the
            window (empty list without gradients).
        sweeps, steps, rounds: cost counters.
    """

    prob: np.ndarray
    bound: np.ndarray
    lo: np.ndarray
    grad_birth: list[np.ndarray]
    grad_death: list[np.ndarray]
    sweeps: int
    steps: int
    rounds: int


def _initial_margins(groups: Groups, b: np.ndarray, d: np.ndarray, N: int,
                     tol_pair: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
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
    warm = groups.warm
    if warm is not None and warm["sig_lo"].size == groups.n_groups:
        zt = np.sqrt(2.0 * np.log(1.0 / (0.4 * tol_pair * warm["pmin"])))
        warm_margins(mlo, warm["sig_lo"], warm["m_lo"], warm["failed"], zt)
        warm_margins(mhi, warm["sig_hi"], warm["m_hi"], warm["failed"], zt)
        tail = np.maximum(np.minimum(tail, 0.05 * tol_pair * warm["pmin"]), TAIL_FLOOR)
    return mlo, mhi, tail


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
        LikelihoodUnderflowError: an end's probability is too small for double precision
            to bound within tol_pair even on the whole range 0..N (from ``groups.underflow``),
            or the widening did not converge.
    """
    G = groups.n_groups
    mlo, mhi, tail = _initial_margins(groups, b, d, N, tol_pair)
    lo = np.maximum(groups.lowest - mlo, 0)
    hi = np.minimum(groups.highest + mhi, N)
    bs = np.ones(G) if groups.birth_scale is None else groups.birth_scale
    ds = np.ones(G) if groups.death_scale is None else groups.death_scale
    prob = np.zeros(groups.end_size.size)
    leak_lo = np.zeros(G)
    leak_hi = np.zeros(G)
    drop = np.zeros(G)
    pmin_all = np.zeros(G)
    failed = np.zeros(G, dtype=bool)
    gb: list[np.ndarray] = [np.zeros(0)] * G if grad else []
    gd: list[np.ndarray] = [np.zeros(0)] * G if grad else []
    pending = np.arange(G)
    sweeps = steps = rounds = 0
    ptr = groups.end_ptr
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
        r = pair_log_likelihood_grad(b, d, groups.start[pending], groups.dt[pending], lo[pending], hi[pending],
                                     tail[pending], eptr, groups.end_size[eidx], groups.end_weight[eidx],
                                     grad=grad, group_birth_scale=bs[pending], group_death_scale=ds[pending])
        sweeps += pending.size
        steps += int(r.steps.sum())
        prob[eidx] = r.prob
        leak_lo[pending] = r.leaked_low
        leak_hi[pending] = r.leaked_high
        drop[pending] = r.dropped
        pmin = np.minimum.reduceat(r.prob, eptr[:-1]) if r.prob.size else np.zeros(0)
        pmin_all[pending] = pmin
        need = tol_pair * pmin
        ok = (r.leaked + r.dropped) <= need
        if grad:
            for k in np.flatnonzero(ok):
                a, z_ = r.grad_offsets[k], r.grad_offsets[k + 1]
                gb[pending[k]] = r.grad_birth[a:z_]
                gd[pending[k]] = r.grad_death[a:z_]
        bad = np.flatnonzero(~ok)
        if not bad.size:
            break
        gbad = pending[bad]
        failed[gbad] = True
        nb = need[bad]
        zero = pmin[bad] <= 0.0
        lo_bad = (r.leaked_low[bad] > 0.45 * nb) & (lo[gbad] > 0)
        hi_bad = (r.leaked_high[bad] > 0.45 * nb) & (hi[gbad] < N)
        tail_bad = (r.dropped[bad] > 0.1 * nb) | zero
        stuck = ~lo_bad & ~hi_bad & (~tail_bad | (tail[gbad] <= TAIL_FLOOR))
        if np.any(stuck):
            g = int(gbad[int(np.flatnonzero(stuck)[0])])
            e = int(ptr[g] + np.argmin(prob[ptr[g]:ptr[g + 1]]))
            raise groups.underflow(g, e, float(prob[e]))
        # smaller Poisson tail where the cut mass is the problem (or P vanished by the cut)
        newtail = np.where(zero, TAIL_FLOOR, np.maximum(0.05 * nb, TAIL_FLOOR))
        tail[gbad] = np.where(tail_bad, np.minimum(tail[gbad], newtail), tail[gbad])
        # wider windows on the side that leaks: Gaussian-tail extrapolation of the leak
        with np.errstate(divide="ignore", invalid="ignore"):
            zt = np.sqrt(2.0 * np.log(1.0 / (0.4 * np.maximum(nb, 1e-300))))
            for side_bad, m_, lk in ((lo_bad, mlo, r.leaked_low[bad]), (hi_bad, mhi, r.leaked_high[bad])):
                cur = m_[gbad]
                sig = cur / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.5)))
                want = np.ceil(1.15 * sig * zt) + 3
                grown = np.where(lk < 0.1, np.maximum(want, np.ceil(1.25 * cur)), 2 * cur)
                m_[gbad] = np.where(side_bad, grown, cur).astype(np.int64)
        lo[gbad] = np.maximum(groups.lowest[gbad] - mlo[gbad], 0)
        hi[gbad] = np.minimum(groups.highest[gbad] + mhi[gbad], N)
        pending = gbad
    # learn, per side, the spread that the measured leaks imply (for the next evaluation)
    with np.errstate(divide="ignore", invalid="ignore"):
        sigs = []
        for m_, lk, clip in ((mlo, leak_lo, lo == 0), (mhi, leak_hi, hi == N)):
            sg = m_ / np.sqrt(2.0 * np.log(1.0 / np.clip(lk, 1e-300, 0.1)))
            sg[clip | (pmin_all <= 0) | (lk < 1e-250)] = np.nan
            sigs.append(sg)
    groups.warm = {"sig_lo": sigs[0], "sig_hi": sigs[1], "m_lo": mlo.astype(float), "m_hi": mhi.astype(float),
                   "failed": failed, "pmin": np.maximum(pmin_all, 1e-300)}
    return Sweeps(prob=prob, bound=leak_lo + leak_hi + drop, lo=lo, grad_birth=gb, grad_death=gd,
                  sweeps=sweeps, steps=steps, rounds=rounds)
