"""Checks of infer.likelihood against outside references (named beside each check)."""
from __future__ import annotations

import itertools
import subprocess
import sys
from types import SimpleNamespace

import mpmath as mp
import numpy as np
import pytensor
import pytensor.tensor as pt
import pytest
import scipy.linalg as sla
from scipy import stats

from tallyfit.chain.errors import RateError
from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import CapTooSmallError, CountValueError, InputError, ReplicateMismatchError
from tallyfit.infer.likelihood import (CountLikelihoodOp, evaluate_likelihood, log_likelihood,
                              log_likelihood_grad, pointwise_log_likelihood)
from reference import generator




def logistic(N: int, K: float, jitter: float = 0.0, seed: int = 0):
    n = np.arange(N + 1, dtype=float)
    b = 0.6 * n + 0.5
    d = n * (0.3 + 0.3 * n / K)
    if jitter:
        rng = np.random.default_rng(seed)
        b = b * rng.uniform(1 - jitter, 1 + jitter, N + 1)
        d = d * rng.uniform(1 - jitter, 1 + jitter, N + 1)
    return b, d


def expm_loglik(series, b, d):
    """Σ log P over consecutive surveyed counts, with scipy.linalg.expm transitions."""
    Q = generator(b, d)
    total = 0.0
    cache = {}
    for t, c in series:
        keep = ~np.isnan(c)
        tt, cc = np.asarray(t)[keep], np.asarray(c)[keep].astype(int)
        for i in range(tt.size - 1):
            dt = tt[i + 1] - tt[i]
            if dt not in cache:
                cache[dt] = sla.expm(Q * dt)
            total += np.log(cache[dt][cc[i], cc[i + 1]])
    return total


def fd_check(f, x, grad, idx, rel=1e-5):
    """Central finite differences (common practice), step relative to the value."""
    for i in idx:
        h = 1e-5 * max(abs(x[i]), 1e-2)
        up, dn = x.copy(), x.copy()
        up[i] += h
        dn[i] -= h
        fd = (f(up) - f(dn)) / (2 * h)
        assert abs(fd - grad[i]) <= rel * max(abs(fd), 1e-2), (i, fd, grad[i])


SERIES = [
    (np.array([0.0, 1.0, 2.0, 3.5, 4.0, 6.0, 7.25]), np.array([20, 25, np.nan, 22, 24, 30, 18.0])),
    (np.array([0.0, 0.5, 2.0, 3.0]), np.array([31, 28, 35, 33.0])),
]


def test_exact_loglik_matches_expm_with_gaps_and_sites():
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009) on the same chain
    b, d = logistic(60, 24, jitter=0.3)
    ts = [s[0] for s in SERIES]
    cs = [s[1] for s in SERIES]
    r = evaluate_likelihood(ts, cs, b, d)
    assert abs(r.ll - expm_loglik(SERIES, b, d)) <= 1e-8
    assert r.error_bound <= 1e-10
    # the missing survey spans the gap: same as leaving that row out
    t0, c0 = SERIES[0]
    keep = ~np.isnan(c0)
    assert abs(log_likelihood(t0, c0, b, d) - log_likelihood(t0[keep], c0[keep], b, d)) <= 1e-12


def test_missing_and_irregular_equal_product_of_transitions():
    # reference: product of scipy.linalg.expm transition probabilities (Al-Mohy & Higham 2009)
    b, d = logistic(50, 20)
    t = np.array([0.0, 0.3, 1.1, 2.9, 3.0])
    c = np.array([18, np.nan, np.nan, 21, 19.0])
    Q = generator(b, d)
    ref = np.log(sla.expm(Q * 2.9)[18, 21]) + np.log(sla.expm(Q * 0.1)[21, 19])
    assert abs(log_likelihood(t, c, b, d) - ref) <= 1e-10
    pw = pointwise_log_likelihood(t, c, b, d)
    assert len(pw) == 1 and pw[0].size == 2
    assert abs(pw[0][0] - np.log(sla.expm(Q * 2.9)[18, 21])) <= 1e-10


def test_exact_gradient_matches_finite_differences():
    # reference: central finite differences (common practice)
    N = 60
    b, d = logistic(N, 24, jitter=0.4, seed=2)
    ts = [s[0] for s in SERIES]
    cs = [s[1] for s in SERIES]
    ll, gb, gd = log_likelihood_grad(ts, cs, b, d)
    assert gb.shape == (N + 1,) and gd.shape == (N + 1,)
    idx = range(5, 50)
    fd_check(lambda x: log_likelihood(ts, cs, x, d), b, gb, idx)
    fd_check(lambda x: log_likelihood(ts, cs, b, x), d, gd, idx)
    assert gb[N] == 0.0 and gd[0] == 0.0


