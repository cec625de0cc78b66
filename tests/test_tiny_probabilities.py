"""Transitions far below the smallest double: the log-likelihood and its gradient against
high-precision references (mpmath at 50 digits), named beside each check.

A plain uniformization sweep keeps probabilities as doubles, so a far jump (many standard
deviations, P far below 1e-308) underflowed and was refused. The sweeps now switch such
groups to log space (chain.uniformization._pairs_log_kernel); these tests hold them to
closed forms and to an independent matrix exponential.
"""
from __future__ import annotations

import math

import mpmath as mp
import numpy as np
import pytest

from tallyfit.chain.uniformization import pair_log_likelihood_grad
from tallyfit.infer.likelihood import PreparedCounts, evaluate_likelihood, log_likelihood
from tallyfit.infer.likelihood.environment import quadrature_shift
from tallyfit.infer.likelihood.exact import ExactPlan, evaluate_exact
from tallyfit.infer.likelihood.series import as_series

#: Relative accuracy asked of log P. A log-space sweep rounds each entry's logarithm at
#: every step, so log P carries an absolute error of a few hundred ulps of |log P| (measured
#: 1e-15 to 3e-14 relative on the cases below); 1e-12 leaves room and still resolves P to
#: better than 1e-8 relatively at |log P| ≈ 7700.
REL_LOG = 1e-12


def linear_log_p(m: int, n: int, lam, mu, t, dps: int | None = 50):
    """log P_{mn}(t) of the linear birth–death process λ_k = λk, μ_k = μk, as an mpf
    (at ``dps`` digits; None: at the caller's working precision).

    Bailey (1964), The Elements of Stochastic Processes, §8.6 (simple birth-and-death
    process; Kendall 1948, Ann. Math. Stat. 19:1–15), from memory:
        α = μ(e^{(λ−μ)t} − 1)/(λe^{(λ−μ)t} − μ), β = λα/μ   (λ = μ: α = β = λt/(1 + λt)),
        P_{m0} = α^m,
        P_{mn} = Σ_{j=0}^{min(m,n)} C(m,j) C(m+n−j−1, m−1) α^{m−j} β^{n−j} (1−α−β)^j.
    The cases used keep 1 − α − β > 0, so every term is positive (no cancellation).
    """
    with mp.workdps(dps or mp.mp.dps):
        lam, mu, t = mp.mpf(lam), mp.mpf(mu), mp.mpf(t)
        if lam == mu:
            a = b = lam * t / (1 + lam * t)
        else:
            e = mp.exp((lam - mu) * t)
            a = mu * (e - 1) / (lam * e - mu)
            b = lam * (e - 1) / (lam * e - mu)
        if n == 0:
            return m * mp.log(a)
        c = 1 - a - b
        assert c > 0
        s = mp.fsum(mp.binomial(m, j) * mp.binomial(m + n - j - 1, m - 1) * a ** (m - j) * b ** (n - j) * c ** j
                    for j in range(min(m, n) + 1))
        return mp.log(s)


def linear_rates(N: int, lam: float, mu: float) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(N + 1, dtype=float)
    b = lam * n
    b[N] = 0.0  # the cap; N is chosen so far above the counts that it does not matter
    return b, mu * n


def test_reference_formula_is_the_published_distribution():
    # the reference itself: a probability distribution in n, with mean m·e^{(λ−μ)t} and
    # P_{m0} = α^m (Bailey 1964, §8.6; Kendall 1948) — checked at 50 digits
    m, lam, mu, t = 5, 0.3, 0.2, 1.0
    with mp.workdps(50):
        p = [mp.exp(linear_log_p(m, n, lam, mu, t)) for n in range(400)]
        assert abs(mp.fsum(p) - 1) < mp.mpf(10) ** -40
        mean = mp.fsum(n * pn for n, pn in enumerate(p))
        assert abs(mean - m * mp.exp(mp.mpf(lam - mu) * t)) < mp.mpf(10) ** -38
    # equal rates: the mean stays m (Bailey 1964, §8.6)
    with mp.workdps(50):
        p = [mp.exp(linear_log_p(3, n, 0.4, 0.4, 1.0)) for n in range(600)]
        assert abs(mp.fsum(p) - 1) < mp.mpf(10) ** -40
        assert abs(mp.fsum(n * pn for n, pn in enumerate(p)) - 3) < mp.mpf(10) ** -36


