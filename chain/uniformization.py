"""Transition probabilities of a birth–death chain by uniformization, on a window of sizes.

The generator Q on sizes 0..N is tridiagonal: Q[i, i+1] = λ_i, Q[i, i-1] = μ_i,
Q[i, i] = -(λ_i + μ_i), with λ_N taken as 0 (the cap reflects). For a window of sizes
lo..hi pick Λ = 1.02 · max over the window of (λ_i + μ_i) and set B = I + Q/Λ restricted
to the window. Every entry of B is ≥ 0, so

    P(t) = Σ_k Pois(k; Λt) B^k

is a sum of positive terms and keeps its relative accuracy even for tiny probabilities.
Transitions that leave the window are dropped, so the windowed P is ≤ the true P entry
by entry, and the true P_{mn} ≤ windowed P_{mn} + leaked_m, where leaked_m (the chance of
having left the window by time t) is accumulated explicitly from the boundary flows of
each step. The Poisson sum is cut on the right where its remaining mass is below a
target and the cut mass is added to the bound. Λ only has to cover the rates inside the
window, which keeps stiff chains (quadratic death) cheap when the window is small.

Gradients use the adjoint of the step recursion with Λ held fixed (P(t) does not depend
on Λ): with α_a = e_m^T B^a and γ_a = Σ_b w_{a+1+b} B^b g,
∂(e_m^T P g)/∂B_ij = Σ_a α_a[i] γ_a[j]; only the tridiagonal entries are needed.

Everything that loops over steps is compiled with numba.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from numba import njit

from .errors import RateError
from .rates import check_rate_arrays

#: Λ = RATE_MARGIN · (largest total rate in the window).
RATE_MARGIN = 1.02
#: Smallest positive normal double: a Poisson weight that underflows is below it.
_UNDERFLOW_UNIT = 2.2250738585072014e-308
#: Floating-point licences for the hot loops: contraction (FMA) and reassociation let the compiler
#: vectorise; no licence that changes infinities, NaNs or signed zeros.
_FM = {"contract", "reassoc", "arcp"}


# --------------------------------------------------------------------------------------
# compiled pieces
# --------------------------------------------------------------------------------------
@njit(cache=True, nogil=True)
def _window_steps(birth, death, lo, hi, N, p, q, d, bs, ds):
    """Fill the step probabilities of B on lo..hi into p, q, d; return Λ.

    The rates are scaled: λ'_n = λ_0 + (λ_n − λ_0)·bs (the births, not the immigration
    λ_0, scaled) and μ'_n = μ_n·ds; bs = ds = 1 gives the rates as they are.
    """
    W = hi - lo + 1
    iota = birth[0]
    top = 0.0
    for j in range(W):
        n = lo + j
        lam = iota + (birth[n] - iota) * bs if n < N else 0.0
        s = lam + death[n] * ds
        if s > top:
            top = s
    Lam = RATE_MARGIN * top if top > 0.0 else 1.0
    for j in range(W):
        n = lo + j
        lam = iota + (birth[n] - iota) * bs if n < N else 0.0
        mu = death[n] * ds
        p[j] = lam / Lam
        q[j] = mu / Lam
        d[j] = (Lam - lam - mu) / Lam
    return Lam


@njit(cache=True, nogil=True)
def _poisson_extent(x, tail):
    """Smallest K ≥ x with Σ_{k>K} Pois(k; x) ≤ tail (a geometric bound); returns (K, bound)."""
    if x <= 0.0:
        return 0, 0.0
    K = int(math.ceil(x))
    lx = math.log(x)
    lw = K * lx - x - math.lgamma(K + 1.0)  # log Pois(K; x)
    while True:
        lw_next = lw + lx - math.log(K + 1.0)
        # Σ_{k>K} w_k ≤ w_{K+1} / (1 - x/(K+2)) since the ratios w_{k+1}/w_k = x/(k+1) fall
        bound = math.exp(lw_next) / (1.0 - x / (K + 2.0))
        if bound <= tail:
            return K, bound
        K += 1
        lw = lw_next


@njit(cache=True, nogil=True)
def _poisson_weights(x, K, right_mass, w, left_cut):
    """Fill w[0..K] with Pois(k; x), in log space from the mode; return the mass left out on the left.

    The weights are scaled so that they sum to 1 - right_mass (the mass beyond K). With
    ``left_cut``, weights below right_mass/(K+1) on the left of the mode are set to 0: every entry they multiply is
    a probability (<= 1), so the error is at most their sum, which is returned (together with
    any underflow) and belongs in the caller's error bound. This keeps the mixing of long
    intervals to a few standard deviations around Λt instead of the whole representable range.
    """
    if x <= 0.0:
        w[0] = 1.0
        return 0.0
    mode = int(math.floor(x))
    if mode > K:
        mode = K
    w[mode] = 1.0
    lr = 0.0
    for k in range(mode + 1, K + 1):
        lr += math.log(x / k)
        w[k] = math.exp(lr)
    cut = right_mass / (K + 1.0)
    lr = 0.0
    first = 0  # weights below this index are 0 (cut off, or not worth computing)
    left_rest = 0.0  # unscaled bound on the weights not computed
    for k in range(mode - 1, -1, -1):
        lr += math.log((k + 1.0) / x)
        w[k] = math.exp(lr)
        if left_cut and w[k] < cut:
            # left of the mode the weights fall by at least k/x per step: bound the rest
            left_rest = w[k] / (1.0 - k / x) if k < x else w[k] * (k + 1.0)
            for j in range(k + 1):
                w[j] = 0.0
            first = k + 1
            break
    s = 0.0
    for k in range(first, K + 1):
        s += w[k]
    scale = (1.0 - right_mass) / s
    dropped = left_rest * scale
    for k in range(first, K + 1):
        w[k] *= scale
        if w[k] == 0.0:
            dropped += _UNDERFLOW_UNIT
        elif left_cut and k < mode and w[k] < cut:
            dropped += w[k]
            w[k] = 0.0
    return dropped


@njit(cache=True, nogil=True, fastmath=_FM)
def _step_forward(a, b, p, q, d, W):
    """b = a B (a row vector times the windowed step matrix)."""
    if W == 1:
        b[0] = a[0] * d[0]
        return
    b[0] = a[0] * d[0] + a[1] * q[1]
    for j in range(1, W - 1):
        b[j] = a[j] * d[j] + a[j - 1] * p[j - 1] + a[j + 1] * q[j + 1]
    b[W - 1] = a[W - 1] * d[W - 1] + a[W - 2] * p[W - 2]


@njit(cache=True, nogil=True, fastmath=_FM)
def _step_backward(g, h, p, q, d, W):
    """h = B g (the windowed step matrix times a column vector)."""
    if W == 1:
        h[0] = d[0] * g[0]
        return
    h[0] = d[0] * g[0] + p[0] * g[1]
    for i in range(1, W - 1):
        h[i] = d[i] * g[i] + p[i] * g[i + 1] + q[i] * g[i - 1]
    h[W - 1] = d[W - 1] * g[W - 1] + q[W - 1] * g[W - 2]


@njit(cache=True, nogil=True, fastmath=_FM)
def _adjoint_sweep(store, W, K, w, seed, p, q, d, gam, gam2, gb, gd, top_is_cap, bottom_is_zero,
                   want_grad, finish):
    """The backward sweep of the adjoint: γ_{a-1} = B γ_a + w_a g from γ_{K-1} down, and, with
    ``want_grad``, Σ_a α_a[i] γ_a[j] accumulated into the rate gradients ``gb``, ``gd``.

    ``store`` holds α_0..α_K (rows of length W; read only with ``want_grad``); ``gam`` enters
    as γ_{K-1} = w_K g, and ``gam``/``gam2`` are overwritten. ∂/∂λ_j: B[j, j+1] += dλ/Λ,
    B[j, j] -= dλ/Λ; ∂/∂μ_j: B[j, j-1] += dμ/Λ, B[j, j] -= dμ/Λ (the caller divides by Λ).
    With ``finish`` the last step is taken too, so the returned vector is P g = Σ_k w_k B^k g;
    otherwise the returned vector is γ_0. One fused pass per step does both gradients and the
    next γ for the interior sizes, so each step reads α_a and γ_a once.
    """
    nz = 0
    for j in range(W):
        if seed[j] != 0.0:
            nz += 1
    idx = np.empty(nz, dtype=np.int64)
    nz = 0
    for j in range(W):
        if seed[j] != 0.0:
            idx[nz] = j
            nz += 1
    cur = gam
    nxt = gam2
    if W < 3:
        for a_ in range(K - 1, -1, -1):
            base = a_ * W
            if want_grad:
                for j in range(W - 1):
                    gb[j] += store[base + j] * (cur[j + 1] - cur[j])
                for j in range(1, W):
                    gd[j] += store[base + j] * (cur[j - 1] - cur[j])
                if not top_is_cap:
                    gb[W - 1] -= store[base + W - 1] * cur[W - 1]
                if not bottom_is_zero:
                    gd[0] -= store[base] * cur[0]
            if a_ > 0 or finish:
                _step_backward(cur, nxt, p, q, d, W)
                wa = w[a_]
                for j in range(W):
                    nxt[j] += wa * seed[j]
                cur, nxt = nxt, cur
        return cur
    for a_ in range(K - 1, -1, -1):
        base = a_ * W
        g0 = cur[0]
        gl = cur[W - 1]
        if want_grad:
            # edges: size lo (j = 0) and size hi (j = W - 1)
            s0 = store[base]
            gb[0] += s0 * (cur[1] - g0)
            if not bottom_is_zero:
                gd[0] -= s0 * g0
            sl = store[base + W - 1]
            gd[W - 1] += sl * (cur[W - 2] - gl)
            if not top_is_cap:
                gb[W - 1] -= sl * gl
        if a_ == 0 and not finish:
            if want_grad:
                for j in range(1, W - 1):
                    sj = store[base + j]
                    gj = cur[j]
                    gb[j] += sj * (cur[j + 1] - gj)
                    gd[j] += sj * (cur[j - 1] - gj)
            break
        nxt[0] = d[0] * g0 + p[0] * cur[1]
        nxt[W - 1] = d[W - 1] * gl + q[W - 1] * cur[W - 2]
        if want_grad:
            for j in range(1, W - 1):
                sj = store[base + j]
                gj = cur[j]
                up = cur[j + 1]
                dn = cur[j - 1]
                gb[j] += sj * (up - gj)
                gd[j] += sj * (dn - gj)
                nxt[j] = d[j] * gj + p[j] * up + q[j] * dn
        else:
            for j in range(1, W - 1):
                nxt[j] = d[j] * cur[j] + p[j] * cur[j + 1] + q[j] * cur[j - 1]
        wa = w[a_]
        for k in range(nz):
            nxt[idx[k]] += wa * seed[idx[k]]
        cur, nxt = nxt, cur
    return cur


@njit(cache=True, nogil=True, fastmath=_FM)
def _rows_kernel(birth, death, N, lo, hi, starts, xs, Ks, wts, rows, leaked):
    W = hi - lo + 1
    p = np.empty(W)
    q = np.empty(W)
    d = np.empty(W)
    _window_steps(birth, death, lo, hi, N, p, q, d, 1.0, 1.0)
    nT = xs.shape[0]
    Kmax = 0
    for t in range(nT):
        if Ks[t] > Kmax:
            Kmax = Ks[t]
    a = np.empty(W)
    b = np.empty(W)
    for s in range(starts.shape[0]):
        a[:] = 0.0
        a[starts[s]] = 1.0
        cum = 0.0  # probability of having left the window within k steps
        for k in range(Kmax + 1):
            for t in range(nT):
                if k <= Ks[t]:
                    wk = wts[t, k]
                    if wk > 0.0:
                        for j in range(W):
                            rows[t, s, j] += wk * a[j]
                        leaked[t, s] += wk * cum
            if k == Kmax:
                break
            cum += a[0] * q[0] + a[W - 1] * p[W - 1]
            _step_forward(a, b, p, q, d, W)
            a, b = b, a


@njit(cache=True, nogil=True)
def _plan_groups(birth, death, N, g_lo, g_hi, g_dt, g_tail, g_bs, g_ds, Lams, Ks, rbs):
    G = g_lo.shape[0]
    maxW = 1
    for g in range(G):
        W = g_hi[g] - g_lo[g] + 1
        if W > maxW:
            maxW = W
    p = np.empty(maxW)
    q = np.empty(maxW)
    d = np.empty(maxW)
    for g in range(G):
        Lam = _window_steps(birth, death, g_lo[g], g_hi[g], N, p, q, d, g_bs[g], g_ds[g])
        K, rb = _poisson_extent(Lam * g_dt[g], g_tail[g])
        Lams[g] = Lam
        Ks[g] = K
        rbs[g] = rb


@njit(cache=True, nogil=True, fastmath=_FM)
def _pairs_kernel(birth, death, N, g_start, g_lo, g_hi, g_dt, g_tail, g_bs, g_ds,
                  e_ptr, e_end, e_mult, want_grad, linear,
                  out_prob, out_leak, out_leak_lo, out_leak_hi, out_drop, out_lam, out_steps,
                  g_off, out_gb, out_gd):
    """One forward sweep (and, for gradients, one backward sweep) per group (start, dt, window).

    out_prob[e]: windowed P(start -> end_e); out_leak[g]: window leak bound, split into the
    mass that left below (out_leak_lo) and above (out_leak_hi); out_drop[g]: dropped Poisson
    mass; out_gb/out_gd[g_off[g] + j]: ∂ Σ_e mult_e log P_e (or, with ``linear``,
    ∂ Σ_e mult_e P_e) / ∂ (scaled) rate at size lo+j (log: only where P_e > 0). Group g's
    rates are scaled by g_bs[g] (births) and g_ds[g] (deaths), see _window_steps.
    """
    G = g_start.shape[0]
    Lams = np.empty(G)
    Ks = np.empty(G, dtype=np.int64)
    rbs = np.empty(G)
    _plan_groups(birth, death, N, g_lo, g_hi, g_dt, g_tail, g_bs, g_ds, Lams, Ks, rbs)
    maxW = 1
    maxK = 0
    maxKW = 0
    for g in range(G):
        W = g_hi[g] - g_lo[g] + 1
        if W > maxW:
            maxW = W
        if Ks[g] > maxK:
            maxK = Ks[g]
        if (Ks[g] + 1) * W > maxKW:
            maxKW = (Ks[g] + 1) * W
    p = np.empty(maxW)
    q = np.empty(maxW)
    d = np.empty(maxW)
    w = np.empty(maxK + 1)
    if want_grad:
        store = np.empty(maxKW)
    else:
        store = np.empty(2 * maxW)
    gam = np.empty(maxW)
    gam2 = np.empty(maxW)
    seed = np.empty(maxW)
    for g in range(G):
        lo = g_lo[g]
        hi = g_hi[g]
        W = hi - lo + 1
        Lam = _window_steps(birth, death, lo, hi, N, p, q, d, g_bs[g], g_ds[g])
        K = Ks[g]
        x = Lam * g_dt[g]
        under = _poisson_weights(x, K, rbs[g], w, True)
        out_drop[g] = rbs[g] + under
        out_lam[g] = Lam
        out_steps[g] = K
        e0 = e_ptr[g]
        e1 = e_ptr[g + 1]
        for e in range(e0, e1):
            out_prob[e] = 0.0
        # forward sweep
        cur = 0
        for j in range(W):
            store[j] = 0.0
        store[g_start[g] - lo] = 1.0
        cum_lo = 0.0
        cum_hi = 0.0
        leak_lo = 0.0
        leak_hi = 0.0
        for k in range(K + 1):
            base = cur * W
            wk = w[k]
            if wk > 0.0:
                for e in range(e0, e1):
                    out_prob[e] += wk * store[base + e_end[e] - lo]
                leak_lo += wk * cum_lo
                leak_hi += wk * cum_hi
            if k == K:
                break
            cum_lo += store[base] * q[0]
            cum_hi += store[base + W - 1] * p[W - 1]
            nxt = cur + 1 if want_grad else 1 - cur
            a = store[base:base + W]
            b = store[nxt * W:nxt * W + W]
            _step_forward(a, b, p, q, d, W)
            cur = nxt
        out_leak_lo[g] = leak_lo
        out_leak_hi[g] = leak_hi
        out_leak[g] = leak_lo + leak_hi
        if not want_grad:
            continue
        # backward sweep seeded with g = Σ_e mult_e / P_e e_{end_e}
        any_seed = False
        for j in range(W):
            seed[j] = 0.0
        for e in range(e0, e1):
            if linear:
                seed[e_end[e] - lo] += e_mult[e]
                any_seed = True
            elif out_prob[e] > 0.0:
                seed[e_end[e] - lo] += e_mult[e] / out_prob[e]
                any_seed = True
        off = g_off[g]
        for j in range(W):
            out_gb[off + j] = 0.0
            out_gd[off + j] = 0.0
        if not any_seed or K == 0:
            continue
        for j in range(W):
            gam[j] = w[K] * seed[j]  # γ_{K-1}
        _adjoint_sweep(store, W, K, w, seed, p, q, d, gam, gam2, out_gb[off:off + W],
                       out_gd[off:off + W], hi == N, lo == 0, True, False)
        inv = 1.0 / Lam
        for j in range(W):
            out_gb[off + j] *= inv
            out_gd[off + j] *= inv


@njit(cache=True, nogil=True, fastmath=_FM)
def _hidden_kernel(birth, death, N, occ_ptr, a_lo, a_hi, le_ptr, log_emit,
                   iv_lo, iv_hi, iv_dt, iv_tail, want_grad,
                   out_logc, out_leak, out_leak_lo, out_leak_hi, out_drop, out_marg, out_gb, out_gd,
                   out_steps):
    """Forward–backward over hidden sizes for several independent series.

    Series s has occasions occ_ptr[s]..occ_ptr[s+1]-1. Occasion i allows hidden sizes
    a_lo[i]..a_hi[i], with log weights log_emit[le_ptr[i]:le_ptr[i+1]] (for the first
    occasion of a series these are log prior + log emission; the prior need not be
    normalised). Interval i (from occasion i-1 to i, i not first) uses the window
    iv_lo[i]..iv_hi[i] (which must contain both allowed ranges), duration iv_dt[i] and
    Poisson tail target iv_tail[i].

    out_logc[i]: log normaliser of occasion i (Σ over a series = its log-likelihood on the
    kept sizes and windows); out_leak[i], out_drop[i]: window leak and dropped Poisson mass
    of interval i relative to a unit-mass start; out_marg: posterior marginals of the
    hidden size (same layout as log_emit); out_gb/out_gd[s, n]: ∂ log-likelihood of series s
    / ∂ λ_n, μ_n.
    """
    S = occ_ptr.shape[0] - 1
    nI = a_lo.shape[0]
    Lams = np.zeros(nI)
    Ks = np.zeros(nI, dtype=np.int64)
    rbs = np.zeros(nI)
    maxW = 1
    for i in range(nI):
        W = iv_hi[i] - iv_lo[i] + 1
        if W > maxW:
            maxW = W
        A = a_hi[i] - a_lo[i] + 1
        if A > maxW:
            maxW = A
    p = np.empty(maxW)
    q = np.empty(maxW)
    d = np.empty(maxW)
    maxK = 0
    maxKW = 0
    for s in range(S):
        for i in range(occ_ptr[s] + 1, occ_ptr[s + 1]):
            Lam = _window_steps(birth, death, iv_lo[i], iv_hi[i], N, p, q, d, 1.0, 1.0)
            K, rb = _poisson_extent(Lam * iv_dt[i], iv_tail[i])
            Lams[i] = Lam
            Ks[i] = K
            rbs[i] = rb
            out_steps[i] = K
            if K > maxK:
                maxK = K
            W = iv_hi[i] - iv_lo[i] + 1
            if (K + 1) * W > maxKW:
                maxKW = (K + 1) * W
    w = np.empty(maxK + 1)
    store = np.empty(max(maxKW, 2 * maxW))
    row = np.empty(maxW)
    gam = np.empty(maxW)
    gam2 = np.empty(maxW)
    gtmp = np.empty(maxW)
    dtmp = np.empty(maxW)
    seed = np.empty(maxW)
    phi = np.empty(log_emit.shape[0])   # normalised forward vectors, layout of log_emit
    emit = np.empty(log_emit.shape[0])  # exp(log_emit - max) per occasion
    emax = np.empty(nI)
    for i in range(nI):
        m = -np.inf
        for k in range(le_ptr[i], le_ptr[i + 1]):
            if log_emit[k] > m:
                m = log_emit[k]
        emax[i] = m
        for k in range(le_ptr[i], le_ptr[i + 1]):
            emit[k] = math.exp(log_emit[k] - m) if m > -np.inf else 0.0
    for s in range(S):
        i0 = occ_ptr[s]
        i1 = occ_ptr[s + 1]
        # first occasion: prior × emission
        c = 0.0
        for k in range(le_ptr[i0], le_ptr[i0 + 1]):
            c += emit[k]
        out_logc[i0] = math.log(c) + emax[i0] if c > 0.0 else -np.inf
        out_leak[i0] = 0.0
        out_leak_lo[i0] = 0.0
        out_leak_hi[i0] = 0.0
        out_drop[i0] = 0.0
        for k in range(le_ptr[i0], le_ptr[i0 + 1]):
            phi[k] = emit[k] / c if c > 0.0 else 0.0
        dead = not (c > 0.0)
        # forward pass
        for i in range(i0 + 1, i1):
            if dead:
                out_logc[i] = -np.inf
                out_leak[i] = 0.0
                out_leak_lo[i] = 0.0
                out_leak_hi[i] = 0.0
                out_drop[i] = 0.0
                continue
            lo = iv_lo[i]
            hi = iv_hi[i]
            W = hi - lo + 1
            _window_steps(birth, death, lo, hi, N, p, q, d, 1.0, 1.0)
            K = Ks[i]
            x = Lams[i] * iv_dt[i]
            under = _poisson_weights(x, K, rbs[i], w, True)
            out_drop[i] = rbs[i] + under
            for j in range(W):
                store[j] = 0.0
                row[j] = 0.0
            off_prev = a_lo[i - 1] - lo
            for k in range(le_ptr[i - 1], le_ptr[i]):
                store[off_prev + k - le_ptr[i - 1]] = phi[k]
            cur = 0
            cum_lo = 0.0
            cum_hi = 0.0
            leak_lo = 0.0
            leak_hi = 0.0
            r0 = a_lo[i] - lo
            r1 = a_hi[i] - lo
            for k in range(K + 1):
                base = cur * W
                wk = w[k]
                if wk > 0.0:
                    for j in range(r0, r1 + 1):
                        row[j] += wk * store[base + j]
                    leak_lo += wk * cum_lo
                    leak_hi += wk * cum_hi
                if k == K:
                    break
                cum_lo += store[base] * q[0]
                cum_hi += store[base + W - 1] * p[W - 1]
                nxt = 1 - cur
                _step_forward(store[base:base + W], store[nxt * W:nxt * W + W], p, q, d, W)
                cur = nxt
            out_leak_lo[i] = leak_lo
            out_leak_hi[i] = leak_hi
            out_leak[i] = leak_lo + leak_hi
            c = 0.0
            for k in range(le_ptr[i], le_ptr[i + 1]):
                v = row[r0 + k - le_ptr[i]] * emit[k]
                phi[k] = v
                c += v
            if c > 0.0:
                out_logc[i] = math.log(c) + emax[i]
                for k in range(le_ptr[i], le_ptr[i + 1]):
                    phi[k] /= c
            else:
                out_logc[i] = -np.inf
                dead = True
        if dead:
            for k in range(le_ptr[i0], le_ptr[i1]):
                out_marg[k] = 0.0
            continue
        # backward pass: β̂ stored in out_marg temporarily (layout of log_emit)
        for k in range(le_ptr[i1 - 1], le_ptr[i1]):
            out_marg[k] = 1.0
        for i in range(i1 - 1, i0, -1):
            lo = iv_lo[i]
            hi = iv_hi[i]
            W = hi - lo + 1
            Lam = _window_steps(birth, death, lo, hi, N, p, q, d, 1.0, 1.0)
            K = Ks[i]
            x = Lam * iv_dt[i]
            _poisson_weights(x, K, rbs[i], w, True)
            ci = math.exp(out_logc[i] - emax[i])
            for j in range(W):
                seed[j] = 0.0
            r0 = a_lo[i] - lo
            for k in range(le_ptr[i], le_ptr[i + 1]):
                seed[r0 + k - le_ptr[i]] = emit[k] * out_marg[k] / ci
            # forward sweep from φ̂_{i-1}, stored
            for j in range(W):
                store[j] = 0.0
            off_prev = a_lo[i - 1] - lo
            for k in range(le_ptr[i - 1], le_ptr[i]):
                store[off_prev + k - le_ptr[i - 1]] = phi[k]
            if want_grad:
                for k in range(K):
                    _step_forward(store[k * W:k * W + W], store[(k + 1) * W:(k + 2) * W],
                                  p, q, d, W)
            # backward sweep: γ_{K-1} = w_K seed, ..., β = w_0 seed + B γ_0
            for j in range(W):
                gam[j] = w[K] * seed[j]
                gtmp[j] = 0.0
                dtmp[j] = 0.0
            beta = _adjoint_sweep(store, W, K, w, seed, p, q, d, gam, gam2, gtmp, dtmp,
                                  hi == N, lo == 0, want_grad, True)
            if want_grad:
                inv = 1.0 / Lam
                for j in range(W):
                    out_gb[s, lo + j] += gtmp[j] * inv
                    out_gd[s, lo + j] += dtmp[j] * inv
            # beta holds P seed = β̂_{i-1} on the window
            for k in range(le_ptr[i - 1], le_ptr[i]):
                out_marg[k] = beta[off_prev + k - le_ptr[i - 1]]
        for k in range(le_ptr[i0], le_ptr[i1]):
            out_marg[k] *= phi[k]


# --------------------------------------------------------------------------------------
# public interface
# --------------------------------------------------------------------------------------
def _check_window(lo: int, hi: int | None, N: int) -> tuple[int, int]:
    hi = N if hi is None else int(hi)
    lo = int(lo)
    if not 0 <= lo <= hi <= N:
        raise RateError(f"window must satisfy 0 ≤ lo ≤ hi ≤ N={N}, got lo={lo}, hi={hi}")
    return lo, hi


@dataclass(frozen=True)
class RowsResult:
    """Rows of P(t) on a window of sizes.

    Attributes:
        rows: shape (n_times, n_starts, hi-lo+1); rows[t, s, j] = P(size lo+j at
            times[t] | size starts[s] at 0), transitions leaving the window dropped
            (so each entry is ≤ the true value).
        leaked: shape (n_times, n_starts); rigorous bound on the probability that left
            the window plus the Poisson mass cut off, so that true P ≤ rows + leaked.
        dropped: shape (n_times,); the Poisson mass cut off (included in leaked).
        lo, hi: the window.
        rate: the uniformization rate Λ.
        steps: shape (n_times,); number of B-steps K used for each time.
    """

    rows: np.ndarray
    leaked: np.ndarray
    dropped: np.ndarray
    lo: int
    hi: int
    rate: float
    steps: np.ndarray


def transition_rows(birth: np.ndarray, death: np.ndarray, starts, times, lo: int = 0,
                    hi: int | None = None, *, tail: float = 1e-16, absolute: bool = False) -> RowsResult:
    """Rows of the transition matrix P(t) = exp(Qt), for several starts and times, on a window.

    All times share one sequence of steps α_k = e_s^T B^k; each time mixes its own
    Poisson weights.

    Args:
        birth: λ_n over sizes 0..N (birth[N] is ignored: the cap reflects).
        death: μ_n over sizes 0..N (death[0] must be 0).
        starts: start sizes, integers in lo..hi (scalar or 1-D).
        times: times ≥ 0 (scalar or 1-D).
        lo, hi: the window of sizes (default the whole range 0..N).
        tail: target for the Poisson mass cut off on the right, per time (> 0).
        absolute: only absolute accuracy is wanted (e.g. extinction probabilities): also cut
            Poisson weights below tail/(K+1) on the left, counted in ``dropped``; much faster
            for long intervals, but tiny entries lose their relative accuracy.

    Returns:
        RowsResult (see its docstring); on the whole range 0..N ``leaked`` holds only
        the cut Poisson mass.

    Raises:
        RateError: rates of different lengths, negative, not finite, death[0] ≠ 0, a bad
            window, a start outside the window, a negative or non-finite time, or tail ≤ 0.
    """
    b, m, N = check_rate_arrays(birth, death, min_sizes=1)
    lo, hi = _check_window(lo, hi, N)
    st = np.atleast_1d(np.asarray(starts))
    if st.ndim != 1 or (st.size and (not np.all(np.isfinite(st.astype(float)))
                                     or np.any(st.astype(float) != np.round(st.astype(float))))):
        raise RateError(f"starts must be integer sizes, got {starts!r}")
    st = st.astype(np.int64)
    if np.any(st < lo) or np.any(st > hi):
        raise RateError(f"starts must lie in the window {lo}..{hi}, got {st.tolist()}")
    ts = np.atleast_1d(np.asarray(times, dtype=np.float64))
    if ts.ndim != 1 or np.any(~np.isfinite(ts)) or np.any(ts < 0):
        raise RateError(f"times must be finite and ≥ 0, got {times!r}")
    if not tail > 0:
        raise RateError(f"tail must be > 0, got {tail!r}")
    W = hi - lo + 1
    p = np.empty(W)
    q = np.empty(W)
    d = np.empty(W)
    Lam = _window_steps(b, m, lo, hi, N, p, q, d, 1.0, 1.0)
    xs = Lam * ts
    Ks = np.zeros(ts.size, dtype=np.int64)
    rbs = np.zeros(ts.size)
    for t, x in enumerate(xs):
        Ks[t], rbs[t] = _poisson_extent(float(x), float(tail))
    Kmax = int(Ks.max()) if ts.size else 0
    wts = np.zeros((ts.size, Kmax + 1))
    dropped = np.zeros(ts.size)
    for t, x in enumerate(xs):
        under = _poisson_weights(float(x), int(Ks[t]), float(rbs[t]), wts[t], bool(absolute))
        dropped[t] = rbs[t] + under
    rows = np.zeros((ts.size, st.size, W))
    leaked = np.zeros((ts.size, st.size))
    if ts.size and st.size:
        _rows_kernel(b, m, N, lo, hi, st - lo, xs, Ks, wts, rows, leaked)
    leaked += dropped[:, None]
    return RowsResult(rows=rows, leaked=leaked, dropped=dropped, lo=lo, hi=hi, rate=float(Lam),
                      steps=Ks)


@dataclass(frozen=True)
class PairsResult:
    """Transition probabilities of grouped (start, end, dt) pairs and their gradients.

    Attributes:
        prob: shape (n_ends,); windowed P(start_g -> end_e over dt_g), ≤ the true value.
        leaked: shape (n_groups,); bound on the probability of leaving the group's window.
        leaked_low, leaked_high: the parts of ``leaked`` that left below and above.
        dropped: shape (n_groups,); Poisson mass cut off (true P ≤ prob + leaked + dropped).
        rate: shape (n_groups,); Λ per group.
        steps: shape (n_groups,); number of B-steps per group.
        grad_offsets: shape (n_groups + 1,); group g's gradient entries are
            grad_birth[grad_offsets[g]:grad_offsets[g+1]] for sizes lo_g..hi_g.
        grad_birth, grad_death: flat; ∂ Σ_e weight_e · log prob_e / ∂ λ_n, μ_n per group
            (pairs with prob 0 left out), or empty when gradients were not asked for.
    """

    prob: np.ndarray
    leaked: np.ndarray
    leaked_low: np.ndarray
    leaked_high: np.ndarray
    dropped: np.ndarray
    rate: np.ndarray
    steps: np.ndarray
    grad_offsets: np.ndarray
    grad_birth: np.ndarray
    grad_death: np.ndarray


def pair_log_likelihood_grad(birth: np.ndarray, death: np.ndarray, group_start, group_dt,
                             group_lo, group_hi, group_tail, end_ptr, end_size, end_weight,
                             *, grad: bool = True, linear: bool = False,
                             group_birth_scale=None, group_death_scale=None) -> PairsResult:
    """Windowed P(start -> end) for groups of pairs, and the adjoint gradient of Σ w log P.

    A group is one start size, one duration and one window; its ends share the group's
    forward sweep and (for gradients) one backward sweep seeded with Σ_e w_e / P_e e_end.
    All groups run in one compiled call. Λ is held fixed per group when differentiating
    (P(t) does not depend on Λ), so the gradient is that of the windowed probabilities.

    Args:
        birth, death: rates over sizes 0..N (birth[N] ignored, death[0] = 0).
        group_start: start size per group (int array).
        group_dt: duration per group (> 0).
        group_lo, group_hi: window per group; must contain the start and all ends.
        group_tail: Poisson tail target per group (> 0).
        end_ptr: CSR pointer, length n_groups + 1, into end_size / end_weight.
        end_size: end size per pair.
        end_weight: weight (e.g. multiplicity) of log P for each pair in the gradient.
        grad: compute gradients (one extra backward sweep per group, with the forward
            steps stored).
        linear: differentiate Σ w P instead of Σ w log P.
        group_birth_scale, group_death_scale: per group, factors on the births (not the
            immigration λ_0: λ'_n = λ_0 + (λ_n − λ_0)·s) and on the deaths (μ'_n = μ_n·s);
            default 1. A year's environment or a covariate moves a group's rates this way.
            The gradients are then with respect to the scaled rates.

    Returns:
        PairsResult.

    Raises:
        RateError: bad rates, windows that do not contain their pairs, dt ≤ 0 or tail ≤ 0,
            scales that are not finite and > 0, or a birth scale ≠ 1 with births below the
            immigration λ_0 (the scaled rate would be negative).
    """
    b, m, N = check_rate_arrays(birth, death, min_sizes=1)
    gs = np.ascontiguousarray(group_start, dtype=np.int64)
    gdt = np.ascontiguousarray(group_dt, dtype=np.float64)
    glo = np.ascontiguousarray(group_lo, dtype=np.int64)
    ghi = np.ascontiguousarray(group_hi, dtype=np.int64)
    gtail = np.ascontiguousarray(group_tail, dtype=np.float64)
    ep = np.ascontiguousarray(end_ptr, dtype=np.int64)
    ee = np.ascontiguousarray(end_size, dtype=np.int64)
    ew = np.ascontiguousarray(end_weight, dtype=np.float64)
    G = gs.size
    if not (gdt.size == glo.size == ghi.size == gtail.size == G and ep.size == G + 1
            and ee.size == ew.size == (ep[-1] if G else 0)):
        raise RateError("group and end arrays have inconsistent lengths")
    if G:
        if np.any(glo < 0) or np.any(ghi > N) or np.any(glo > gs) or np.any(gs > ghi):
            raise RateError("every group window must satisfy 0 ≤ lo ≤ start ≤ hi ≤ N")
        owner = np.repeat(np.arange(G), np.diff(ep))
        if np.any(ee < glo[owner]) or np.any(ee > ghi[owner]):
            raise RateError("every end size must lie in its group's window")
        if np.any(~(gdt > 0)) or np.any(~np.isfinite(gdt)):
            raise RateError("durations must be finite and > 0")
        if np.any(~(gtail > 0)):
            raise RateError("tail targets must be > 0")
    widths = ghi - glo + 1
    off = np.zeros(G + 1, dtype=np.int64)
    np.cumsum(widths, out=off[1:])
    prob = np.zeros(ee.size)
    leak = np.zeros(G)
    leak_lo = np.zeros(G)
    leak_hi = np.zeros(G)
    drop = np.zeros(G)
    lam = np.zeros(G)
    steps = np.zeros(G, dtype=np.int64)
    nflat = int(off[-1]) if grad else 0
    gb = np.zeros(nflat)
    gd = np.zeros(nflat)
    gbs = np.ones(G) if group_birth_scale is None else np.ascontiguousarray(group_birth_scale, dtype=np.float64)
    gds = np.ones(G) if group_death_scale is None else np.ascontiguousarray(group_death_scale, dtype=np.float64)
    if gbs.shape != (G,) or gds.shape != (G,) or not (np.all(np.isfinite(gbs)) and np.all(gbs > 0)
                                                       and np.all(np.isfinite(gds)) and np.all(gds > 0)):
        raise RateError("group rate scales must be finite and > 0, one per group")
    if np.any(gbs != 1.0) and np.any(b[:-1] < b[0]):
        n = int(np.flatnonzero(b[:-1] < b[0])[0])
        raise RateError(f"birth rate at size {n} is below the immigration rate λ_0 = {b[0]!r}: births "
                        "cannot be scaled", name="birth", size=n, value=float(b[n]))
    if G:
        _pairs_kernel(b, m, N, gs, glo, ghi, gdt, gtail, gbs, gds, ep, ee, ew, bool(grad), bool(linear),
                      prob, leak, leak_lo, leak_hi, drop, lam, steps, off, gb, gd)
    return PairsResult(prob=prob, leaked=leak, leaked_low=leak_lo, leaked_high=leak_hi, dropped=drop,
                       rate=lam, steps=steps, grad_offsets=off, grad_birth=gb, grad_death=gd)


def weighted_transition_grad(birth: np.ndarray, death: np.ndarray, starts, ends, weights, t: float,
                             lo: int = 0, hi: int | None = None, *,
                             tail: float = 1e-16) -> tuple[float, np.ndarray, np.ndarray, float]:
    """Σ_{s,e} G_{se} P_{starts[s], ends[e]}(t) on a window, with its gradient (matrix adjoint).

    Args:
        birth, death: rates over sizes 0..N.
        starts, ends: sizes (in lo..hi).
        weights: G, shape (len(starts), len(ends)).
        t: time > 0.
        lo, hi: the window (default the whole range).
        tail: Poisson tail target.

    Returns:
        (value, d_birth, d_death, bound): gradients over sizes 0..N; ``bound`` bounds the
        error of ``value`` from the window and the cut Poisson tail (Σ_se |G_se| (leak_s + drop_s)).

    Raises:
        RateError: bad rates, window, sizes or weights.
    """
    b, m, N = check_rate_arrays(birth, death, min_sizes=1)
    lo, hi = _check_window(lo, hi, N)
    st = np.atleast_1d(np.asarray(starts, dtype=np.int64))
    en = np.atleast_1d(np.asarray(ends, dtype=np.int64))
    g = np.asarray(weights, dtype=float)
    if g.shape != (st.size, en.size) or not np.all(np.isfinite(g)):
        raise RateError(f"weights must be finite with shape ({st.size}, {en.size}), got {g.shape}")
    S = st.size
    r = pair_log_likelihood_grad(b, m, st, np.full(S, float(t)), np.full(S, lo), np.full(S, hi),
                                 np.full(S, float(tail)), np.arange(S + 1) * en.size, np.tile(en, S),
                                 g.ravel(), grad=True, linear=True)
    value = float(np.dot(r.prob, g.ravel()))
    d_birth = np.zeros(N + 1)
    d_death = np.zeros(N + 1)
    for k in range(S):
        a, z = r.grad_offsets[k], r.grad_offsets[k + 1]
        d_birth[lo:hi + 1] += r.grad_birth[a:z]
        d_death[lo:hi + 1] += r.grad_death[a:z]
    bound = float(np.sum(np.abs(g).sum(axis=1) * (r.leaked + r.dropped)))
    return value, d_birth, d_death, bound


@dataclass(frozen=True)
class HiddenResult:
    """Forward–backward over hidden sizes (see hidden_forward_backward).

    Attributes:
        log_norm: per occasion, the log normaliser; their sum over a series is its
            log-likelihood on the kept sizes and windows.
        leaked: per occasion (0 for a series' first), the window leak of the interval
            ending there, relative to a unit-mass start.
        leaked_low, leaked_high: the parts of ``leaked`` that left below and above.
        dropped: per occasion, Poisson mass cut off for that interval.
        marginals: posterior probability of each allowed hidden size (layout of log_weight).
        grad_birth, grad_death: shape (n_series, N+1); gradients of each series'
            log-likelihood (zeros when not asked for).
        steps: per occasion, B-steps used for the interval ending there.
    """

    log_norm: np.ndarray
    leaked: np.ndarray
    leaked_low: np.ndarray
    leaked_high: np.ndarray
    dropped: np.ndarray
    marginals: np.ndarray
    grad_birth: np.ndarray
    grad_death: np.ndarray
    steps: np.ndarray


def hidden_forward_backward(birth: np.ndarray, death: np.ndarray, series_ptr, size_lo, size_hi,
                            weight_ptr, log_weight, window_lo, window_hi, dt, tail,
                            *, grad: bool = True) -> HiddenResult:
    """Forward algorithm in scaled form over hidden sizes, with its adjoint gradient.

    For each series the hidden size at occasion i lies in size_lo[i]..size_hi[i] and has
    log weight log_weight[weight_ptr[i]:weight_ptr[i+1]] (the emission; at a series'
    first occasion, log prior + emission). Between occasions the hidden size moves by
    the windowed transition matrix over window_lo[i]..window_hi[i] for time dt[i]. The
    gradient of φ^T P ψ is taken by one forward sweep from the forward vector φ and one
    backward sweep seeded with ψ (the emission times the backward vector), which is the
    matrix adjoint with the rank-one weight matrix the forward algorithm produces.

    Args:
        birth, death: rates over sizes 0..N.
        series_ptr: occasions of series s are series_ptr[s]..series_ptr[s+1]-1.
        size_lo, size_hi: allowed hidden sizes per occasion.
        weight_ptr, log_weight: CSR log weights per occasion (-inf allowed).
        window_lo, window_hi, dt, tail: per occasion, the interval that ends there
            (ignored for a series' first occasion); windows must contain the allowed
            sizes of both ends; dt > 0; tail > 0.
        grad: compute gradients w.r.t. the rates.

    Returns:
        HiddenResult.

    Raises:
        RateError: bad rates or inconsistent arrays (windows not containing allowed sizes,
            non-positive dt).
    """
    b, m, N = check_rate_arrays(birth, death, min_sizes=1)
    sp = np.ascontiguousarray(series_ptr, dtype=np.int64)
    alo = np.ascontiguousarray(size_lo, dtype=np.int64)
    ahi = np.ascontiguousarray(size_hi, dtype=np.int64)
    wp = np.ascontiguousarray(weight_ptr, dtype=np.int64)
    lw = np.ascontiguousarray(log_weight, dtype=np.float64)
    wlo = np.ascontiguousarray(window_lo, dtype=np.int64)
    whi = np.ascontiguousarray(window_hi, dtype=np.int64)
    tdt = np.ascontiguousarray(dt, dtype=np.float64)
    tl = np.ascontiguousarray(tail, dtype=np.float64)
    nI = alo.size
    S = sp.size - 1
    if not (ahi.size == wlo.size == whi.size == tdt.size == tl.size == nI and wp.size == nI + 1
            and sp[0] == 0 and sp[-1] == nI and np.all(np.diff(sp) >= 1)):
        raise RateError("hidden-size arrays have inconsistent lengths")
    if np.any(alo < 0) or np.any(ahi > N) or np.any(alo > ahi) or np.any(np.diff(wp) != ahi - alo + 1):
        raise RateError("allowed hidden sizes must satisfy 0 ≤ lo ≤ hi ≤ N with one weight each")
    first = np.zeros(nI, dtype=bool)
    first[sp[:-1]] = True
    rest = np.flatnonzero(~first)
    if rest.size:
        if (np.any(wlo[rest] < 0) or np.any(whi[rest] > N)
                or np.any(wlo[rest] > np.minimum(alo[rest], alo[rest - 1]))
                or np.any(whi[rest] < np.maximum(ahi[rest], ahi[rest - 1]))):
            raise RateError("each interval's window must contain the allowed sizes at both ends")
        if np.any(~(tdt[rest] > 0)) or np.any(~np.isfinite(tdt[rest])) or np.any(~(tl[rest] > 0)):
            raise RateError("interval durations and tail targets must be > 0")
    logc = np.zeros(nI)
    leak = np.zeros(nI)
    leak_lo = np.zeros(nI)
    leak_hi = np.zeros(nI)
    drop = np.zeros(nI)
    marg = np.zeros(lw.size)
    gb = np.zeros((S, N + 1))
    gd = np.zeros((S, N + 1))
    steps = np.zeros(nI, dtype=np.int64)
    _hidden_kernel(b, m, N, sp, alo, ahi, wp, lw, wlo, whi, tdt, tl, bool(grad),
                   logc, leak, leak_lo, leak_hi, drop, marg, gb, gd, steps)
    return HiddenResult(log_norm=logc, leaked=leak, leaked_low=leak_lo, leaked_high=leak_hi, dropped=drop,
                        marginals=marg, grad_birth=gb, grad_death=gd, steps=steps)