def test_data_object_and_replicates():
    # the same numbers through a CountData-like object with a replicate column; the
    # reference value is scipy.linalg.expm (Al-Mohy & Higham 2009)
    b, d = logistic(60, 24)
    objs = []
    for t, c in SERIES:
        rep = np.stack([c, np.where(np.arange(c.size) % 2 == 0, c, np.nan)], axis=1)
        objs.append(SimpleNamespace(times=t, counts=rep))
    data = SimpleNamespace(series=objs)
    assert abs(log_likelihood(data, None, b, d) - expm_loglik(SERIES, b, d)) <= 1e-8
    bad = SimpleNamespace(series=[SimpleNamespace(times=np.array([0.0, 1.0]),
                                                  counts=np.array([[3.0, 4.0], [5.0, 5.0]]))])
    with pytest.raises(ReplicateMismatchError):
        log_likelihood(bad, None, b, d)


def test_clear_errors():
    b, d = logistic(40, 16)
    with pytest.raises(CapTooSmallError, match="cap"):
        log_likelihood([0.0, 1.0], [10, 41], b, d)
    with pytest.raises(CountValueError):
        log_likelihood([0.0, 0.0], [10, 11], b, d)
    with pytest.raises(CountValueError):
        log_likelihood([0.0, 1.0], [10, 11.5], b, d)
    with pytest.raises(RateError) as info:
        log_likelihood([0.0, 1.0], [10, 11], b, np.r_[0.1, d[1:]])
    assert (info.value.name, info.value.size, info.value.value) == ("death", 0, 0.1)
    with pytest.raises(RateError) as info:
        log_likelihood([0.0, 1.0], [10, 11], np.r_[b[:7], -1.0, b[8:]], d)
    assert (info.value.name, info.value.size, info.value.value) == ("birth", 7, -1.0)
    with pytest.raises(RateError) as info:
        log_likelihood([0.0, 1.0], [10, 11], b, d, detection=1.5)
    assert info.value.name == "detection"
    with pytest.raises(RateError):
        log_likelihood([0.0, 1.0], [10, 11], b, d, tol=0.0)
    # a data object other than CountData is checked cell by cell like arrays
    bad = SimpleNamespace(series=[SimpleNamespace(times=np.array([0.0, 1.0]),
                                                  counts=np.array([10.0, -1.0]))])
    with pytest.raises(CountValueError):
        log_likelihood(bad, None, b, d)
    assert issubclass(CapTooSmallError, InputError) and issubclass(InputError, ValueError)


def test_count_data_gives_the_same_numbers_as_arrays():
    # CountData is taken without re-checking its cells: same value and gradients, bit for
    # bit, as the checked arrays; the value itself against scipy.linalg.expm (Al-Mohy &
    # Higham 2009)
    b, d = logistic(60, 24, jitter=0.3)
    t, c = SERIES[0]
    data = CountData.single(t, c)
    from_data = evaluate_likelihood(data, None, b, d)
    from_arrays = evaluate_likelihood(t, c, b, d)
    assert from_data.ll == from_arrays.ll
    assert np.array_equal(from_data.d_birth, from_arrays.d_birth)
    assert np.array_equal(from_data.d_death, from_arrays.d_death)
    assert abs(from_data.ll - expm_loglik([SERIES[0]], b, d)) <= 1e-8


def test_import_does_not_load_pytensor():
    # the package loads PyTensor only when an Op is asked for (common practice: lazy
    # module attributes, PEP 562)
    code = ("import sys, tallyfit.infer.likelihood as lk; assert 'pytensor' not in sys.modules; "
            "lk.CountLikelihoodOp; assert 'pytensor' in sys.modules")
    subprocess.run([sys.executable, "-c", code], check=True)


def test_structural_zero_is_minus_inf_but_tiny_probability_is_finite():
    # growth with zero birth rate is impossible: −inf (common practice)
    N = 30
    n = np.arange(N + 1, dtype=float)
    assert log_likelihood([0.0, 1.0], [5, 7], np.zeros(N + 1), n * 0.5) == -np.inf
    ll, gb, gd = log_likelihood_grad([0.0, 1.0], [5, 7], np.zeros(N + 1), n * 0.5)
    assert ll == -np.inf and not gb.any()
    # no change in 200 individuals with per-capita death 5 over 1 time unit is possible with
    # probability exactly (e^{-5})^200 = e^{-1000}, far below double precision: it must come
    # back finite and accurate (pure death from m: Binomial(m, e^{-μt}); common practice)
    N = 200
    n = np.arange(N + 1, dtype=float)
    ll = log_likelihood([0.0, 1.0], [200, 200], np.zeros(N + 1), 5.0 * n)
    assert ll == pytest.approx(-1000.0, rel=1e-12)