@pytest.mark.parametrize("N, lam, mu, m, n", [
    (600, 0.05, 0.05, 50, 400),   # P ≈ e^-925: the first example
    (600, 0.1, 0.1, 50, 400),     # P ≈ 5e-306, refused before although representable
    (1000, 0.05, 0.05, 400, 5),   # downward, P ≈ e^-1178
    (1000, 0.2, 0.05, 300, 20),   # against growth (λ ≠ μ)
])
def test_far_jumps_match_the_closed_form(N, lam, mu, m, n):
    # reference: Bailey (1964) §8.6 at 50 digits (linear_log_p)
    b, d = linear_rates(N, lam, mu)
    ref = float(linear_log_p(m, n, lam, mu, 1.0))
    assert ref < math.log(1e-300)  # the check really is below what a double can bound
    r = evaluate_likelihood([0.0, 1.0], [m, n], b, d, tol=1e-10)
    assert abs(r.ll - ref) <= REL_LOG * abs(ref)
    assert 0.0 <= r.error_bound <= 1e-10
    assert np.all(np.isfinite(r.d_birth)) and np.all(np.isfinite(r.d_death))


def _closed_form_slopes(m: int, n: int, lam: float, mu: float, t: float) -> tuple[float, float]:
    """∂ log P/∂ log λ and ∂ log P/∂ log μ of the closed form.

    Central differences at 80 digits with step 1e-20: the step's own error is O(1e-40), and
    the formula's cancellation near λ = μ (e^{(λ−μ)t} − 1) costs 20 of the 80 digits.
    (mpmath.diff picks far smaller steps, where that cancellation eats every digit.)
    """
    with mp.workdps(80):
        h = mp.mpf("1e-20")
        fb = [linear_log_p(m, n, mp.mpf(lam) * mp.exp(u), mu, t, dps=None) for u in (h, -h)]
        fd = [linear_log_p(m, n, lam, mp.mpf(mu) * mp.exp(u), t, dps=None) for u in (h, -h)]
        return float((fb[0] - fb[1]) / (2 * h)), float((fd[0] - fd[1]) / (2 * h))


def test_gradient_at_a_far_jump_matches_finite_differences_and_the_closed_form():
    # references: central finite differences of the log-likelihood (common practice), and
    # the derivative of Bailey's closed form (1964, §8.6) with respect to log λ and log μ
    N, lam, mu, m, n = 600, 0.05, 0.05, 50, 400
    b, d = linear_rates(N, lam, mu)
    prep = PreparedCounts([0.0, 1.0], [m, n])
    r = prep.evaluate(b, d, tol=1e-12)
    sb, sd = _closed_form_slopes(m, n, lam, mu, 1.0)
    assert float(r.d_birth @ b) == pytest.approx(sb, rel=1e-9)
    assert float(r.d_death @ d) == pytest.approx(sd, rel=1e-9)
    # a direction that moves every size's rates differently
    rng = np.random.default_rng(3)
    vb, vd = rng.normal(size=N + 1) * b, rng.normal(size=N + 1) * d
    h = 1e-6
    plus = prep.evaluate(b + h * vb, d + h * vd, tol=1e-12, grad=False).ll
    minus = prep.evaluate(b - h * vb, d - h * vd, tol=1e-12, grad=False).ll
    fd = (plus - minus) / (2 * h)
    assert float(r.d_birth @ vb + r.d_death @ vd) == pytest.approx(fd, rel=1e-6, abs=1e-6)


