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

Far jumps (a probability far below the smallest double, ~1e-308) are swept in log space
(_pairs_log_kernel, chosen per group by ``group_log_space``): every entry of α_k and of
the adjoint γ_a is kept as its logarithm, the Poisson weights are exact logarithms on both
sides of the mode, and the number of steps is chosen during the sweep so that the Poisson
mass cut off is within a given fraction of each end's own probability — the mass towards
a far endpoint lies in the right tail of the Poisson weights. Nothing underflows, so the
probability, its window leaks (the error bound) and the gradient of Σ w log P all keep
their relative accuracy; the price is a few tens of times the cost of a plain step, so
only the groups that need it pay it.

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


# --------------------------------------------------------------------------------------
# log-space sweeps: every entry of α_k (and of the adjoint γ_a) kept as its logarithm
# --------------------------------------------------------------------------------------
@njit(cache=True, nogil=True, inline="always")
def _lae(a, b):
    """log(e^a + e^b), exact for -inf."""
    if a < b:
        a, b = b, a
    if b == -np.inf:
        return a
    return a + math.log1p(math.exp(b - a))


@njit(cache=True, nogil=True, inline="always")
def _lse3(a, b, c):
    """log(e^a + e^b + e^c), exact for -inf."""
    if a >= b and a >= c:
        m, u, v = a, b, c
    elif b >= c:
        m, u, v = b, a, c
    else:
        m, u, v = c, a, b
    if m == -np.inf:
        return m
    return m + math.log(1.0 + math.exp(u - m) + math.exp(v - m))


@njit(cache=True, nogil=True)
def _log_poisson_weights(x, size):
    """log Pois(k; x) for k = 0..size-1, by the ratio recursion from the mode.

    The recursion from the mode keeps each weight to a few ulps of its logarithm; the
    weights are then shifted so that the bulk (everything up to where the tail is below
    1e-300) sums to 1, which removes the rounding of the mode's own lgamma.
    """
    K0, _ = _poisson_extent(x, 1e-300)
    n = max(size, K0 + 2)
    lw = np.empty(n)
    mode = int(math.floor(x))
    lx = math.log(x)
    lw[mode] = mode * lx - x - math.lgamma(mode + 1.0)
    for k in range(mode + 1, n):
        lw[k] = lw[k - 1] + lx - math.log(k)
    for k in range(mode - 1, -1, -1):
        lw[k] = lw[k + 1] + math.log(k + 1.0) - lx
    top = lw[mode]
    s = 0.0
    for k in range(K0 + 1):
        s += math.exp(lw[k] - top)
    shift = top + math.log(s)
    for k in range(n):
        lw[k] -= shift
    return lw


@njit(cache=True, nogil=True)
def _extend_log_weights(lw, x, size):
    """lw continued by the ratio recursion to at least ``size`` entries (doubling)."""
    n = lw.shape[0]
    if size <= n:
        return lw
    m = max(size, 2 * n)
    out = np.empty(m)
    out[:n] = lw
    lx = math.log(x)
    for k in range(n, m):
        out[k] = out[k - 1] + lx - math.log(k)
    return out


@njit(cache=True, nogil=True)
def _log_step_forward(a, b, lp, lq, ld, n0, n1, W):
    """b[n0..n1] = log of (e^a B) on the window, a and b in log space (-inf outside the support)."""
    for j in range(n0, n1 + 1):
        x0 = a[j] + ld[j]
        x1 = a[j - 1] + lp[j - 1] if j > 0 else -np.inf
        x2 = a[j + 1] + lq[j + 1] if j < W - 1 else -np.inf
        b[j] = _lse3(x0, x1, x2)


