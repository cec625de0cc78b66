"""Checks of chain.uniformization against outside references (named beside each check)."""
from __future__ import annotations

import mpmath as mp
import numpy as np
import pytest
import scipy.linalg as sla
from scipy import stats

from tallyfit.chain.errors import RateError
from tallyfit.chain.uniformization import (hidden_forward_backward, pair_log_likelihood_grad,
                                  transition_rows)
from reference import generator




def logistic(N: int, K: float) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(N + 1, dtype=float)
    return 0.6 * n + 0.5, n * (0.3 + 0.3 * n / K)


@pytest.mark.parametrize("N", [30, 120, 300])
def test_rows_match_expm(N):
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009) on the same chain
    b, d = logistic(N, 0.4 * N)
    starts = np.unique(np.array([0, 1, N // 3, N // 2, N]))
    times = np.array([0.0, 0.05, 0.7, 2.0])
    r = transition_rows(b, d, starts, times)
    Q = generator(b, d)
    for ti, t in enumerate(times):
        P = sla.expm(Q * t)
        assert np.max(np.abs(P[starts] - r.rows[ti])) <= 1e-12
    # whole range: only the cut Poisson mass is reported
    assert np.all(r.leaked <= 1e-15)


def test_rows_relative_accuracy_vs_mpmath():
    # reference: mpmath.expm at 60 digits (mpmath docs, matrix functions) on a chain whose
    # rates vary strongly, so P spans ~100 orders of magnitude
    N = 25
    n = np.arange(N + 1, dtype=float)
    b = 0.05 * np.exp(-n / 4.0) + 1e-3
    d = 0.3 * n ** 2
    t = 0.8
    mp.mp.dps = 60
    try:
        Q = mp.zeros(N + 1, N + 1)
        for i in range(N + 1):
            lam = mp.mpf(float(b[i])) if i < N else mp.mpf(0)
            if i < N:
                Q[i, i + 1] = lam
            if i > 0:
                Q[i, i - 1] = mp.mpf(float(d[i]))
            Q[i, i] = -(lam + mp.mpf(float(d[i])))
        P = mp.expm(Q * mp.mpf(t))
        ref = np.array([[float(P[i, j]) for j in range(N + 1)] for i in range(N + 1)])
    finally:
        mp.mp.dps = 15
    r = transition_rows(b, d, np.arange(N + 1), [t])
    keep = ref >= 1e-100
    assert ref[keep].min() < 1e-90  # the check really reaches tiny entries
    assert np.max(np.abs(r.rows[0][keep] / ref[keep] - 1.0)) <= 1e-8


def test_window_leak_bounds_the_window_error():
    # reference: the same computation on the whole range (nothing leaks there), which
    # itself matches scipy.linalg.expm above; bound: windowed ≤ true ≤ windowed + leaked
    N = 200
    b, d = logistic(N, 80)
    times = [0.3, 1.0, 3.0]
    full = transition_rows(b, d, [80, 90], times)
    for lo, hi in [(50, 110), (70, 90), (0, 120), (60, 200), (79, 100)]:
        r = transition_rows(b, d, [80, 90], times, lo=lo, hi=hi)
        ref = full.rows[:, :, lo:hi + 1]
        diff = ref - r.rows
        assert np.all(diff >= -1e-15)
        assert np.all(diff <= r.leaked[:, :, None] + 1e-15)
        # the bound is not vacuous: it is also close to the mass actually lost (1 − row sum
        # carries rounding of order K·ε, K ≤ ~700 steps here)
        lost = 1.0 - r.rows.sum(axis=2)
        assert np.all(r.leaked >= lost - 1e-12)
        assert np.all(r.leaked <= lost + 1e-12)


def test_pure_death_binomial_large_chain():
    # pure death from m: Binomial(m, e^{-μt}) (common practice), scipy.stats.binom
    N = 1200
    mu = 1.3
    n = np.arange(N + 1, dtype=float)
    b = np.zeros(N + 1)
    d = mu * n
    m, t = 1000, 0.9
    # a tiny tail target: the smallest entries need B-steps far out in the Poisson tail
    r = transition_rows(b, d, [m], [t], tail=1e-300)  # Λt ≈ 1190
    ref = stats.binom.pmf(np.arange(N + 1), m, np.exp(-mu * t))
    got = r.rows[0, 0]
    assert np.max(np.abs(got - ref)) <= 1e-12
    keep = ref >= 1e-100
    assert np.max(np.abs(got[keep] / ref[keep] - 1.0)) <= 1e-8


def test_immigration_death_from_zero():
    # λ_n = ι, μ_n = nδ from 0: Poisson((ι/δ)(1 − e^{−δt})) (Karlin & Taylor 1975, A First
    # Course in Stochastic Processes, 2nd ed.), scipy.stats.poisson; cap far above the mass
    N = 900
    iota, delta, t = 300.0, 1.0, 2.0
    n = np.arange(N + 1, dtype=float)
    r = transition_rows(np.full(N + 1, iota), delta * n, [0], [t], tail=1e-300)  # Λt ≈ 2450
    ref = stats.poisson.pmf(np.arange(N + 1), iota / delta * (1 - np.exp(-delta * t)))
    got = r.rows[0, 0]
    assert np.max(np.abs(got - ref)) <= 1e-12
    keep = ref >= 1e-100
    assert np.max(np.abs(got[keep] / ref[keep] - 1.0)) <= 1e-8


def test_yule_from_one():
    # pure birth λ_n = λn from 1: P_{1,n}(t) = e^{−λt}(1 − e^{−λt})^{n−1} (Feller 1968, Vol. 1,
    # XVII.3), scipy.stats.geom with success probability e^{−λt}
    N = 500
    lam, t = 1.0, 1.5
    n = np.arange(N + 1, dtype=float)
    r = transition_rows(lam * n, np.zeros(N + 1), [1], [t], tail=1e-300)
    sizes = np.arange(1, N)  # the reflecting cap only changes size N itself
    ref = stats.geom.pmf(sizes, np.exp(-lam * t))
    got = r.rows[0, 0, 1:N]
    assert np.max(np.abs(got - ref)) <= 1e-12
    keep = ref >= 1e-100
    assert np.max(np.abs(got[keep] / ref[keep] - 1.0)) <= 1e-8


def test_large_rate_times_time():
    # Λt in the tens of thousands: e^{−Λt} underflows but the weights are built in log
    # space; reference: pure death Binomial (common practice), scipy.stats.binom
    N = 400
    n = np.arange(N + 1, dtype=float)
    d = 60.0 * n
    r = transition_rows(np.zeros(N + 1), d, [400], [0.02])  # Λt ≈ 490
    ref = stats.binom.pmf(np.arange(N + 1), 400, np.exp(-60.0 * 0.02))
    assert np.max(np.abs(r.rows[0, 0] - ref)) <= 1e-12
    r = transition_rows(np.zeros(N + 1), d, [400], [1.0])  # Λt ≈ 24500
    assert r.steps[0] > 20000
    ref = stats.binom.pmf(np.arange(N + 1), 400, np.exp(-60.0))
    # rounding of a positive sum over K ≈ 25 800 steps is at most of order K·ε ≈ 6e-12
    assert np.max(np.abs(r.rows[0, 0] - ref)) <= 2 * r.steps[0] * np.finfo(float).eps


def test_pair_gradient_matches_finite_differences():
    # reference: central finite differences of the same function (common practice)
    rng = np.random.default_rng(3)
    N = 40
    b, d = logistic(N, 16)
    b = b * rng.uniform(0.5, 1.5, N + 1)
    d = d * rng.uniform(0.5, 1.5, N + 1)
    args = dict(group_start=[10, 20], group_dt=[0.7, 1.3], group_lo=[0, 5], group_hi=[40, 35],
                group_tail=[1e-18, 1e-18], end_ptr=[0, 2, 3], end_size=[12, 5, 25],
                end_weight=[1.0, 2.0, 1.0])
    wts = np.array(args["end_weight"])

    def f(bb, dd):
        return float(np.sum(wts * np.log(pair_log_likelihood_grad(bb, dd, **args, grad=False).prob)))

    r = pair_log_likelihood_grad(b, d, **args)
    gb = np.zeros(N + 1)
    gd = np.zeros(N + 1)
    o = r.grad_offsets
    for g, (lo, hi) in enumerate(zip(args["group_lo"], args["group_hi"])):
        gb[lo:hi + 1] += r.grad_birth[o[g]:o[g + 1]]
        gd[lo:hi + 1] += r.grad_death[o[g]:o[g + 1]]
    for arr, grad, sizes in ((b, gb, range(N)), (d, gd, range(1, N + 1))):
        for i in sizes:
            h = 1e-5 * max(arr[i], 1e-3)
            up = arr.copy()
            dn = arr.copy()
            up[i] += h
            dn[i] -= h
            fd = (f(up, d) - f(dn, d)) / (2 * h) if arr is b else (f(b, up) - f(b, dn)) / (2 * h)
            assert abs(fd - grad[i]) <= 1e-5 * max(abs(fd), 1e-3)
    assert gb[N] == 0.0 and gd[0] == 0.0  # the cap's birth rate and μ_0 do not enter


def test_pair_probabilities_match_expm_with_window_bound():
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009); windowed ≤ true ≤ windowed + bound
    N = 100
    b, d = logistic(N, 40)
    P = sla.expm(generator(b, d) * 0.6)
    r = pair_log_likelihood_grad(b, d, [40, 42], [0.6, 0.6], [20, 0], [60, 100], [1e-20, 1e-20],
                                 [0, 2, 3], [35, 47, 41], [1, 1, 1], grad=False)
    ref = np.array([P[40, 35], P[40, 47], P[42, 41]])
    bound = np.array([r.leaked[0] + r.dropped[0]] * 2 + [r.leaked[1] + r.dropped[1]])
    assert np.all(r.prob <= ref * (1 + 1e-13))
    assert np.all(ref - r.prob <= bound + 1e-15)
    assert abs(r.prob[2] / ref[2] - 1) <= 1e-12  # whole range: no leak


def test_hidden_forward_backward_brute_force():
    # reference: brute-force sum over every hidden path with scipy.linalg.expm transitions
    # (Al-Mohy & Higham 2009); gradients by central differences (common practice)
    N = 12
    b, d = logistic(N, 6)
    dts = [0.5, 1.2]
    rng = np.random.default_rng(0)
    logw = [np.log(rng.uniform(0.1, 1.0, size=k)) for k in (5, 6, 4)]
    ranges = [(2, 6), (3, 8), (4, 7)]

    def brute(bb, dd):
        Q = generator(bb, dd)
        Ps = [sla.expm(Q * t) for t in dts]
        v = np.zeros(N + 1)
        v[ranges[0][0]:ranges[0][1] + 1] = np.exp(logw[0])
        for i in (1, 2):
            v = v @ Ps[i - 1]
            e = np.zeros(N + 1)
            e[ranges[i][0]:ranges[i][1] + 1] = np.exp(logw[i])
            v = v * e
        return np.log(v.sum())

    def ours(bb, dd, grad=True):
        wp = np.cumsum([0] + [w.size for w in logw])
        return hidden_forward_backward(bb, dd, [0, 3], [r[0] for r in ranges],
                                       [r[1] for r in ranges], wp, np.concatenate(logw),
                                       [0, 0, 0], [N, N, N], [1.0, 0.5, 1.2], [1e-20] * 3,
                                       grad=grad)

    r = ours(b, d)
    assert abs(r.log_norm.sum() - brute(b, d)) <= 1e-10
    for i in range(1, N):
        h = 1e-6
        e = np.zeros(N + 1)
        e[i] = h
        fb = (brute(b + e, d) - brute(b - e, d)) / (2 * h)
        fd = (brute(b, d + e) - brute(b, d - e)) / (2 * h)
        assert abs(fb - r.grad_birth[0, i]) <= 1e-5 * max(abs(fb), 1e-3)
        assert abs(fd - r.grad_death[0, i]) <= 1e-5 * max(abs(fd), 1e-3)
    # marginals sum to one at each occasion (common practice for forward–backward)
    wp = np.cumsum([0] + [w.size for w in logw])
    for i in range(3):
        assert abs(r.marginals[wp[i]:wp[i + 1]].sum() - 1.0) <= 1e-12


def test_bad_arguments_raise():
    b, d = logistic(10, 4)
    with pytest.raises(RateError):
        transition_rows(b, np.r_[1.0, d[1:]], [1], [1.0])  # death at size 0 must be 0
    with pytest.raises(RateError):
        transition_rows(-b, d, [1], [1.0])
    with pytest.raises(RateError):
        transition_rows(b, d, [1], [1.0], lo=2, hi=5)  # start outside the window
    with pytest.raises(RateError):
        transition_rows(b, d, [1], [-1.0])
    with pytest.raises(RateError):
        transition_rows(b, d[:-1], [1], [1.0])


def test_weighted_transition_grad_matches_expm_and_differences():
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009) for the value, central finite
    # differences of that expm value (common practice) for the gradient
    N = 20
    b, d = logistic(N, 8)
    rng = np.random.default_rng(5)
    starts, ends = np.array([3, 8, 12]), np.array([2, 7, 9, 15])
    G = rng.normal(size=(3, 4))
    t = 0.6

    def ref(bb, dd):
        P = sla.expm(generator(bb, dd) * t)
        return float(np.sum(G * P[np.ix_(starts, ends)]))

    from tallyfit.chain.uniformization import weighted_transition_grad
    val, gb, gd, bound = weighted_transition_grad(b, d, starts, ends, G, t)
    assert abs(val - ref(b, d)) <= 1e-12
    assert bound <= 1e-14
    for i in range(1, N):
        h = 1e-6
        e = np.zeros(N + 1)
        e[i] = h
        fb = (ref(b + e, d) - ref(b - e, d)) / (2 * h)
        fd = (ref(b, d + e) - ref(b, d - e)) / (2 * h)
        assert abs(fb - gb[i]) <= 1e-5 * max(abs(fb), 1e-3)
        assert abs(fd - gd[i]) <= 1e-5 * max(abs(fd), 1e-3)
