"""Birth–death chains whose answers are known in closed form (../shared/CHECKS.md).

Every check names its outside source beside it. Reference numbers come only from
published formulas, scipy.stats distributions, scipy.linalg (expm, solve, eig) and
mpmath at high precision; nothing here is checked against numbers the project made.
"""
from __future__ import annotations

import math

import mpmath
import numpy as np
import pytest
from scipy import linalg, stats

from tallyfit.chain import BirthDeathChain, StepChain
from tallyfit.chain.errors import ChainError
from reference import generator


# --------------------------------------------------------------------------- helpers


def step_matrix(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Dense one-step matrix of a step chain on 0..N (common practice: r = 1 - p - q)."""
    p = np.asarray(p, dtype=float).copy()
    q = np.asarray(q, dtype=float)
    p[-1] = 0.0
    m = np.diag(p[:-1], 1) + np.diag(q[1:], -1)
    m += np.diag(1.0 - m.sum(axis=1))
    return m


def logistic_rates(n_cap: int, b: float = 1.0, d: float = 0.5, k: float = 8.0,
                   immigration: float = 0.0) -> tuple[np.ndarray, np.ndarray]:
    """Stochastic logistic rates λ_n = b n + ι, μ_n = n (d + (b - d) n / K) (Nåsell 2001 form)."""
    n = np.arange(n_cap + 1, dtype=float)
    return b * n + immigration, n * (d + (b - d) * n / k)


def const(value: float):
    return lambda n: np.full(np.shape(n), float(value))


# ------------------------------------------------------------ single-server queue
@pytest.mark.parametrize("a,b", [(1.0, 2.0), (0.3, 1.0), (9.0, 10.0)])
def test_single_server_queue_stationary_is_geometric(a, b):
    chain = BirthDeathChain(const(a), lambda n: np.where(n > 0, b, 0.0))
    assert chain.cap is None
    s = chain.stationary()
    assert s.exists, s.reason
    rho = a / b
    sizes = np.arange(s.pmf.size)
    # Kleinrock (1975) Queueing Systems Vol. 1, ch. 3: π_n = (1 − ρ) ρ^n; scipy.stats.geom lives on 1, 2, ...
    np.testing.assert_allclose(s.pmf, stats.geom.pmf(sizes + 1, 1.0 - rho), rtol=1e-9, atol=1e-300)
    np.testing.assert_allclose(s.log_pmf, stats.geom.logpmf(sizes + 1, 1.0 - rho), rtol=0, atol=1e-9)
    assert s.tail_bound <= 1e-12
    # Kleinrock (1975) ch. 3: P(size > M) = ρ^{M+1}; the stated bound must cover the mass really cut off.
    true_tail = rho ** s.pmf.size
    assert s.tail_bound >= true_tail * (1 - 1e-6)
    # Kleinrock (1975) ch. 3: mean queue length ρ / (1 − ρ).
    assert s.mean == pytest.approx(rho / (1.0 - rho), rel=1e-9)


@pytest.mark.parametrize("a,b", [(1.0, 1.0), (2.0, 1.0), (1.0001, 1.0)])
def test_single_server_queue_has_no_stationary_law_when_rho_at_least_one(a, b):
    # Kleinrock (1975) ch. 3: no stationary distribution for ρ >= 1.
    s = BirthDeathChain(const(a), lambda n: np.where(n > 0, b, 0.0)).stationary()
    assert not s.exists
    assert s.pmf.size == 0
    assert math.isnan(s.mean)
    assert s.reason.strip()


# ------------------------------------------------------------- immigration–death
@pytest.mark.parametrize("iota,delta", [(3.0, 0.5), (0.2, 1.0), (150.0, 1.5)])
def test_immigration_death_stationary_is_poisson_unbounded(iota, delta):
    chain = BirthDeathChain(const(iota), lambda n: delta * n)
    s = chain.stationary()
    assert s.exists, s.reason
    sizes = np.arange(s.pmf.size)
    # Karlin & Taylor (1975) A First Course in Stochastic Processes, 2nd ed. (infinite-server queue): Poisson(ι/δ).
    expected = stats.poisson.pmf(sizes, iota / delta)
    big = expected > 1e-280
    np.testing.assert_allclose(s.pmf[big], expected[big], rtol=1e-9)
    assert s.tail_bound <= 1e-12
    # the mass really beyond the truncation (scipy.stats.poisson.sf) must be covered by the bound
    assert s.tail_bound >= stats.poisson.sf(sizes[-1], iota / delta) * (1 - 1e-6)
    assert s.mean == pytest.approx(iota / delta, rel=1e-9)


def test_immigration_death_stationary_finite_cap_is_truncated_poisson():
    iota, delta, cap = 6.0, 0.5, 200
    n = np.arange(cap + 1, dtype=float)
    s = BirthDeathChain(np.full(cap + 1, iota), delta * n).stationary()
    assert s.exists
    assert s.tail_bound == 0.0
    # Karlin & Taylor (1975) 2nd ed.: Poisson(ι/δ); a reflecting cap truncates and renormalises it.
    expected = stats.poisson.pmf(n, iota / delta) / stats.poisson.cdf(cap, iota / delta)
    big = expected > 1e-280
    np.testing.assert_allclose(s.pmf[big], expected[big], rtol=1e-10)
    np.testing.assert_allclose(s.log_pmf, stats.poisson.logpmf(n, iota / delta)
                               - stats.poisson.logcdf(cap, iota / delta), rtol=1e-10, atol=1e-9)
    assert s.mean == pytest.approx(iota / delta, rel=1e-10)
    assert s.residual <= 1e-10


@pytest.mark.parametrize("t", [0.05, 0.7, 3.0, 20.0])
def test_immigration_death_transient_from_zero_is_poisson(t):
    iota, delta, cap = 3.0, 0.5, 80
    n = np.arange(cap + 1, dtype=float)
    chain = BirthDeathChain(np.full(cap + 1, iota), delta * n)
    row = chain.transition(t, starts=[0])
    assert row.shape == (1, cap + 1)
    # Karlin & Taylor (1975) 2nd ed.: from 0 at time t, Poisson((ι/δ)(1 − e^{−δt})).
    expected = stats.poisson.pmf(n, iota / delta * (1 - np.exp(-delta * t)))
    np.testing.assert_allclose(row[0], expected, rtol=0, atol=1e-13)
    # Relative accuracy on the small entries away from the cap (the cap at 80 moves these by < 1e-30).
    near = (n <= 40) & (expected >= 1e-100)
    np.testing.assert_allclose(row[0][near], expected[near], rtol=1e-8)


# -------------------------------------------------------------------- Erlang B
def erlang_b(c: int, a: float) -> float:
    # Erlang (1917): B_0 = 1, B_k = a B_{k-1} / (k + a B_{k-1}).
    b = 1.0
    for k in range(1, c + 1):
        b = a * b / (k + a * b)
    return b


@pytest.mark.parametrize("c,a", [(10, 5.0), (1, 0.5), (30, 25.0), (120, 100.0), (5, 40.0)])
def test_erlang_b_is_the_stationary_mass_at_the_cap(c, a):
    # Loss system: λ_n = a for n < c, μ_n = n, cap c (blocked arrivals are lost).
    birth = np.full(c + 1, a)
    death = np.arange(c + 1, dtype=float)
    s = BirthDeathChain(birth, death).stationary()
    assert s.exists
    # Erlang (1917): the blocking probability is π_c, given by the recursion above.
    assert s.pmf[c] == pytest.approx(erlang_b(c, a), rel=1e-12)


def test_erlang_b_recalled_value():
    s = BirthDeathChain(np.full(11, 5.0), np.arange(11, dtype=float)).stationary()
    # Erlang (1917); B(c=10, a=5) ≈ 0.01838 (from memory).
    assert s.pmf[10] == pytest.approx(0.01838, abs=5e-6)


# --------------------------------------------------------- linear birth–death
def linear_extinction_by_t(lam: float, mu: float, t: np.ndarray) -> np.ndarray:
    """Kendall (1948) Ann. Math. Stat. 19:1–15; Bailey (1964) The Elements of Stochastic Processes, ch. 8.

    P(extinct by t | 1) = μ(e^{(λ−μ)t} − 1) / (λ e^{(λ−μ)t} − μ); λ = μ: λt / (1 + λt).
    """
    t = np.asarray(t, dtype=float)
    if lam == mu:
        return lam * t / (1 + lam * t)
    e = np.exp((lam - mu) * t)
    return mu * (e - 1) / (lam * e - mu)


LINEAR_CASES = [(1.0, 0.7), (0.5, 1.0), (1.0, 1.0), (0.3, 0.31)]


@pytest.mark.parametrize("lam,mu", LINEAR_CASES)
@pytest.mark.parametrize("start", [1, 5])
def test_linear_birth_death_extinction_curve(lam, mu, start):
    # Cap 400: from size <= 5 by t = 4 the chance of ever reaching 400 is below 1e-40 here,
    # so the reflection cannot move the extinction probability visibly.
    cap = 400
    n = np.arange(cap + 1, dtype=float)
    chain = BirthDeathChain(lam * n, mu * n)
    times = np.array([0.0, 0.01, 0.1, 0.5, 1.0, 2.0, 4.0])
    curve = chain.extinction_curve(start, times)
    np.testing.assert_array_equal(curve.times, times)
    np.testing.assert_array_equal(np.asarray(curve), curve.probability)
    # Kendall (1948); Bailey (1964) ch. 8: from n, the n-th power of the curve from 1.
    expected = linear_extinction_by_t(lam, mu, times) ** start
    np.testing.assert_allclose(curve.probability, expected, rtol=1e-8, atol=1e-13)
    assert np.all(np.asarray(curve.error_bound) >= 0)
    assert np.all(np.asarray(curve.error_bound) <= 1e-10)


@pytest.mark.parametrize("lam,mu", [(1.0, 0.7), (0.5, 1.0), (1.2, 0.4)])
@pytest.mark.parametrize("t", [0.1, 1.0, 3.0])
def test_linear_birth_death_transition_from_one(lam, mu, t):
    # Kendall (1948); Bailey (1964) ch. 8 (from memory): P_{1,0}(t) = α,
    # P_{1,n}(t) = (1 − α)(1 − β)β^{n−1}, α = μ(e^{(λ−μ)t} − 1)/(λe^{(λ−μ)t} − μ),
    # β = λ(e^{(λ−μ)t} − 1)/(λe^{(λ−μ)t} − μ); the n >= 1 part is scipy.stats.geom(1 − β).
    e = np.exp((lam - mu) * t)
    alpha = mu * (e - 1) / (lam * e - mu)
    beta = lam * (e - 1) / (lam * e - mu)
    # Cap where the geometric tail β^cap is below 1e-30, so paths that touched the cap cannot matter.
    cap = int(np.ceil(-30 * np.log(10) / np.log(beta))) + 20
    n = np.arange(cap + 1, dtype=float)
    row = BirthDeathChain(lam * n, mu * n).transition(t, starts=[1])[0]
    expected = np.r_[alpha, (1 - alpha) * stats.geom.pmf(n[1:], 1 - beta)]
    np.testing.assert_allclose(row, expected, rtol=0, atol=1e-13)
    ok = expected >= 1e-20  # where paths that touched the cap (< 1e-30) cannot matter
    np.testing.assert_allclose(row[ok], expected[ok], rtol=1e-8)


@pytest.mark.parametrize("lam,mu", [(2.0, 1.0), (1.0, 0.3), (1.0, 2.0), (1.0, 1.0)])
def test_linear_birth_death_ultimate_extinction_unbounded(lam, mu):
    chain = BirthDeathChain(lambda n: lam * n, lambda n: mu * n)
    sizes = np.array([0, 1, 2, 5, 10, 30])
    got = chain.extinction_probability(sizes)
    # Kendall (1948); Bailey (1964) ch. 8: ultimate extinction from n is min(1, μ/λ)^n.
    np.testing.assert_allclose(got, min(1.0, mu / lam) ** sizes, rtol=1e-10, atol=1e-14)


def test_unbounded_extinction_probability_slowly_converging_tail():
    # λ_n = n + 2, μ_n = n (n >= 1), 0 absorbing: Π_{k<=i} μ_k/λ_k = 2 / ((i+1)(i+2)).
    # Karlin & McGregor (1957) Trans. AMS 86:366–400 (also Karlin & Taylor 1975 ch. 4):
    # P(extinction | n) = Σ_{i>=n} ρ_i / Σ_{i>=0} ρ_i = 1 / (n + 1)  (telescoping sum).
    chain = BirthDeathChain(lambda n: np.where(n > 0, n + 2.0, 0.0), lambda n: 1.0 * n)
    sizes = np.array([1, 2, 3, 9])
    try:
        got = chain.extinction_probability(sizes)
    except ChainError as err:  # refusing is honest; a silently wrong number is not
        assert "converg" in str(err).lower() or "tail" in str(err).lower()
        return
    if np.all(np.isnan(got)):  # documented refusal: nan where the series was inconclusive
        return
    np.testing.assert_allclose(got, 1.0 / (sizes + 1), rtol=0, atol=1e-5)


# ------------------------------------------------------------------ pure birth
@pytest.mark.parametrize("t", [0.1, 0.5, 1.0, 1.5])
def test_yule_transition_rows(t):
    lam, cap = 1.0, 160
    n = np.arange(cap + 1, dtype=float)
    chain = BirthDeathChain(lam * n, np.zeros(cap + 1))
    rows = chain.transition(t, starts=[1, 3])
    assert rows.shape == (2, cap + 1)
    sizes = np.arange(1, cap)  # below the cap a pure-birth chain never feels it
    # Feller (1968) Vol. 1, 3rd ed., XVII.3: P_{1,n}(t) = e^{−λt}(1 − e^{−λt})^{n−1} = scipy.stats.geom(e^{−λt}).
    p1 = stats.geom.pmf(sizes, np.exp(-lam * t))
    # Feller (1968) XVII.3 (start i, from memory): C(n−1, n−i) e^{−iλt}(1 − e^{−λt})^{n−i}
    # = scipy.stats.nbinom(i, e^{−λt}) at n − i.
    p3 = np.where(sizes >= 3, stats.nbinom.pmf(sizes - 3, 3, np.exp(-lam * t)), 0.0)
    for got, expected in ((rows[0, 1:cap], p1), (rows[1, 1:cap], p3)):
        np.testing.assert_allclose(got, expected, rtol=0, atol=1e-13)
        tiny_ok = expected >= 1e-100
        np.testing.assert_allclose(got[tiny_ok], expected[tiny_ok], rtol=1e-8)
    assert abs(rows[0, 0]) <= 1e-300 and abs(rows[1, :3]).max() <= 1e-300  # no way down


# ------------------------------------------------------------------ pure death
@pytest.mark.parametrize("t", [0.01, 0.3, 1.0, 3.0])
def test_pure_death_is_binomial(t):
    mu, m, cap = 0.7, 30, 40
    n = np.arange(cap + 1, dtype=float)
    chain = BirthDeathChain(np.zeros(cap + 1), mu * n)
    row = chain.transition(t, starts=[m])[0]
    survive = np.exp(-mu * t)
    # common practice: each of m individuals survives to t independently with prob e^{−μt}.
    expected = stats.binom.pmf(n, m, survive)
    np.testing.assert_allclose(row, expected, rtol=0, atol=1e-13)
    ok = expected >= 1e-100
    np.testing.assert_allclose(row[ok], expected[ok], rtol=1e-8)


def test_pure_death_extinction_and_quasi_extinction_curves():
    mu, m, cap = 0.7, 30, 30
    n = np.arange(cap + 1, dtype=float)
    chain = BirthDeathChain(np.zeros(cap + 1), mu * n)
    times = np.array([0.0, 0.2, 1.0, 3.0, 6.0, 12.0])
    survive = np.exp(-mu * times)
    # common practice (Binomial(m, e^{−μt})): P(extinct by t) = (1 − e^{−μt})^m.
    got = chain.extinction_curve(m, times).probability
    np.testing.assert_allclose(got, (1 - survive) ** m, rtol=1e-8, atol=1e-14)
    # sizes only fall, so first reaching <= k by t is the same as size <= k at t: binomial cdf.
    for k in (3, 10, 29):
        got = chain.extinction_curve(m, times, threshold=k).probability
        np.testing.assert_allclose(got, stats.binom.cdf(k, m, survive), rtol=1e-8, atol=1e-14)
    # common practice: extinction from m is a sum of exponential waits, Σ_{k=1}^m 1/(μ k).
    tau = chain.mean_time_to_extinction()
    expected = np.concatenate([[0.0], np.cumsum(1.0 / (mu * np.arange(1, cap + 1)))])
    np.testing.assert_allclose(tau, expected, rtol=1e-12)


# ------------------------------------------------------------- gambler's ruin
def ruin_step_chain(p: float, q: float, a: int) -> StepChain:
    """Step chain on 0..a moving up with p and down with q inside, absorbing at 0 and a."""
    up = np.full(a + 1, p)
    down = np.full(a + 1, q)
    up[0] = down[0] = up[a] = down[a] = 0.0
    return StepChain(up, down)


def feller_ruin(p: float, q: float, a: int, z: np.ndarray) -> np.ndarray:
    # Feller (1968) Vol. 1, XIV.2, eq. (2.4): q_z = ((q/p)^a − (q/p)^z) / ((q/p)^a − 1); p = q: 1 − z/a.
    if p == q:
        return 1.0 - z / a
    s = q / p
    return (s**a - s**z) / (s**a - 1.0)


def feller_duration(p: float, q: float, a: int, z: np.ndarray) -> np.ndarray:
    # Feller (1968) Vol. 1, XIV.3, eq. (3.4): D_z = z/(q−p) − (a/(q−p)) (1 − (q/p)^z)/(1 − (q/p)^a); p = q: z(a − z).
    if p == q:
        return z * (a - z)
    s = q / p
    return z / (q - p) - a / (q - p) * (1 - s**z) / (1 - s**a)


@pytest.mark.parametrize("p,a", [(0.5, 10), (0.45, 10), (0.6, 15), (0.3, 8)])
def test_gamblers_ruin_probability(p, a):
    q = 1.0 - p
    z = np.arange(a + 1)
    chain = ruin_step_chain(p, q, a)
    got = chain.absorption_probability()
    np.testing.assert_allclose(got, feller_ruin(p, q, a, z.astype(float)), rtol=1e-10, atol=1e-14)
    got_some = chain.absorption_probability(sizes=[1, a - 1])
    np.testing.assert_allclose(got_some, feller_ruin(p, q, a, np.array([1.0, a - 1.0])), rtol=1e-10)


@pytest.mark.parametrize("p,a", [(0.5, 10), (0.45, 10), (0.6, 8)])
def test_gamblers_ruin_expected_duration(p, a):
    # E[duration] = Σ_{k>=0} P(game not over after k steps), the mass still on 1..a−1 in P^k.
    q = 1.0 - p
    chain = ruin_step_chain(p, q, a)
    total = np.zeros(a + 1)
    for k in range(0, 5000):
        alive = chain.transition(k)[:, 1:a].sum(axis=1)
        total += alive
        if alive.max() < 1e-18:
            break
    else:
        raise AssertionError("game did not end within 5000 steps")
    # Feller (1968) Vol. 1, XIV.3, eq. (3.4).
    z = np.arange(a + 1, dtype=float)
    np.testing.assert_allclose(total, feller_duration(p, q, a, z), rtol=1e-9, atol=1e-12)


def test_gamblers_ruin_matches_linear_solve():
    # Karlin & Taylor (1975) ch. 3 first-step analysis: u = P_T u + r solved with scipy.linalg.solve.
    p, q, a = 0.47, 0.53, 12
    m = step_matrix(np.r_[0.0, np.full(a - 1, p), 0.0], np.r_[0.0, np.full(a - 1, q), 0.0])
    inner = slice(1, a)
    u = linalg.solve(np.eye(a - 1) - m[inner, inner], m[inner, 0])
    got = ruin_step_chain(p, q, a).absorption_probability()
    np.testing.assert_allclose(got[1:a], u, rtol=1e-10)


# ------------------------------------------------------------------------ Moran
def moran_step_chain(n_pop: int, r: float) -> StepChain:
    """Moran process for a mutant of fitness r in a population of n_pop (from memory):

    p_i = r i (N − i) / ((r i + N − i) N),  q_i = (N − i) i / ((r i + N − i) N);  0 and N absorb.
    """
    i = np.arange(n_pop + 1, dtype=float)
    denom = (r * i + n_pop - i) * n_pop
    return StepChain(r * i * (n_pop - i) / denom, (n_pop - i) * i / denom)


@pytest.mark.parametrize("n_pop,r", [(20, 1.1), (20, 0.9), (50, 2.0), (10, 1.0), (100, 1.01)])
def test_moran_fixation_probability(n_pop, r):
    chain = moran_step_chain(n_pop, r)
    i = np.arange(n_pop + 1, dtype=float)
    fixation = 1.0 - chain.absorption_probability()
    # Moran (1958); Nowak (2006) Evolutionary Dynamics, ch. 6: (1 − r^{−i}) / (1 − r^{−N}); neutral i / N.
    expected = i / n_pop if r == 1.0 else (1 - r**-i) / (1 - r**-float(n_pop))
    np.testing.assert_allclose(fixation, expected, rtol=1e-10, atol=1e-14)


# ---------------------------------------------------------------------- two urns
@pytest.mark.parametrize("n_balls", [1, 10, 30, 200])
def test_two_urn_stationary_is_binomial(n_balls):
    n = np.arange(n_balls + 1, dtype=float)
    s = StepChain((n_balls - n) / n_balls, n / n_balls).stationary()
    assert s.exists
    # Kac (1947) Amer. Math. Monthly 54:369–391: stationary Binomial(N, 1/2).
    expected = stats.binom.pmf(n, n_balls, 0.5)
    np.testing.assert_allclose(s.pmf, expected, rtol=1e-10, atol=1e-300)
    assert s.mean == pytest.approx(n_balls / 2, rel=1e-12)


# ------------------------------------------------------- mean time to extinction
def allen_mean_time(birth, death, dps: int = 50) -> list:
    """Closed-form mean time to extinction of a finite chain with 0 absorbing, in mpmath.

    Allen (2010) An Introduction to Stochastic Processes with Applications to Biology,
    2nd ed., ch. 6; Karlin & Taylor (1975) ch. 4:
      τ_1 = 1/μ_1 + Σ_{i=2}^N (λ_1⋯λ_{i−1}) / (μ_1⋯μ_i)
      τ_n = τ_1 + Σ_{s=1}^{n−1} [(μ_1⋯μ_s)/(λ_1⋯λ_s)] Σ_{i=s+1}^N (λ_1⋯λ_{i−1})/(μ_1⋯μ_i)
    """
    with mpmath.workdps(dps):
        lam = [mpmath.mpf(float(x)) for x in birth]
        mu = [mpmath.mpf(float(x)) for x in death]
        big_n = len(lam) - 1

        def w(i):  # (λ_1⋯λ_{i−1}) / (μ_1⋯μ_i)
            v = 1 / mu[i]
            for k in range(1, i):
                v *= lam[k] / mu[k]
            return v

        ws = [None] + [w(i) for i in range(1, big_n + 1)]
        tau1 = mpmath.fsum(ws[1:])
        out = [mpmath.mpf(0), tau1]
        for n in range(2, big_n + 1):
            acc = tau1
            for s in range(1, n):
                ratio = mpmath.mpf(1)
                for k in range(1, s + 1):
                    ratio *= mu[k] / lam[k]
                acc += ratio * mpmath.fsum(ws[s + 1:])
            out.append(acc)
        return out


@pytest.mark.parametrize("rates", [
    logistic_rates(30, b=1.0, d=0.5, k=8.0),
    logistic_rates(25, b=2.0, d=1.0, k=5.0),
    (np.arange(21) * 0.4, np.arange(21) * 1.0),  # subcritical linear, cap 20
])
def test_mean_time_to_extinction_closed_form_and_linear_system(rates):
    birth, death = rates
    birth = birth.copy()
    birth[-1] = 0.0  # the cap reflects
    chain = BirthDeathChain(birth, death)
    tau = chain.mean_time_to_extinction()
    assert tau[0] == 0.0
    # Allen (2010) ch. 6; Karlin & Taylor (1975) ch. 4: closed-form sums, evaluated with mpmath.
    closed = np.array([float(x) for x in allen_mean_time(birth, death)])
    np.testing.assert_allclose(tau, closed, rtol=1e-10)
    # Karlin & Taylor (1975) ch. 4: −Q_T τ = 1 on the transient sizes 1..N (scipy.linalg.solve).
    q = generator(birth, death)
    lin = linalg.solve(-q[1:, 1:], np.ones(q.shape[0] - 1))
    np.testing.assert_allclose(tau[1:], lin, rtol=1e-9)
    some = chain.mean_time_to_extinction(sizes=[3, 1])
    np.testing.assert_allclose(some, closed[[3, 1]], rtol=1e-10)


def test_mean_time_to_extinction_unbounded_linear():
    lam, mu = 0.4, 1.0
    chain = BirthDeathChain(lambda n: lam * n, lambda n: mu * n)
    tau = chain.mean_time_to_extinction(sizes=[0, 1])
    # Allen (2010) ch. 6 (infinite-state form, from memory): τ_1 = Σ_{i>=1} λ^{i−1}/(μ^i i) = −ln(1 − λ/μ)/λ.
    np.testing.assert_allclose(tau, [0.0, -math.log(1 - lam / mu) / lam], rtol=1e-10)
    # Kendall (1948): supercritical, extinction not certain, so the mean time is infinite.
    sup = BirthDeathChain(lambda n: 2.0 * n, lambda n: 1.0 * n).mean_time_to_extinction(sizes=[0, 1, 4])
    assert sup[0] == 0.0 and np.all(np.isposinf(sup[1:]))


# ---------------------------------------------------------- unbounded criteria
@pytest.mark.parametrize("lam,mu,iota", [(0.5, 1.0, 2.0), (0.9, 1.0, 0.3), (2.0, 3.0, 10.0)])
def test_linear_with_immigration_stationary_negative_binomial(lam, mu, iota):
    chain = BirthDeathChain(lambda n: lam * n + iota, lambda n: mu * n)
    s = chain.stationary()
    assert s.exists, s.reason
    sizes = np.arange(s.pmf.size)
    # Karlin & McGregor (1957): π_n ∝ Π λ_{k−1}/μ_k = (λ/μ)^n Γ(n + ι/λ)/(Γ(ι/λ) n!), i.e.
    # negative binomial with r = ι/λ, success probability 1 − λ/μ (Bailey 1964 ch. 8, from memory).
    expected = stats.nbinom.pmf(sizes, iota / lam, 1 - lam / mu)
    big = expected > 1e-280
    np.testing.assert_allclose(s.pmf[big], expected[big], rtol=1e-9)
    assert s.mean == pytest.approx(iota / lam * (lam / mu) / (1 - lam / mu), rel=1e-8)
    assert s.tail_bound <= 1e-12
    assert s.tail_bound >= stats.nbinom.sf(sizes[-1], iota / lam, 1 - lam / mu) * (1 - 1e-6)


@pytest.mark.parametrize("lam,mu,iota", [(1.0, 1.0, 0.5), (1.5, 1.0, 0.5)])
def test_linear_with_immigration_no_stationary_law_when_not_subcritical(lam, mu, iota):
    # Karlin & McGregor (1957): Σ Π λ_{k−1}/μ_k diverges for λ >= μ, so no stationary law.
    s = BirthDeathChain(lambda n: lam * n + iota, lambda n: mu * n).stationary()
    assert not s.exists and s.pmf.size == 0 and s.reason.strip()


def test_no_stationary_law_for_a_slowly_diverging_sum():
    # λ_n = 1, μ_n = 1 + 1/n: Π_{k<=n} λ_{k−1}/μ_k = 1/(n + 1), the harmonic series — divergent.
    # Karlin & McGregor (1957): no stationary distribution; the ratio test is inconclusive here,
    # so a truncated vector would be a wrong answer.
    s = BirthDeathChain(const(1.0), lambda n: np.where(n > 0, 1.0 + 1.0 / np.maximum(n, 1), 0.0)).stationary()
    assert not s.exists
    assert s.pmf.size == 0
    assert s.reason.strip()


def test_slowly_converging_stationary_sum_is_honest():
    # λ_n = 1, μ_n = 1 + 2/n: Π_{k<=n} λ_{k−1}/μ_k = 2/((n+1)(n+2)), sum 2, so
    # π_n = 1/((n+1)(n+2)) and P(size > M) = 1/(M + 2) (Karlin & McGregor 1957; telescoping sum).
    s = BirthDeathChain(const(1.0), lambda n: np.where(n > 0, 1.0 + 2.0 / np.maximum(n, 1), 0.0)).stationary()
    if not s.exists:  # DESIGN §1: refuse, with a reason ...
        assert s.reason.strip() and s.pmf.size == 0
        return
    m = s.pmf.size - 1  # ... or say how much was cut off, truthfully
    assert s.tail_bound >= 1.0 / (m + 2) * (1 - 1e-6)
    n = np.arange(m + 1)
    np.testing.assert_allclose(s.pmf, 1.0 / ((n + 1) * (n + 2)), rtol=2 * s.tail_bound + 1e-9)


def test_absorbing_zero_has_no_stationary_law_and_points_to_quasi_stationary():
    # Karlin & Taylor (1975) ch. 4: with 0 absorbing the only stationary law is the point mass at 0.
    birth, death = logistic_rates(30)
    s = BirthDeathChain(birth, death).stationary()
    assert not s.exists
    assert "quasi_stationary" in s.reason or "quasi-stationary" in s.reason


# ---------------------------------------------------------- P(t) against expm
@pytest.mark.parametrize("cap", [5, 50, 300])
@pytest.mark.parametrize("dt", [0.1, 1.0, 5.0])
def test_transition_matches_expm(cap, dt):
    birth, death = logistic_rates(cap, b=1.0, d=0.4, k=0.4 * cap, immigration=0.7)
    chain = BirthDeathChain(birth, death)
    p = chain.transition(dt)
    assert p.shape == (cap + 1, cap + 1)
    # Al-Mohy & Higham (2009) via scipy.linalg.expm: P(t) = exp(Q t).
    ref = linalg.expm(generator(birth, death) * dt)
    assert np.abs(p - ref).max() <= 1e-12
    starts = [0, cap // 2, cap]
    rows = chain.transition(dt, starts=starts)
    assert np.abs(rows - ref[starts]).max() <= 1e-12


def test_transition_matches_expm_with_absorbing_zero():
    cap = 120
    birth, death = logistic_rates(cap, b=1.2, d=0.3, k=60.0)
    chain = BirthDeathChain(birth, death)
    ref = linalg.expm(generator(birth, death) * 2.5)  # Al-Mohy & Higham (2009), scipy.linalg.expm
    assert np.abs(chain.transition(2.5) - ref).max() <= 1e-12


@pytest.mark.parametrize("birth,death,dt", [
    (np.full(13, 0.01), 100.0 * np.arange(13), 1.0),  # π spans ~100 orders of magnitude
    (np.full(21, 1.0), 1.0 * np.arange(21), 1e-4),    # far entries ~ (dt)^20 / 20!
    (1.0 * np.arange(16) + 0.5, 0.5 * np.arange(16) * (1 + np.arange(16) / 4), 0.3),
])
def test_transition_relative_accuracy_against_mpmath(birth, death, dt):
    chain = BirthDeathChain(birth, death)
    p = chain.transition(dt)
    q = generator(birth, death)
    # mpmath at 160 digits: absolute error ~1e-150, so relative error on entries >= 1e-100 is negligible.
    with mpmath.workdps(160):
        ref = mpmath.expm(mpmath.matrix(q.tolist()) * mpmath.mpf(dt))
        ref = np.array([[float(ref[i, j]) for j in range(q.shape[0])] for i in range(q.shape[0])])
    ok = ref >= 1e-100
    assert ok.sum() > 0.5 * ok.size
    rel = np.abs(p[ok] - ref[ok]) / ref[ok]
    assert rel.max() <= 1e-8, f"worst relative error {rel.max():.2e}"


def test_step_transition_is_matrix_power():
    n = np.arange(31, dtype=float)
    p_up = 0.4 * (1 - n / 30)
    q_dn = 0.5 * n / 30
    chain = StepChain(p_up, q_dn)
    m = step_matrix(p_up, q_dn)
    for k in (0, 1, 7, 50):
        # common practice: the k-step matrix is the k-th power (numpy.linalg.matrix_power).
        np.testing.assert_allclose(chain.transition(k), np.linalg.matrix_power(m, k), rtol=0, atol=1e-13)
    np.testing.assert_allclose(chain.transition(9, starts=[2, 30]), np.linalg.matrix_power(m, 9)[[2, 30]],
                               rtol=0, atol=1e-13)


# --------------------------------------------------- extinction curves vs expm
def test_extinction_curve_with_threshold_matches_expm():
    cap = 60
    birth, death = logistic_rates(cap, b=1.0, d=0.5, k=20.0)
    chain = BirthDeathChain(birth, death)
    times = np.array([0.0, 0.5, 2.0, 10.0, 50.0])
    for threshold in (0, 4, 15):
        # Karlin & Taylor (1975) ch. 4: first passage to {0..k} = absorption when those sizes are made
        # absorbing; scipy.linalg.expm of that generator, mass in {0..k} (start above k).
        birth_a = birth.copy()
        death_a = death.copy()
        birth_a[: threshold + 1] = 0.0
        death_a[: threshold + 1] = 0.0
        q = generator(birth_a, death_a)
        start = 25
        ref = [linalg.expm(q * t)[start, : threshold + 1].sum() for t in times]
        got = chain.extinction_curve(start, times, threshold=threshold).probability
        np.testing.assert_allclose(got, ref, rtol=1e-8, atol=1e-12)


def test_step_extinction_curve_matches_matrix_power():
    n = np.arange(21, dtype=float)
    p_up = 0.3 * n / 20 * (1 - n / 20) + 0.1 * (n > 0)
    q_dn = 0.35 * n / 20
    chain = StepChain(np.where(n > 0, p_up, 0.0), q_dn)
    m = step_matrix(np.where(n > 0, p_up, 0.0), q_dn)
    steps = np.array([0, 1, 5, 40, 400])
    got = chain.extinction_curve(6, steps).probability
    # common practice: with 0 absorbing, P(extinct by k | 6) = (P^k)[6, 0].
    ref = [np.linalg.matrix_power(m, int(k))[6, 0] for k in steps]
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=1e-13)


# ------------------------------------------------------------- quasi-stationary
@pytest.mark.parametrize("rates", [
    logistic_rates(30, b=1.0, d=0.5, k=8.0),
    logistic_rates(20, b=1.5, d=1.0, k=4.0),
    (0.6 * np.arange(41), 1.0 * np.arange(41)),
])
def test_quasi_stationary_is_left_eigenvector(rates):
    birth, death = rates
    chain = BirthDeathChain(birth, death)
    qsd = chain.quasi_stationary()
    assert qsd.converged
    assert qsd.pmf[0] == 0.0
    assert qsd.pmf.sum() == pytest.approx(1.0, abs=1e-12)
    # Darroch & Seneta (1967) J. Appl. Prob. 4:192–196 (from memory); Karlin & Taylor (1975) ch. 4: left eigenvector of Q restricted to
    # sizes >= 1 for the eigenvalue nearest 0 (scipy.linalg.eig).
    w, vl = linalg.eig(generator(birth, death)[1:, 1:], left=True, right=False)
    i = int(np.argmax(w.real))
    v = np.abs(vl[:, i].real)
    v /= v.sum()
    np.testing.assert_allclose(qsd.pmf[1:], v, rtol=1e-7, atol=1e-12)
    assert qsd.decay_rate == pytest.approx(-w[i].real, rel=1e-8)
    assert qsd.mean == pytest.approx(float(np.arange(1, birth.size) @ v), rel=1e-8)


def test_step_quasi_stationary_is_left_eigenvector():
    n = np.arange(26, dtype=float)
    p_up = np.where(n > 0, 0.4 * (1 - n / 25), 0.0)
    q_dn = 0.05 + 0.3 * n / 25
    q_dn[0] = 0.0
    chain = StepChain(p_up, q_dn)
    qsd = chain.quasi_stationary()
    m = step_matrix(p_up, q_dn)[1:, 1:]
    # Darroch & Seneta (1965) J. Appl. Prob. 2:88–100 (from memory), discrete-time form: left eigenvector of the substochastic matrix (scipy.linalg.eig).
    w, vl = linalg.eig(m, left=True, right=False)
    i = int(np.argmax(w.real))
    v = np.abs(vl[:, i].real)
    v /= v.sum()
    assert qsd.pmf[0] == 0.0
    np.testing.assert_allclose(qsd.pmf[1:], v, rtol=1e-7, atol=1e-12)
    # one-step extinction probability from the quasi-stationary law is 1 − eigenvalue
    assert qsd.decay_rate == pytest.approx(1.0 - w[i].real, rel=1e-8)