@njit(cache=True, nogil=True)
def _pairs_log_kernel(birth, death, N, g_start, g_lo, g_hi, g_dt, g_rel, g_kmax, g_bs, g_ds,
                      e_ptr, e_end, e_mult, want_grad,
                      out_lprob, out_lleak_lo, out_lleak_hi, out_ldrop, out_lam, out_steps,
                      g_off, out_gb, out_gd):
    """The sweeps of _pairs_kernel with every vector entry kept as its logarithm.

    Nothing underflows, so the probability of a far jump (far below the smallest double)
    keeps its relative accuracy, and so do the window leaks that bound it. The Poisson
    weights are exact logarithms on both sides of the mode (no left cut), and the number
    of steps is chosen during the sweep: it stops at the first K (past Λt) where the
    Poisson mass beyond K is at most g_rel[g] times the smallest end probability so far
    (which only grows), so the cut mass is within g_rel of every end's final probability
    however far in the right tail the mass towards the endpoint lies; g_kmax[g] caps K.
    Outputs are logarithms: out_lprob per end, out_lleak_lo/hi and out_ldrop per group.
    Gradients (of Σ_e mult_e log P_e, mult_e ≥ 0) are the adjoint of the computed sum,
    with γ_a in log space too; each term α_a[i] B_ij γ_a[j] is a share of one end's
    probability, so the products exp(log α + log γ) are ordinary numbers.
    """
    G = g_start.shape[0]
    maxW = 1
    for g in range(G):
        W = g_hi[g] - g_lo[g] + 1
        if W > maxW:
            maxW = W
    p = np.empty(maxW)
    q = np.empty(maxW)
    d = np.empty(maxW)
    lp = np.empty(maxW)
    lq = np.empty(maxW)
    ld = np.empty(maxW)
    buf0 = np.empty(maxW)
    buf1 = np.empty(maxW)
    gam = np.empty(maxW)
    gam2 = np.empty(maxW)
    lseed = np.empty(maxW)
    for g in range(G):
        lo = g_lo[g]
        hi = g_hi[g]
        W = hi - lo + 1
        Lam = _window_steps(birth, death, lo, hi, N, p, q, d, g_bs[g], g_ds[g])
        for j in range(W):
            lp[j] = math.log(p[j]) if p[j] > 0.0 else -np.inf
            lq[j] = math.log(q[j]) if q[j] > 0.0 else -np.inf
            ld[j] = math.log(d[j]) if d[j] > 0.0 else -np.inf
        x = Lam * g_dt[g]
        s0 = g_start[g] - lo
        e0 = e_ptr[g]
        e1 = e_ptr[g + 1]
        dist = 0
        for e in range(e0, e1):
            out_lprob[e] = -np.inf
            dd = abs(e_end[e] - lo - s0)
            if dd > dist:
                dist = dd
        kmax = g_kmax[g]
        cap = int(x + 10.0 * math.sqrt(x) + 20.0)
        if 2 * dist + 20 > cap:
            cap = 2 * dist + 20
        if cap > kmax:
            cap = kmax
        lw = _log_poisson_weights(x, cap + 2)
        lrel = math.log(g_rel[g])
        if want_grad:
            store = np.empty((cap + 1) * W)
        else:
            store = np.empty(0)
        row = store[0:W] if want_grad else buf0
        for j in range(W):
            row[j] = -np.inf
            buf1[j] = -np.inf
        row[s0] = 0.0
        r0 = s0
        r1 = s0
        lcum_lo = -np.inf
        lcum_hi = -np.inf
        leak_lo = -np.inf
        leak_hi = -np.inf
        k = 0
        ldrop = 0.0
        while True:
            lwk = lw[k]
            for e in range(e0, e1):
                j = e_end[e] - lo
                if r0 <= j <= r1:
                    out_lprob[e] = _lae(out_lprob[e], lwk + row[j])
            leak_lo = _lae(leak_lo, lwk + lcum_lo)
            leak_hi = _lae(leak_hi, lwk + lcum_hi)
            if k + 2.0 > x:
                if k + 2 >= lw.shape[0]:
                    lw = _extend_log_weights(lw, x, k + 3)
                lrb = lw[k + 1] - math.log1p(-x / (k + 2.0))
                pm = np.inf
                for e in range(e0, e1):
                    if out_lprob[e] < pm:
                        pm = out_lprob[e]
                if lrb <= lrel + pm or k >= kmax:
                    ldrop = lrb
                    break
            elif k >= kmax:
                ldrop = 0.0  # the cut is left of the mode: bound by the whole mass
                break
            if r0 == 0:
                lcum_lo = _lae(lcum_lo, row[0] + lq[0])
            if r1 == W - 1:
                lcum_hi = _lae(lcum_hi, row[W - 1] + lp[W - 1])
            n0 = r0 - 1 if r0 > 0 else 0
            n1 = r1 + 1 if r1 < W - 1 else W - 1
            if want_grad:
                if (k + 2) * W > store.shape[0]:
                    grown = np.empty(2 * store.shape[0])
                    grown[:(k + 1) * W] = store[:(k + 1) * W]
                    store = grown
                nrow = store[(k + 1) * W:(k + 2) * W]
                for j in range(W):
                    nrow[j] = -np.inf
                row = store[k * W:(k + 1) * W]
            else:
                nrow = buf1 if k % 2 == 0 else buf0
            _log_step_forward(row, nrow, lp, lq, ld, n0, n1, W)
            row = nrow
            r0 = n0
            r1 = n1
            k += 1
        K = k
        out_lleak_lo[g] = leak_lo
        out_lleak_hi[g] = leak_hi
        out_ldrop[g] = ldrop
        out_lam[g] = Lam
        out_steps[g] = K
        if not want_grad:
            continue
        off = g_off[g]
        for j in range(W):
            out_gb[off + j] = 0.0
            out_gd[off + j] = 0.0
            lseed[j] = -np.inf
            gam[j] = -np.inf
            gam2[j] = -np.inf
        smin = W
        smax = -1
        for e in range(e0, e1):
            if e_mult[e] > 0.0 and out_lprob[e] > -np.inf:
                j = e_end[e] - lo
                lseed[j] = _lae(lseed[j], math.log(e_mult[e]) - out_lprob[e])
                if j < smin:
                    smin = j
                if j > smax:
                    smax = j
        if smax < 0 or K == 0:
            continue
        for j in range(smin, smax + 1):
            gam[j] = lw[K] + lseed[j]  # γ_{K-1}
        gb = out_gb[off:off + W]
        gd = out_gd[off:off + W]
        top_open = hi != N
        bottom_open = lo != 0
        for a_ in range(K - 1, -1, -1):
            row = store[a_ * W:(a_ + 1) * W]
            spread = K - 1 - a_
            c0 = smin - spread if smin - spread > 0 else 0
            c1 = smax + spread if smax + spread < W - 1 else W - 1
            j0 = s0 - a_ if s0 - a_ > 0 else 0
            j1 = s0 + a_ if s0 + a_ < W - 1 else W - 1
            if c0 - 1 > j0:
                j0 = c0 - 1
            if c1 + 1 < j1:
                j1 = c1 + 1
            for j in range(j0, j1 + 1):
                la = row[j]
                if la == -np.inf:
                    continue
                ts = math.exp(la + gam[j])
                if j < W - 1:
                    gb[j] += math.exp(la + gam[j + 1]) - ts
                elif top_open:
                    gb[j] -= ts
                if j > 0:
                    gd[j] += math.exp(la + gam[j - 1]) - ts
                elif bottom_open:
                    gd[j] -= ts
            if a_ == 0:
                break
            n0 = c0 - 1 if c0 > 0 else 0
            n1 = c1 + 1 if c1 < W - 1 else W - 1
            for j in range(n0, n1 + 1):
                x0 = ld[j] + gam[j]
                x1 = lp[j] + gam[j + 1] if j < W - 1 else -np.inf
                x2 = lq[j] + gam[j - 1] if j > 0 else -np.inf
                gam2[j] = _lse3(x0, x1, x2)
            lwa = lw[a_]
            for j in range(smin, smax + 1):
                if lseed[j] > -np.inf:
                    gam2[j] = _lae(gam2[j], lwa + lseed[j])
            gam, gam2 = gam2, gam
        inv = 1.0 / Lam
        for j in range(W):
            gb[j] *= inv
            gd[j] *= inv


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
        log_prob: shape (n_ends,); log of the windowed probability, finite wherever it is
            positive however small (``prob`` = exp(log_prob) underflows to 0 below ~1e-308).
        log_leaked_low, log_leaked_high, log_dropped: shape (n_groups,); logs of
            ``leaked_low``, ``leaked_high`` and ``dropped`` (-inf for 0), kept in log space
            for log-space groups.
        log_space: shape (n_groups,); which groups were swept in log space.
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
    log_prob: np.ndarray
    log_leaked_low: np.ndarray
    log_leaked_high: np.ndarray
    log_dropped: np.ndarray
    log_space: np.ndarray


