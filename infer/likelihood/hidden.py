"""Counts with detection error: the true size is hidden, each replicate count Binomial(N_true, p).

The forward algorithm runs in scaled (log) form over the plausible hidden sizes at each
surveyed occasion (:class:`DetectionPlan` holds the occasions and their replicate counts);
the first hidden size has a uniform prior over 0..N, so the likelihood is that of the later
counts given the first occasion's counts. Sizes left out (above a binomial bound) and
probability leaving the transition windows are bounded and included in ``error_bound``.
Gradients are exact derivatives of the computed value (chain.uniformization's
forward–backward with its adjoint).
"""
from __future__ import annotations

import math

import numpy as np
from scipy.special import gammaln, logsumexp

from tallyfit.chain.uniformization import hidden_forward_backward
from tallyfit.infer.errors import CountValueError, LikelihoodUnderflowError

from .result import LikelihoodResult, cap_error
from .series import CountSeries
from .windows import MAX_ROUNDS, TAIL_FLOOR, warm_margins

__all__ = ["DetectionPlan", "reachable_any", "evaluate_detection"]


class DetectionPlan:
    """Surveyed occasions per site with their replicate counts, built once per data set.

    Keeps per occasion the replicate counts, their sum S, their number R and their
    largest value, the interval since the site's previous occasion, and (``warm``,
    ``warm_slack``) what the last evaluation learned about the windows.

    Args:
        series: the checked series, one per site.

    Raises:
        CountValueError: a site with no counts at all.
    """

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
        """Σ_r log C(n, y_r) for n in 0..N per occasion (−inf for n < max_r y_r).

        Args:
            N: the cap (the table for the last N asked is kept).

        Returns:
            Array (n_occasions, N + 1).
        """
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


def reachable_any(b: np.ndarray, d: np.ndarray, sets: list[np.ndarray]) -> bool:
    """Whether some hidden path through the allowed sets of sizes exists (exact arithmetic).

    Args:
        b, d: birth and death rates over sizes 0..N.
        sets: per occasion, a boolean array over 0..N of the sizes the counts allow.

    Returns:
        True when a path of possible moves visits an allowed size at every occasion.

    Raises:
        Nothing.
    """
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


def evaluate_detection(plan: DetectionPlan, b: np.ndarray, d: np.ndarray, N: int, p: float,
                       tol: float, grad: bool) -> LikelihoodResult:
    """Log-likelihood with detection probability p by the scaled forward algorithm.

    Hidden sizes above a binomial bound and probability leaving the transition windows are
    left out; the slack that bounds how much a left-out path could add is guessed, then
    measured, and windows and hidden ranges are widened until the total is within tol
    (falling back to the whole range 0..N). What was learned is kept on the plan.

    Args:
        plan: the data's occasions (updated: its warm-start information).
        b, d: checked birth and death rates over sizes 0..N.
        N: the cap.
        p: detection probability in (0, 1).
        tol: wanted bound on |log L_true − log L|.
        grad: compute d_birth, d_death and d_detection.

    Returns:
        LikelihoodResult; −inf with zero gradients when no hidden path is possible in
        exact arithmetic.

    Raises:
        CapTooSmallError: a count exceeds N.
        LikelihoodUnderflowError: the likelihood underflows or cannot be bounded within
            tol even on the whole range 0..N, or the widening did not converge.
    """
    if plan.ymax.max() > N:
        i = int(np.argmax(plan.ymax))
        raise cap_error(int(plan.ymax[i]), int(plan.site[i]), float(plan.time[i]), N)
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
        warm_margins(m_lo, warm["sig_lo"], warm["m_lo"], warm["failed"], z0)
        warm_margins(m_hi, warm["sig_hi"], warm["m_hi"], warm["failed"], z0)
    tailfix = np.full(I, np.inf)
    failed = np.zeros(I, dtype=bool)
    rounds = 0
    sweeps = 0
    steps = 0
    force_full = False
    while True:
        rounds += 1
        if rounds > MAX_ROUNDS:
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
        tails = np.maximum(np.minimum(np.exp(thr) * 0.1, tailfix), TAIL_FLOOR)
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
            if not reachable_any(b, d, sets):
                zeros = np.zeros(N + 1)
                pw = [np.full(max(int(plan.occ_ptr[k + 1] - plan.occ_ptr[k]) - 1, 0), -np.inf)
                      for k in range(plan.n_sites)]
                return LikelihoodResult(-np.inf, zeros if grad else None,
                                        zeros.copy() if grad else None, 0.0 if grad else None,
                                        0.0, pw, sweeps, steps, rounds)
            if not force_full:
                force_full = True
                tailfix[:] = TAIL_FLOOR
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
                                                        <= TAIL_FLOOR):
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
        tailfix = np.where(drop_bad, np.maximum(0.05 * allowed, TAIL_FLOOR), tailfix)
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
