"""The annual matrix under environmental variation and the solves on it (see chain.environment).

The Gauss–Hermite nodes, the window, P̄ itself, its iteration over years, and the compiled
pieces. One year of one environment node: uniformize over a short time τ = 2^-s (so that Λτ is a
few units and the Poisson sum needs a few dozen steps of a banded matrix), then square s
times. Every quantity is a sum of products of non-negative numbers, so each entry keeps
its relative accuracy (first-order bound tracked in ``rel``), and the mass that leaves the
window at its top or is cut from the Poisson tail is carried explicitly as a deficit
vector δ: for P(τ), δ_i = Σ_k w_k (mass lost within k steps) + (Poisson mass cut); for a
square, δ(P²) = δ + P δ (lost in the first half, or kept and lost in the second).

The M-matrix solves (mean times, quasi-stationary inverse iteration) eliminate in the way
of Grassmann, Taksar & Heyman (1985): pivots are recomputed as sums of non-negative terms
(the row sums s of A = I − T are carried, never obtained by cancellation), so tiny
extinction probabilities per year still give accurate mean times.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from numba import njit

from .errors import ChainError
from .uniformization import _FM, _poisson_extent, _poisson_weights, _window_steps, transition_rows

#: Unit roundoff of float64.
UNIT = 2.0 ** -53
#: Λτ of one uniformization piece (then squared up to a year): fastest in bench/environment_bench.py.
REACH = 2.0
#: Poisson mass cut per node and year.
POISSON_TAIL = 1e-20
AFFECTS = ("birth", "birth_and_death")


@njit(cache=True, nogil=True, fastmath=_FM)
def _band_step(M, M2, p, q, d, W, k, later_k, delta):
    """M2 = M B for rows whose support is i-k..i+k (outside it M is 0); δ_i += lost_i · later_k."""
    for i in range(W):
        delta[i] += (M[i, W - 1] * p[W - 1] + M[i, 0] * q[0]) * later_k
        b0 = max(0, i - k - 1)
        b1 = min(W - 1, i + k + 1)
        if b0 == 0:
            M2[i, 0] = M[i, 0] * d[0] + (M[i, 1] * q[1] if W > 1 else 0.0)
        if b1 == W - 1 and W > 1:
            M2[i, W - 1] = M[i, W - 1] * d[W - 1] + M[i, W - 2] * p[W - 2]
        Mi = M[i]
        M2i = M2[i]
        for j in range(max(b0, 1), min(b1, W - 2) + 1):
            M2i[j] = Mi[j] * d[j] + Mi[j - 1] * p[j - 1] + Mi[j + 1] * q[j + 1]


@njit(cache=True, nogil=True)
def _node_year(birth, death, N, lo, hi, n_abs, bs, ds, reach, tail, P, delta, M, M2, p, q, d):
    """One year of one node into P (W×W, window lo..hi) and its deficit δ.

    Sizes lo..lo+n_abs-1 are made absorbing. Returns (relative rounding bound, Λ, squarings,
    Poisson steps).
    """
    W = hi - lo + 1
    Lam = _window_steps(birth, death, lo, hi, N, p, q, d, bs, ds)
    for j in range(n_abs):
        p[j] = 0.0
        q[j] = 0.0
        d[j] = 1.0
    s = 0
    while Lam / 2.0 ** s > reach:
        s += 1
    x = Lam / 2.0 ** s
    K, rb = _poisson_extent(x, tail / 2.0 ** s)
    w = np.empty(K + 1)
    dropped = rb + _poisson_weights(x, K, rb, w, False)
    later = np.zeros(K + 1)  # later[k] = Σ_{k' > k} w_k'
    for k in range(K - 1, -1, -1):
        later[k] = later[k + 1] + w[k + 1]
    # P(τ) = Σ_k w_k B^k, row i of B^k supported on i-k..i+k
    for i in range(W):
        for j in range(W):
            P[i, j] = 0.0
            M[i, j] = 0.0
            M2[i, j] = 0.0
        M[i, i] = 1.0
        delta[i] = 0.0
    for k in range(K + 1):
        wk = w[k]
        for i in range(W):
            for j in range(max(0, i - k), min(W - 1, i + k) + 1):
                P[i, j] += wk * M[i, j]
        if k == K:
            break
        _band_step(M, M2, p, q, d, W, k, later[k], delta)
        M, M2 = M2, M
    for i in range(W):
        delta[i] += dropped
    rel = (10.0 * K + 10.0) * UNIT
    for _ in range(s):
        pd = P @ delta
        for i in range(W):
            delta[i] += pd[i]
        P[:, :] = P @ P
        rel = 2.0 * rel + (W + 2.0) * UNIT
    return rel, Lam, s, K


@njit(cache=True, nogil=True)
def annual_mixture(birth, death, N, lo, hi, n_abs, bss, dss, omegas, reach, tail, Pbar, dbar):
    """P̄ = Σ_k ω_k P_k(1) on lo..hi with deficit δ̄ = Σ_k ω_k δ_k.

    Returns (relative rounding bound of P̄'s entries, largest Λ, largest squarings,
    largest Poisson steps).
    """
    W = hi - lo + 1
    P = np.empty((W, W))
    M = np.empty((W, W))
    M2 = np.empty((W, W))
    delta = np.empty(W)
    p = np.empty(W)
    q = np.empty(W)
    d = np.empty(W)
    for i in range(W):
        dbar[i] = 0.0
        for j in range(W):
            Pbar[i, j] = 0.0
    rel_max = 0.0
    lam_max = 0.0
    s_max = 0
    k_max = 0
    for g in range(bss.shape[0]):
        rel, Lam, s, K = _node_year(birth, death, N, lo, hi, n_abs, bss[g], dss[g], reach, tail,
                                    P, delta, M, M2, p, q, d)
        om = omegas[g]
        for i in range(W):
            dbar[i] += om * delta[i]
            for j in range(W):
                Pbar[i, j] += om * P[i, j]
        rel_max = max(rel_max, rel)
        lam_max = max(lam_max, Lam)
        s_max = max(s_max, s)
        k_max = max(k_max, K)
    return rel_max + (bss.shape[0] + 2.0) * UNIT, lam_max, s_max, k_max


@njit(cache=True, nogil=True)
def mmatrix_factor(O, s, piv):
    """Factor A = I − T in place, A given by its off-diagonal magnitudes O = T (diagonal
    ignored) and its row sums s (A·1 = s, all ≥ 0).

    After the call the strict upper part of O holds U's off-diagonal magnitudes, the strict
    lower part the multipliers l_ik, ``piv`` the pivots and ``s`` the eliminated row sums.
    A zero pivot (a class that never leaves) is kept as 0.
    """
    n = O.shape[0]
    for k in range(n):
        dk = s[k]
        for j in range(k + 1, n):
            dk += O[k, j]
        piv[k] = dk
        if dk == 0.0:
            for i in range(k + 1, n):
                O[i, k] = 0.0
            continue
        for i in range(k + 1, n):
            lik = O[i, k] / dk
            O[i, k] = lik
            if lik == 0.0:
                continue
            s[i] += lik * s[k]
            for j in range(k + 1, n):
                if j != i:
                    O[i, j] += lik * O[k, j]


@njit(cache=True, nogil=True)
def mmatrix_solve_right(O, piv, b):
    """z with A z = b (b ≥ 0) from the factors of mmatrix_factor; inf where a pivot is 0."""
    n = O.shape[0]
    y = b.copy()
    for k in range(n):
        for i in range(k + 1, n):
            if O[i, k] > 0.0:
                y[i] += O[i, k] * y[k]
    z = np.empty(n)
    for k in range(n - 1, -1, -1):
        acc = y[k]
        for j in range(k + 1, n):
            if O[k, j] > 0.0:
                acc += O[k, j] * z[j]
        z[k] = acc / piv[k] if piv[k] > 0.0 else math.inf
    return z


@njit(cache=True, nogil=True)
def mmatrix_solve_left(O, piv, x):
    """y with y A = x (x ≥ 0) from the factors of mmatrix_factor (positive arithmetic)."""
    n = O.shape[0]
    w = np.empty(n)
    for j in range(n):
        acc = x[j]
        for k in range(j):
            if O[k, j] > 0.0:
                acc += w[k] * O[k, j]
        w[j] = acc / piv[j] if piv[j] > 0.0 else math.inf
    for k in range(n - 1, -1, -1):
        acc = 0.0
        for i in range(k + 1, n):
            if O[i, k] > 0.0:
                acc += w[i] * O[i, k]
        w[k] += acc
    return w


@njit(cache=True, nogil=True)
def gth_stationary(P):
    """Stationary row vector of the chain P (its diagonal and row deficits ignored: a
    deficit counts as staying), by Grassmann–Taksar–Heyman elimination; P is overwritten."""
    n = P.shape[0]
    for k in range(n - 1, 0, -1):
        sk = 0.0
        for j in range(k):
            sk += P[k, j]
        if sk == 0.0:
            continue
        for i in range(k):
            P[i, k] /= sk
        for i in range(k):
            pik = P[i, k]
            if pik == 0.0:
                continue
            for j in range(k):
                P[i, j] += pik * P[k, j]
    pi = np.zeros(n)
    pi[0] = 1.0
    for k in range(1, n):
        acc = 0.0
        for i in range(k):
            acc += pi[i] * P[i, k]
        pi[k] = acc
    tot = 0.0
    for k in range(n):
        tot += pi[k]
    for k in range(n):
        pi[k] /= tot
    return pi


@lru_cache(maxsize=16)
def _hermgauss(nodes: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.hermite.hermgauss(nodes)


def environment_nodes(sigma: float, nodes: int, affects: str = "birth") -> tuple[np.ndarray, ...]:
    """Gauss–Hermite nodes for ε ~ Normal(0, σ²) and the rate scales they give.

    Args:
        sigma: σ ≥ 0 (σ = 0 gives one node, ε = 0).
        nodes: K ≥ 1.
        affects: "birth" or "birth_and_death".

    Returns:
        (eps, weight, birth_scale, death_scale), each of length K (1 when σ = 0); the weights
        sum to 1; birth_scale = exp(ε − σ²/2), death_scale = exp(−ε − σ²/2) or 1.

    Raises:
        ChainError: σ negative or not finite, K < 1, or an unknown ``affects``.
    """
    sigma = float(sigma)
    if not (np.isfinite(sigma) and sigma >= 0):
        raise ChainError(f"sigma must be finite and >= 0, got {sigma!r}")
    if int(nodes) != nodes or nodes < 1:
        raise ChainError(f"nodes must be a whole number >= 1, got {nodes!r}")
    if affects not in AFFECTS:
        raise ChainError(f"affects must be one of {AFFECTS}, got {affects!r}")
    if sigma == 0:
        one = np.ones(1)
        return np.zeros(1), one, one.copy(), one.copy()
    u, w = _hermgauss(int(nodes))
    eps = math.sqrt(2.0) * sigma * u
    bs = np.exp(eps - sigma ** 2 / 2)
    ds = np.exp(-eps - sigma ** 2 / 2) if affects == "birth_and_death" else np.ones_like(eps)
    return eps, w / math.sqrt(math.pi), bs, ds


@dataclass(frozen=True)
class AnnualMatrix:
    """P̄ on the window lo..hi (sizes lo..lo+n_abs-1 absorbing) and its deficit δ per row.

    ``rel`` bounds the relative rounding error of each entry (first order); ``rate``,
    ``squarings``, ``steps`` are the largest Λ, number of squarings and Poisson steps;
    ``tail`` the Poisson mass cut per node and year.
    """

    P: np.ndarray
    deficit: np.ndarray
    lo: int
    hi: int
    n_abs: int
    rel: float
    rate: float
    squarings: int
    steps: int
    nodes: int
    tail: float


def first_window_top(birth: np.ndarray, death: np.ndarray, sigma: float, affects: str, floor: int,
                     full_range: int) -> int:
    """First window top: the whole range for caps up to ``full_range``; else where the balance
    measure of a run of good years (ε = 3σ) falls 50 log-units below its peak (callers widen
    the window until the mass it loses is small)."""
    N = birth.size - 1
    if N <= full_range:
        return N
    good = math.exp(3 * sigma - sigma ** 2 / 2)
    dgood = math.exp(-3 * sigma - sigma ** 2 / 2) if affects == "birth_and_death" else 1.0
    lam = birth[0] + (birth - birth[0]) * good
    with np.errstate(divide="ignore"):
        g = np.concatenate([[0.0], np.cumsum(np.log(lam[1:N]) - np.log(death[2:] * dgood))])  # sizes 1..N
    if not np.all(np.isfinite(g)):
        return N
    peak = int(np.argmax(g))
    far = np.flatnonzero((np.arange(g.size) > max(peak, floor - 1)) & (g < g[peak] - 50.0))
    top = int(far[0]) + 1 if far.size else N
    return min(N, max(top + top // 10, floor + 16))


def build_annual(birth: np.ndarray, death: np.ndarray, sigma: float, affects: str, nodes: int,
                 threshold: int | None, lo: int, hi: int, tail: float = POISSON_TAIL) -> AnnualMatrix:
    """P̄ on lo..hi for checked rates; sizes lo..threshold absorbing (none when threshold is None)."""
    n_abs = 0 if threshold is None else threshold - lo + 1
    W = hi - lo + 1
    _, w, bs, ds = environment_nodes(sigma, nodes, affects)
    P = np.empty((W, W))
    dlt = np.empty(W)
    rel, lam, s, K = annual_mixture(birth, death, birth.size - 1, lo, hi, n_abs, bs, ds, w, REACH, tail, P, dlt)
    return AnnualMatrix(P, dlt, lo, hi, n_abs, float(rel), float(lam), int(s), int(K), nodes, tail)


def rows_by_vectors(birth: np.ndarray, death: np.ndarray, sigma: float, affects: str, nodes: int,
                    starts) -> tuple[np.ndarray, np.ndarray]:
    """Rows of P̄ from ``starts`` on the whole range, each node's row by transition_rows; returns
    (rows, bound on the Poisson mass cut per start)."""
    _, w, bs, ds = environment_nodes(sigma, nodes, affects)
    rows, bound = 0.0, 0.0
    for wk, bk, dk in zip(w, bs, ds):
        r = transition_rows(birth[0] + (birth - birth[0]) * bk, death * dk, starts, [1.0])
        rows = rows + wk * r.rows[0]
        bound = bound + wk * r.leaked[0]
    return np.asarray(rows), np.asarray(bound)


def factor_transient(A: AnnualMatrix) -> tuple[np.ndarray, np.ndarray]:
    """mmatrix_factor of I − T, T = P̄ on the sizes after the absorbing index 0, with row sums the
    absorption probabilities (the deficit counts as staying)."""
    O = np.array(A.P[1:, 1:])  # copies: the factorization works in place
    piv = np.empty(O.shape[0])
    mmatrix_factor(O, np.array(A.P[1:, 0]), piv)
    return O, piv


def iterate_absorbed(A: AnnualMatrix, idx: np.ndarray, years: np.ndarray) -> tuple[np.ndarray, ...]:
    """Absorbed probability at window index 0 after each of ``years`` from window indices ``idx``;
    returns (probability, lost, rounding): the deficit accumulated over the years (window and
    Poisson cut) and a first-order rounding bound, both shaped like probability."""
    W = A.P.shape[0]
    V = np.zeros((idx.size, W))
    V[np.arange(idx.size), idx] = 1.0
    lost = np.zeros(idx.size)
    Y = int(years.max())
    absorbed = np.empty((idx.size, Y))
    lost_y = np.empty((idx.size, Y))
    for y in range(Y):
        lost += V @ A.deficit
        V = V @ A.P
        absorbed[:, y] = V[:, 0]
        lost_y[:, y] = lost
    prob = np.minimum(absorbed[:, years - 1], 1.0)
    return prob, lost_y[:, years - 1], years * (A.rel + (W + 2) * UNIT) * prob