def _log0(x: np.ndarray) -> np.ndarray:
    """log x with log 0 = -inf and no warning."""
    with np.errstate(divide="ignore"):
        return np.log(x)


def _group_subset(sel: np.ndarray, ep: np.ndarray, off: np.ndarray) -> tuple[np.ndarray, np.ndarray,
                                                                          np.ndarray, np.ndarray]:
    """End indices, CSR pointer, flat gradient indices and gradient offsets of the groups ``sel``."""
    cnt = ep[sel + 1] - ep[sel]
    sub_ep = np.zeros(sel.size + 1, dtype=np.int64)
    np.cumsum(cnt, out=sub_ep[1:])
    eidx = (np.concatenate([np.arange(ep[g], ep[g + 1]) for g in sel]) if sel.size
            else np.zeros(0, dtype=np.int64))
    wid = off[sel + 1] - off[sel]
    sub_off = np.zeros(sel.size + 1, dtype=np.int64)
    np.cumsum(wid, out=sub_off[1:])
    gidx = (np.concatenate([np.arange(off[g], off[g + 1]) for g in sel]) if sel.size
            else np.zeros(0, dtype=np.int64))
    return eidx.astype(np.int64), sub_ep, gidx.astype(np.int64), sub_off


def pair_log_likelihood_grad(birth: np.ndarray, death: np.ndarray, group_start, group_dt,
                             group_lo, group_hi, group_tail, end_ptr, end_size, end_weight,
                             *, grad: bool = True, linear: bool = False,
                             group_birth_scale=None, group_death_scale=None,
                             group_log_space=None, group_relative_tail=None,
                             group_max_steps=None) -> PairsResult:
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
        group_log_space: per group, sweep in log space (every vector entry kept as its
            logarithm, see _pairs_log_kernel): probabilities far below the smallest double
            stay finite and keep their relative accuracy, at a few tens of times the cost
            of a plain sweep. Default: no group. Not with ``linear``; weights must be ≥ 0.
        group_relative_tail: per group, for log-space groups: the Poisson mass cut off on
            the right is at most this fraction of the group's smallest end probability
            (the number of steps is chosen during the sweep); ``group_tail`` is not used
            for them. Default 1e-12.
        group_max_steps: per group, most steps a log-space sweep may take (default 10⁷);
            where it stops early the cut mass is reported in ``dropped`` as it is.

    Returns:
        PairsResult.

    Raises:
        RateError: bad rates, windows that do not contain their pairs, dt ≤ 0 or tail ≤ 0,
            scales that are not finite and > 0, or a birth scale ≠ 1 with births below the
            immigration λ_0 (the scaled rate would be negative); log-space groups with
            ``linear``, with negative weights, relative tails not in (0, 1) or step limits < 1.
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
    logsp = np.zeros(G, dtype=bool) if group_log_space is None else np.asarray(group_log_space, dtype=bool)
    if logsp.shape != (G,):
        raise RateError("group_log_space must have one flag per group")
    any_log = group_log_space is not None and bool(logsp.any())
    if any_log:
        rel = (np.full(G, 1e-12) if group_relative_tail is None
               else np.ascontiguousarray(group_relative_tail, dtype=np.float64))
        kmax = (np.full(G, 10 ** 7, dtype=np.int64) if group_max_steps is None
                else np.ascontiguousarray(group_max_steps, dtype=np.int64))
        if linear:
            raise RateError("log-space sweeps differentiate Σ w log P; linear=True needs plain sweeps")
        if rel.shape != (G,) or kmax.shape != (G,) or np.any(~((rel > 0) & (rel < 1))[logsp]) \
                or np.any(kmax[logsp] < 1):
            raise RateError("relative tails must lie in (0, 1) and step limits be ≥ 1, one per group")
        owner = np.repeat(np.arange(G), np.diff(ep))
        if np.any(ew[logsp[owner]] < 0):
            raise RateError("log-space groups need end weights ≥ 0")
    if not any_log:  # plain sweeps only (the ordinary case): logs taken once at the end
        if G:
            _pairs_kernel(b, m, N, gs, glo, ghi, gdt, gtail, gbs, gds, ep, ee, ew, bool(grad), bool(linear),
                          prob, leak, leak_lo, leak_hi, drop, lam, steps, off, gb, gd)
        with np.errstate(divide="ignore"):
            return PairsResult(prob=prob, leaked=leak, leaked_low=leak_lo, leaked_high=leak_hi, dropped=drop,
                               rate=lam, steps=steps, grad_offsets=off, grad_birth=gb, grad_death=gd,
                               log_prob=np.log(prob), log_leaked_low=np.log(leak_lo),
                               log_leaked_high=np.log(leak_hi), log_dropped=np.log(drop), log_space=logsp)
    # plain and log-space groups: each kind in its own compiled call, results put back in place
    lprob = np.full(ee.size, -np.inf)
    lleak_lo = np.full(G, -np.inf)
    lleak_hi = np.full(G, -np.inf)
    ldrop = np.full(G, -np.inf)
    for in_log in (False, True):
        sel = np.flatnonzero(logsp == in_log)
        if not sel.size:
            continue
        eidx, sep, gidx, soff = _group_subset(sel, ep, off)
        s_gb = np.zeros(int(soff[-1]) if grad else 0)
        s_gd = np.zeros_like(s_gb)
        s_lam = np.zeros(sel.size)
        s_steps = np.zeros(sel.size, dtype=np.int64)
        if in_log:
            s_lp = np.zeros(eidx.size)
            s_llo, s_lhi, s_ldr = np.zeros(sel.size), np.zeros(sel.size), np.zeros(sel.size)
            _pairs_log_kernel(b, m, N, gs[sel], glo[sel], ghi[sel], gdt[sel], rel[sel], kmax[sel],
                              gbs[sel], gds[sel], sep, ee[eidx], ew[eidx], bool(grad),
                              s_lp, s_llo, s_lhi, s_ldr, s_lam, s_steps, soff, s_gb, s_gd)
            lprob[eidx] = s_lp
            lleak_lo[sel], lleak_hi[sel], ldrop[sel] = s_llo, s_lhi, s_ldr
            prob[eidx] = np.exp(s_lp)
            leak_lo[sel], leak_hi[sel], drop[sel] = np.exp(s_llo), np.exp(s_lhi), np.exp(s_ldr)
            leak[sel] = leak_lo[sel] + leak_hi[sel]
        else:
            s_p = np.zeros(eidx.size)
            s_lk, s_llo, s_lhi, s_dr = (np.zeros(sel.size) for _ in range(4))
            _pairs_kernel(b, m, N, gs[sel], glo[sel], ghi[sel], gdt[sel], gtail[sel], gbs[sel], gds[sel],
                          sep, ee[eidx], ew[eidx], bool(grad), bool(linear),
                          s_p, s_lk, s_llo, s_lhi, s_dr, s_lam, s_steps, soff, s_gb, s_gd)
            prob[eidx] = s_p
            leak[sel], leak_lo[sel], leak_hi[sel], drop[sel] = s_lk, s_llo, s_lhi, s_dr
        lam[sel] = s_lam
        steps[sel] = s_steps
        if grad:
            gb[gidx] = s_gb
            gd[gidx] = s_gd
    plain = ~logsp
    owner_plain = plain[owner]
    lprob[owner_plain] = _log0(prob[owner_plain])
    lleak_lo[plain], lleak_hi[plain], ldrop[plain] = _log0(leak_lo[plain]), _log0(leak_hi[plain]), _log0(drop[plain])
    return PairsResult(prob=prob, leaked=leak, leaked_low=leak_lo, leaked_high=leak_hi, dropped=drop,
                       rate=lam, steps=steps, grad_offsets=off, grad_birth=gb, grad_death=gd,
                       log_prob=lprob, log_leaked_low=lleak_lo, log_leaked_high=lleak_hi,
                       log_dropped=ldrop, log_space=logsp)


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