def test_far_apart_counts_stay_accurate():
    # reference: mpmath.expm at 60 digits (mpmath docs, matrix functions); the pair is
    # many standard deviations apart so P is tiny
    N = 24
    b, d = logistic(N, 10)
    t, m, k = 0.2, 1, 23
    mp.mp.dps = 60
    try:
        Q = mp.matrix(generator(b, d).tolist())
        ref = float(mp.log(mp.expm(Q * mp.mpf(t))[m, k]))
    finally:
        mp.mp.dps = 15
    assert ref < -40  # really far apart
    r = evaluate_likelihood([0.0, t], [m, k], b, d)
    assert np.isfinite(r.ll)
    assert abs(r.ll - ref) <= 1e-8
    assert r.error_bound <= 1e-10


def test_error_bound_holds_against_full_reference():
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009) on N = 250, where the windows
    # cut most of the range; the actual error must be within the reported bound
    N = 250
    b, d = logistic(N, 100)
    t = np.arange(8, dtype=float) * 0.7
    c = np.array([98, 105, 90, 101, 110, 99, 92, 107.0])
    ref = expm_loglik([(t, c)], b, d)
    for tol in (1e-4, 1e-10):
        r = evaluate_likelihood(t, c, b, d, tol=tol)
        assert r.error_bound <= tol
        assert r.ll <= ref + 1e-10  # windowed probabilities never exceed the true ones
        assert abs(r.ll - ref) <= r.error_bound + 1e-10


def test_closed_forms_on_large_chains():
    N = 1000
    n = np.arange(N + 1, dtype=float)
    # pure death: from m, Binomial(m, e^{−μt}) (common practice), scipy.stats.binom
    mu = 0.4
    t = np.array([0.0, 1.0, 2.5])
    c = np.array([900.0, 610.0, 330.0])
    ref = (stats.binom.logpmf(610, 900, np.exp(-mu * 1.0))
           + stats.binom.logpmf(330, 610, np.exp(-mu * 1.5)))
    assert abs(log_likelihood(t, c, np.zeros(N + 1), mu * n) - ref) <= 1e-8
    # immigration–death from 0: Poisson((ι/δ)(1 − e^{−δt})) (Karlin & Taylor 1975, A First
    # Course in Stochastic Processes, 2nd ed.), scipy.stats.poisson
    iota, delta = 150.0, 0.5
    ref = stats.poisson.logpmf(140, iota / delta * (1 - np.exp(-delta * 1.5)))
    assert abs(log_likelihood([0.0, 1.5], [0, 140], np.full(N + 1, iota), delta * n) - ref) <= 1e-8
    # Yule from 1: e^{−λt}(1 − e^{−λt})^{n−1} (Feller 1968, Vol. 1, XVII.3), scipy.stats.geom
    lam = 0.8
    ref = stats.geom.logpmf(40, np.exp(-lam * 3.0))
    assert abs(log_likelihood([0.0, 3.0], [1, 40], lam * n, np.zeros(N + 1)) - ref) <= 1e-8


# ---- detection model ---------------------------------------------------------------------
def brute_detection(times, counts, b, d, p):
    """Sum over every hidden path (itertools.product), prior uniform over 0..N given the
    first counts; transitions from scipy.linalg.expm (Al-Mohy & Higham 2009), emissions
    scipy.stats.binom."""
    N = b.size - 1
    Q = generator(b, d)
    occ = [i for i in range(len(times)) if np.any(~np.isnan(counts[i]))]
    Ps = [sla.expm(Q * (times[occ[k + 1]] - times[occ[k]])) for k in range(len(occ) - 1)]
    sizes = np.arange(N + 1)
    emit = []
    for i in occ:
        y = counts[i][~np.isnan(counts[i])]
        emit.append(np.prod([stats.binom.pmf(yy, sizes, p) for yy in y], axis=0))
    prior = emit[0] / emit[0].sum()
    total = 0.0
    for path in itertools.product(range(N + 1), repeat=len(occ)):
        w = prior[path[0]]
        for k in range(1, len(occ)):
            w *= Ps[k - 1][path[k - 1], path[k]] * emit[k][path[k]]
        total += w
    return np.log(total)