def test_counts_in_the_thousands():
    # reference: Bailey (1964) §8.6 at 50 digits, value and slopes; 3000 → 7000 in one time
    # unit at equal birth and death rates has P ≈ e^-7690
    N, lam, mu, m, n = 12000, 0.05, 0.05, 3000, 7000
    b, d = linear_rates(N, lam, mu)
    ref = float(linear_log_p(m, n, lam, mu, 1.0))
    r = evaluate_likelihood([0.0, 1.0], [m, n], b, d, tol=1e-10)
    assert abs(r.ll - ref) <= REL_LOG * abs(ref)
    assert r.error_bound <= 1e-10
    sb, sd = _closed_form_slopes(m, n, lam, mu, 1.0)
    assert float(r.d_birth @ b) == pytest.approx(sb, rel=1e-8)
    assert float(r.d_death @ d) == pytest.approx(sd, rel=1e-8)


def _mp_log_transition(b: np.ndarray, d: np.ndarray, t: float, pairs) -> dict:
    """log P_{ij}(t) of the capped chain by mpmath.expm at 50 digits.

    exp(Qt) = e^{−ct} exp((Q + cI)t) with c the largest total rate, so the matrix
    exponentiated is nonnegative and every entry, however small, keeps its relative
    accuracy (common practice; mpmath documentation, matrix functions).
    """
    N = b.size - 1
    with mp.workdps(50):
        lam = [mp.mpf(float(b[i])) if i < N else mp.mpf(0) for i in range(N + 1)]
        mu = [mp.mpf(float(d[i])) for i in range(N + 1)]
        c = max(lam[i] + mu[i] for i in range(N + 1))
        A = mp.zeros(N + 1, N + 1)
        for i in range(N + 1):
            if i < N:
                A[i, i + 1] = lam[i]
            if i > 0:
                A[i, i - 1] = mu[i]
            A[i, i] = c - lam[i] - mu[i]
        E = mp.expm(A * t)
        return {(i, j): float(mp.log(E[i, j]) - c * t) for i, j in pairs}


def test_capped_chain_matches_mpmath_expm():
    # reference: mpmath.expm at 50 digits on the whole capped chain (see _mp_log_transition);
    # rare arrivals against quadratic deaths make the top sizes astronomically unlikely
    N = 30
    n = np.arange(N + 1, dtype=float)
    b = np.full(N + 1, 1e-8)
    d = 3.0 * n ** 2
    ref = _mp_log_transition(b, d, 1.0, [(0, 30), (2, 28), (30, 0), (0, 15)])
    assert ref[(0, 30)] < math.log(1e-308)
    for (i, j), v in ref.items():
        assert log_likelihood([0.0, 1.0], [i, j], b, d) == pytest.approx(v, rel=REL_LOG)
    # a series through the tiny transitions: the terms add up
    pw = evaluate_likelihood([0.0, 1.0, 2.0], [0, 30, 0], b, d).pointwise[0]
    assert pw == pytest.approx([ref[(0, 30)], ref[(30, 0)]], rel=REL_LOG)


def test_log_space_sweep_agrees_with_the_plain_sweep_on_ordinary_pairs():
    # reference: the plain sweep, itself held to scipy.linalg.expm (Al-Mohy & Higham 2009)
    # in test_uniformization.py
    N = 300
    n = np.arange(N + 1, dtype=float)
    b, d = 0.6 * n + 0.5, n * (0.3 + 0.3 * n / 120)
    args = (np.array([100, 120, 60]), np.array([1.0, 0.5, 2.0]), np.array([40, 80, 0]),
            np.array([200, 170, 160]), np.full(3, 1e-17), np.array([0, 2, 4, 6]),
            np.array([90, 110, 120, 135, 20, 150]), np.array([1.0, 2.0, 1.0, 3.0, 1.0, 1.0]))
    plain = pair_log_likelihood_grad(b, d, *args)
    logs = pair_log_likelihood_grad(b, d, *args, group_log_space=np.ones(3, bool),
                                    group_relative_tail=np.full(3, 1e-17))
    mixed = pair_log_likelihood_grad(b, d, *args, group_log_space=np.array([False, True, False]),
                                     group_relative_tail=np.full(3, 1e-17))
    for r in (logs, mixed):
        assert np.max(np.abs(r.log_prob - plain.log_prob)) <= 1e-12
        scale = np.max(np.abs(plain.grad_birth)) + np.max(np.abs(plain.grad_death))
        assert np.max(np.abs(r.grad_birth - plain.grad_birth)) <= 1e-10 * scale
        assert np.max(np.abs(r.grad_death - plain.grad_death)) <= 1e-10 * scale
        assert np.all(r.log_leaked_low <= plain.log_leaked_low + 1e-9)
    assert logs.log_space.all() and not plain.log_space.any()