def test_detection_matches_brute_force_sum():
    N = 9
    b, d = logistic(N, 5, jitter=0.3, seed=4)
    times = np.array([0.0, 0.7, 1.5, 2.0])
    counts = np.array([[3.0, 4.0], [np.nan, np.nan], [2.0, np.nan], [5.0, 3.0]])
    p = 0.6
    ref = brute_detection(times, counts, b, d, p)
    r = evaluate_likelihood(times, counts, b, d, detection=p)
    assert abs(r.ll - ref) <= 1e-10
    assert r.error_bound <= 1e-10
    assert abs(sum(x.sum() for x in r.pointwise) - r.ll) <= 1e-12
    # gradients w.r.t. rates and p against central finite differences (common practice)
    fd_check(lambda x: brute_detection(times, counts, x, d, p), b, r.d_birth, range(N))
    fd_check(lambda x: brute_detection(times, counts, b, x, p), d, r.d_death, range(1, N + 1))
    h = 1e-6
    fd = (brute_detection(times, counts, b, d, p + h) - brute_detection(times, counts, b, d, p - h)) / (2 * h)
    assert abs(fd - r.d_detection) <= 1e-5 * max(abs(fd), 1e-2)
    out = log_likelihood_grad(times, counts, b, d, detection=p)
    assert len(out) == 4


def forward_expm(times, counts, b, d, p):
    """Forward algorithm with dense scipy.linalg.expm transitions (Al-Mohy & Higham 2009)
    and scipy.stats.binom emissions, prior uniform over 0..N given the first counts."""
    N = b.size - 1
    Q = generator(b, d)
    sizes = np.arange(N + 1)
    occ = [i for i in range(len(times)) if np.any(~np.isnan(counts[i]))]
    ll = 0.0
    v = None
    for k, i in enumerate(occ):
        y = counts[i][~np.isnan(counts[i])]
        e = np.exp(np.sum([stats.binom.logpmf(yy, sizes, p) for yy in y], axis=0))
        if v is None:
            v = e / e.sum()
            continue
        v = (v @ sla.expm(Q * (times[i] - times[occ[k - 1]]))) * e
        s = v.sum()
        ll += np.log(s)
        v /= s
    return ll


def test_detection_matches_dense_forward_algorithm():
    N = 150
    b, d = logistic(N, 60)
    rng = np.random.default_rng(7)
    times = np.array([0.0, 1.0, 2.0, 3.5, 4.0, 5.0])
    true = np.array([60, 64, 55, 58, 61, 57])
    counts = rng.binomial(true[:, None], 0.7, size=(6, 3)).astype(float)
    counts[2, 1] = np.nan
    ref = forward_expm(times, counts, b, d, 0.7)
    r = evaluate_likelihood(times, counts, b, d, detection=0.7)
    assert abs(r.ll - ref) <= 1e-8
    assert r.error_bound <= 1e-10


# ---- PyTensor Op -------------------------------------------------------------------------
def test_op_verify_grad_exact_and_detection():
    # pytensor.gradient.verify_grad compares the Op's gradient with finite differences
    N = 30
    b, d = logistic(N, 12)
    data = (np.array([0.0, 1.0, 2.5, 3.0]), np.array([11, 14, 10, 12.0]))
    op = CountLikelihoodOp(data)
    rng = np.random.default_rng(11)
    # death[0] must be 0: verify_grad perturbs every entry, so pin it inside the graph
    pin = lambda y: pt.set_subtensor(y[0], 0.0)  # noqa: E731
    pytensor.gradient.verify_grad(lambda x, y: op(x, pin(y)), [b, d], rng=rng, eps=1e-6)
    bv, dv = pt.dvectors("b", "d")
    f = pytensor.function([bv, dv], op(bv, dv))
    assert abs(float(f(b, d)) - log_likelihood(*data, b, d)) <= 1e-12
    counts = np.array([[8, 9], [10, np.nan], [7, 8], [9, 9.0]])
    op2 = CountLikelihoodOp((data[0], counts), detection="estimate")
    pytensor.gradient.verify_grad(lambda x, y, z: op2(x, pin(y), z), [b, d, np.array(0.7)],
                                  rng=rng, eps=1e-6)
    op3 = CountLikelihoodOp((data[0], counts), detection=0.7)
    pytensor.gradient.verify_grad(lambda x, y: op3(x, pin(y)), [b, d], rng=rng, eps=1e-6)