def test_warm_start_keeps_far_jumps_in_log_space():
    # a sampler's next point starts from what the last evaluation learned: one round, and
    # the same value at the same rates (common practice: deterministic re-evaluation)
    b, d = linear_rates(600, 0.05, 0.05)
    prep = PreparedCounts([0.0, 1.0, 2.0], [50, 400, 380])
    first = prep.evaluate(b, d)
    again = prep.evaluate(b, d)
    assert again.rounds == 1 and again.ll == pytest.approx(first.ll, rel=1e-14)
    # reference for the far pair: Bailey (1964) §8.6
    assert again.pointwise[0][0] == pytest.approx(float(linear_log_p(50, 400, 0.05, 0.05, 1.0)), rel=REL_LOG)


def test_a_group_leaves_log_space_when_its_probability_is_ordinary_again():
    # reference: Bailey (1964) §8.6 at each rate; a sampler moving from rates where the pair is
    # astronomically unlikely to rates where it is not must not keep paying for log space
    plan = ExactPlan(as_series([0.0, 1.0], [50, 400]))
    for lam, log_space in ((0.05, True), (0.9, False), (0.05, True)):
        b, d = linear_rates(2000, lam, lam)
        r = evaluate_exact(plan, b, d, 2000, 1e-10, True)
        assert r.ll == pytest.approx(float(linear_log_p(50, 400, lam, lam, 1.0)), rel=REL_LOG)
        assert bool(plan.groups.warm["log_space"][0]) is log_space


def test_environment_average_of_a_far_jump():
    # reference: the environment average ∫ φ(x) P_{mn}(t; λ e^{σx − σ²/2}) dx of Bailey's
    # closed form (1964, §8.6), by the trapezoid rule at 30 digits on x ∈ [−8, 14], step 0.1
    # (spectrally accurate for a smooth integrand of unit width; common practice)
    N, lam, mu, m, n = 600, 0.05, 0.05, 50, 400
    b, d = linear_rates(N, lam, mu)
    plain = PreparedCounts([0.0, 1.0], [m, n], environment={"affects": "birth"})
    assert plain.evaluate_environment(b, d, 0.0).ll == pytest.approx(float(linear_log_p(m, n, lam, mu, 1.0)),
                                                                     rel=REL_LOG)
    sigma = 0.01
    with mp.workdps(30):
        h = mp.mpf("0.1")
        total = mp.fsum(mp.npdf(x) * mp.exp(linear_log_p(m, n, mp.mpf(lam) * mp.exp(sigma * x - mp.mpf(sigma) ** 2 / 2),
                                                         mu, 1.0, dps=30))
                        for x in (-8 + h * k for k in range(221)))
        ref = float(mp.log(total * h))
    prep = PreparedCounts([0.0, 1.0], [m, n], environment={"affects": "birth", "nodes": 13})
    r = prep.evaluate_environment(b, d, sigma)
    shift = quadrature_shift(prep.environment, b, d, N, sigma, np.zeros(0), np.zeros(0), 13)
    assert abs(r.ll - ref) <= 2.0 * shift + 1e-9
    assert abs(r.ll - ref) <= 1e-6
    # d_sigma against central finite differences (common practice)
    eps = 1e-7
    fd = (prep.evaluate_environment(b, d, sigma + eps, grad=False).ll
          - prep.evaluate_environment(b, d, sigma - eps, grad=False).ll) / (2 * eps)
    assert r.d_sigma == pytest.approx(fd, rel=1e-6)
