"""Properties every finite birth–death chain must have, on random chains (hypothesis).

Reference values come from facts of the trade (probabilities lie in [0, 1], rows of a
transition matrix sum to 1, global balance), from scipy.linalg.expm, from the linear
system for mean times solved with mpmath at high precision, and from exact simulation
compared within a stated Monte Carlo error (Gillespie 1977).
"""
from __future__ import annotations

import mpmath
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import linalg, stats

from tallyfit.chain import BirthDeathChain, StepChain
from reference import generator

SETTINGS = dict(deadline=None, suppress_health_check=[HealthCheck.too_slow])


# --------------------------------------------------------------------------- helpers


def step_matrix(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Dense one-step matrix on 0..N, reflecting cap (common practice: r = 1 - p - q)."""
    p = np.asarray(p, dtype=float).copy()
    p[-1] = 0.0
    m = np.diag(p[:-1], 1) + np.diag(np.asarray(q, dtype=float)[1:], -1)
    m += np.diag(1.0 - m.sum(axis=1))
    return m


@st.composite
def finite_chains(draw, immigration: bool | None = None, low: float = -3.0, high: float = 3.0,
                  max_cap: int = 40):
    """Random finite chain: N in 2..max_cap, rates log-uniform in [10^low, 10^high]."""
    n_cap = draw(st.integers(2, max_cap))
    exps = st.floats(low, high, allow_nan=False, allow_infinity=False)
    birth = 10.0 ** np.array(draw(st.lists(exps, min_size=n_cap + 1, max_size=n_cap + 1)))
    death = 10.0 ** np.array(draw(st.lists(exps, min_size=n_cap + 1, max_size=n_cap + 1)))
    death[0] = 0.0
    if immigration is None:
        immigration = draw(st.booleans())
    if not immigration:
        birth[0] = 0.0
    return birth, death


def log_global_balance_residual(log_pmf: np.ndarray, birth: np.ndarray, death: np.ndarray) -> float:
    """max_n |inflow_n / outflow_n − 1|, computed from log π so that tiny π are checked too.

    Common practice (global balance): π_{n−1} λ_{n−1} + π_{n+1} μ_{n+1} = π_n (λ_n + μ_n), λ_N = 0.
    """
    lam = np.asarray(birth, dtype=float).copy()
    lam[-1] = 0.0
    mu = np.asarray(death, dtype=float)
    with np.errstate(divide="ignore"):
        llam, lmu = np.log(lam), np.log(mu)
    log_out = log_pmf + np.log(lam + mu)
    worst = 0.0
    for n in range(log_pmf.size):
        ratio = 0.0
        if n >= 1:
            ratio += np.exp(log_pmf[n - 1] + llam[n - 1] - log_out[n])
        if n + 1 < log_pmf.size:
            ratio += np.exp(log_pmf[n + 1] + lmu[n + 1] - log_out[n])
        worst = max(worst, abs(ratio - 1.0))
    return worst


# ------------------------------------------------------------------- stationary
@settings(max_examples=50, **SETTINGS)
@given(finite_chains(immigration=True))
def test_stationary_sums_to_one_and_balances(chain_rates):
    birth, death = chain_rates
    s = BirthDeathChain(birth, death).stationary()
    assert s.exists, s.reason
    assert s.pmf.shape == birth.shape
    assert np.all((s.pmf >= 0) & (s.pmf <= 1))
    assert s.pmf.sum() == pytest.approx(1.0, abs=1e-12)  # common practice
    assert s.tail_bound == 0.0
    assert s.residual <= 1e-10
    # common practice: global balance, checked independently in log space over every size
    assert log_global_balance_residual(s.log_pmf, birth, death) <= 1e-10
    np.testing.assert_allclose(np.exp(s.log_pmf), s.pmf, rtol=1e-12, atol=0)
    assert s.mean == pytest.approx(float(np.arange(birth.size) @ s.pmf), rel=1e-12, abs=1e-300)


@settings(max_examples=30, **SETTINGS)
@given(finite_chains(immigration=True, low=-1.0, high=1.0, max_cap=25))
def test_stationary_is_null_vector_of_generator(chain_rates):
    # scipy.linalg.solve: π Q = 0 with Σ π = 1 (rates within [0.1, 10] keep the solve well-conditioned).
    birth, death = chain_rates
    q = generator(birth, death)
    a = q.T.copy()
    a[-1, :] = 1.0
    rhs = np.zeros(birth.size)
    rhs[-1] = 1.0
    ref = linalg.solve(a, rhs)
    got = BirthDeathChain(birth, death).stationary().pmf
    # the solve's own absolute error is about cond(a)·eps (common practice), far above the
    # product form's for the smallest entries
    np.testing.assert_allclose(got, ref, rtol=1e-9, atol=max(1e-14, 4 * np.finfo(float).eps * np.linalg.cond(a)))


# ---------------------------------------------------------- extinction solvers
@settings(max_examples=50, **SETTINGS)
@given(finite_chains())
def test_extinction_probability_within_unit_interval(chain_rates):
    birth, death = chain_rates
    u = BirthDeathChain(birth, death).extinction_probability()
    assert u.shape == birth.shape
    assert np.all((u >= 0) & (u <= 1))
    # Karlin & Taylor (1975) ch. 4: a finite chain whose sizes >= 1 all lead to 0 dies out surely.
    np.testing.assert_allclose(u, 1.0, rtol=0, atol=1e-12)


def mp_minus_restricted_generator(birth: np.ndarray, death: np.ndarray) -> mpmath.matrix:
    """−Q restricted to sizes 1..N, built in mpmath from the rates themselves.

    The diagonal λ_n + μ_n is summed in mpmath: summed in double precision its rounding
    (relative 1e-16 of λ_n) can be a large part of a tiny μ_n and move the answer.
    """
    n_cap = len(birth) - 1
    lam = [mpmath.mpf(float(x)) for x in birth]
    mu = [mpmath.mpf(float(x)) for x in death]
    lam[n_cap] = mpmath.mpf(0)  # the cap reflects
    a = mpmath.zeros(n_cap, n_cap)
    for i in range(1, n_cap + 1):
        a[i - 1, i - 1] = lam[i] + mu[i]
        if i < n_cap:
            a[i - 1, i] = -lam[i]
        if i > 1:
            a[i - 1, i - 2] = -mu[i]
    return a


def mp_mean_time(birth: np.ndarray, death: np.ndarray, dps: int = 400) -> np.ndarray:
    """Karlin & Taylor (1975) ch. 4: −Q_T τ = 1 on sizes 1..N, solved by mpmath.lu_solve."""
    with mpmath.workdps(dps):
        a = mp_minus_restricted_generator(birth, death)
        tau = mpmath.lu_solve(a, mpmath.matrix([1] * (len(birth) - 1)))
        return np.array([0.0] + [float(x) for x in tau])


@settings(max_examples=30, **SETTINGS)
@given(finite_chains(max_cap=30))
def test_mean_time_to_extinction_equals_linear_system(chain_rates):
    birth, death = chain_rates
    tau = BirthDeathChain(birth, death).mean_time_to_extinction()
    assert tau[0] == 0.0
    ref = mp_mean_time(birth, death)
    np.testing.assert_allclose(tau, ref, rtol=1e-9)


@settings(max_examples=30, **SETTINGS)
@given(finite_chains(immigration=False, low=-1.0, high=1.0, max_cap=25))
def test_mean_time_to_extinction_equals_scipy_solve(chain_rates):
    # Karlin & Taylor (1975) ch. 4; Allen (2010) ch. 6: linear system with scipy.linalg.solve
    # (rates within [0.1, 10] keep it well-conditioned in double precision).
    birth, death = chain_rates
    q = generator(birth, death)
    ref = linalg.solve(-q[1:, 1:], np.ones(birth.size - 1))
    tau = BirthDeathChain(birth, death).mean_time_to_extinction()
    # the solve itself is only as good as its condition number allows (common practice)
    cond = np.linalg.cond(q[1:, 1:])
    np.testing.assert_allclose(tau[1:], ref, rtol=max(1e-9, 10 * cond * np.finfo(float).eps))


@settings(max_examples=40, **SETTINGS)
@given(finite_chains(immigration=False, max_cap=30),
       st.lists(st.floats(0.0, 50.0, allow_nan=False), min_size=2, max_size=12),
       st.data())
def test_extinction_curve_non_decreasing_and_in_unit_interval(chain_rates, times, data):
    birth, death = chain_rates
    n_cap = birth.size - 1
    start = data.draw(st.integers(1, n_cap))
    threshold = data.draw(st.integers(0, start - 1))
    times = np.sort(np.array(times))
    curve = BirthDeathChain(birth, death).extinction_curve(start, times, threshold=threshold)
    p = np.asarray(curve)
    assert p.shape == times.shape
    assert np.all((p >= 0) & (p <= 1))
    # common practice: a first-passage distribution function never decreases
    assert np.all(np.diff(p) >= -1e-13)
    assert np.all(np.asarray(curve.error_bound) >= 0)


@settings(max_examples=25, **SETTINGS)
@given(finite_chains(immigration=False, low=-1.0, high=1.0, max_cap=20),
       st.floats(0.01, 5.0), st.data())
def test_extinction_curve_matches_expm(chain_rates, t, data):
    # Karlin & Taylor (1975) ch. 4: with 0 absorbing, P(extinct by t | n) = exp(Q t)[n, 0]
    # (scipy.linalg.expm, Al-Mohy & Higham 2009).
    birth, death = chain_rates
    start = data.draw(st.integers(1, birth.size - 1))
    ref = linalg.expm(generator(birth, death) * t)[start, 0]
    got = BirthDeathChain(birth, death).extinction_curve(start, [t]).probability[0]
    assert got == pytest.approx(ref, rel=1e-8, abs=1e-12)


# -------------------------------------------------------------------- transition
@settings(max_examples=40, **SETTINGS)
@given(finite_chains(), st.floats(1e-3, 10.0))
def test_transition_rows_sum_to_one(chain_rates, t):
    birth, death = chain_rates
    p = BirthDeathChain(birth, death).transition(t)
    assert p.shape == (birth.size, birth.size)
    assert np.all((p >= 0) & (p <= 1))  # common practice
    # Rows sum to one (common practice). Round-off in uniformization grows with the number of
    # steps K = Λt (each step rounds once per entry), so the tolerance allows a few ulps per step.
    steps = float(np.max(birth[:-1] + death[:-1]).clip(min=death[-1])) * t
    np.testing.assert_allclose(p.sum(axis=1), 1.0, rtol=0, atol=max(1e-12, 4 * steps * np.finfo(float).eps))


@settings(max_examples=30, **SETTINGS)
@given(finite_chains(low=-2.0, high=2.0), st.floats(1e-3, 5.0))
def test_transition_matches_expm_on_random_chains(chain_rates, t):
    birth, death = chain_rates
    p = BirthDeathChain(birth, death).transition(t)
    # Al-Mohy & Higham (2009) via scipy.linalg.expm
    ref = linalg.expm(generator(birth, death) * t)
    assert np.abs(p - ref).max() <= 1e-11


@settings(max_examples=25, **SETTINGS)
@given(finite_chains(), st.floats(1e-2, 3.0), st.data())
def test_transition_rows_for_starts_match_full_matrix(chain_rates, t, data):
    birth, death = chain_rates
    chain = BirthDeathChain(birth, death)
    starts = data.draw(st.lists(st.integers(0, birth.size - 1), min_size=1, max_size=5))
    rows = chain.transition(t, starts=starts)
    assert rows.shape == (len(starts), birth.size)
    np.testing.assert_allclose(rows, chain.transition(t)[starts], rtol=1e-9, atol=1e-14)


@settings(max_examples=25, **SETTINGS)
@given(finite_chains(low=-1.0, high=1.0, max_cap=15), st.floats(0.05, 2.0))
def test_uniformization_identity(chain_rates, t):
    # Jensen (1953), uniformization (from memory): P(t) = Σ_k Poisson(k; Λt) P_step^k.
    birth, death = chain_rates
    chain = BirthDeathChain(birth, death)
    step = chain.to_step()
    up, down = step.rates_upto(birth.size - 1)
    m = step_matrix(up, down)
    # the uniformization rate: λ_n = Λ p_n wherever λ_n > 0
    b = birth.copy()
    b[-1] = 0.0
    rate = float(np.max(b + death))
    ks = np.arange(0, int(rate * t + 40 * np.sqrt(rate * t + 1) + 40))
    w = stats.poisson.pmf(ks, rate * t)
    ref = np.zeros_like(m)
    mk = np.eye(m.shape[0])
    for wk in w:
        ref += wk * mk
        mk = mk @ m
    np.testing.assert_allclose(chain.transition(t), ref, rtol=0, atol=1e-12)


# ------------------------------------------------------- step ⇄ continuous
@settings(max_examples=50, **SETTINGS)
@given(finite_chains(immigration=True))
def test_step_conversion_keeps_stationary_pmf(chain_rates):
    birth, death = chain_rates
    chain = BirthDeathChain(birth, death)
    b = birth.copy()
    b[-1] = 0.0
    rate = float(np.max(b + death))
    step = chain.to_step()
    # DESIGN §1 (uniformization): p = λ/Λ, q = μ/Λ with Λ = max(λ + μ) by default.
    p, q = step.rates_upto(birth.size - 1)
    np.testing.assert_allclose(p, b / rate, rtol=1e-14, atol=0)
    np.testing.assert_allclose(q, death / rate, rtol=1e-14, atol=0)
    s_c = chain.stationary()
    s_s = step.stationary()
    # Detailed balance depends only on the ratios λ_{n−1}/μ_n (common practice).
    np.testing.assert_allclose(s_s.log_pmf, s_c.log_pmf, rtol=0, atol=1e-9)
    back = step.to_continuous(rate=rate)
    np.testing.assert_allclose(back.stationary().log_pmf, s_c.log_pmf, rtol=0, atol=1e-9)
    bigger = chain.to_step(rate=3.0 * rate)
    np.testing.assert_allclose(bigger.stationary().log_pmf, s_c.log_pmf, rtol=0, atol=1e-9)


@settings(max_examples=30, **SETTINGS)
@given(finite_chains(immigration=False, max_cap=25))
def test_step_conversion_scales_mean_time(chain_rates):
    # Uniformization: at rate Λ each step takes mean time 1/Λ, so the mean number of steps to
    # extinction is Λ times the mean time (common practice).
    birth, death = chain_rates
    chain = BirthDeathChain(birth, death)
    step = chain.to_step(rate=2.0 * float(np.max(birth + death)))
    rate = 2.0 * float(np.max(birth + death))
    np.testing.assert_allclose(step.mean_time_to_extinction(), rate * chain.mean_time_to_extinction(),
                               rtol=1e-10)


# -------------------------------------------------------------------- simulate
@settings(max_examples=15, **SETTINGS)
@given(finite_chains(low=-1.0, high=1.0, max_cap=20), st.data())
def test_simulate_reproducible_and_matches_transition(chain_rates, data):
    birth, death = chain_rates
    chain = BirthDeathChain(birth, death)
    n_cap = birth.size - 1
    start = data.draw(st.integers(0, n_cap))
    seed = data.draw(st.integers(0, 2**31 - 1))
    times = np.array([0.0, 0.3, 1.5])
    n_paths = 2000
    paths = chain.simulate(start, times, n_paths=n_paths, seed=seed)
    assert paths.dtype == np.int64
    assert paths.shape == (n_paths, times.size)
    assert np.all(paths[:, 0] == start)
    assert paths.min() >= 0 and paths.max() <= n_cap
    np.testing.assert_array_equal(paths, chain.simulate(start, times, n_paths=n_paths, seed=seed))
    if birth[0] == 0:  # common practice: 0 absorbs
        assert np.all(paths[paths[:, 1] == 0, 2] == 0)
    sizes = np.arange(n_cap + 1)
    for j in (1, 2):
        row = chain.transition(times[j], starts=[start])[0]
        mean = float(sizes @ row)
        var = float((sizes - mean) ** 2 @ row)
        se = np.sqrt(var / n_paths)
        # Gillespie (1977) J. Phys. Chem. 81:2340–2361: exact paths; their mean is within 5
        # standard errors of the exact mean (false-alarm rate ~ 6e-7 per check).
        assert abs(paths[:, j].mean() - mean) <= 5 * se + 1e-12
        # the number of paths at 0 is Binomial(n_paths, P_start,0(t)): exact two-sided
        # binomial test (scipy.stats.binomtest) at level 1e-6 — a normal approximation
        # fails for rare events (one path in 2000 at 0 when P = 8e-6 happens 1.5% of the time)
        p0 = min(max(row[0], 1e-15), 1.0 - 1e-15)
        assert stats.binomtest(int((paths[:, j] == 0).sum()), n_paths, p0).pvalue > 1e-6


def test_simulate_distribution_matches_transition_row():
    # Gillespie (1977): exact paths; chi-square goodness of fit of the size at t = 2 against the
    # row of P(2) (scipy.stats.chisquare), at level 1e-6.
    n = np.arange(31, dtype=float)
    birth = 0.8 * n + 0.5
    death = n * (0.3 + 0.5 * n / 12.0)
    chain = BirthDeathChain(birth, death)
    paths = chain.simulate(4, [0.0, 2.0], n_paths=20000, seed=12345)
    row = chain.transition(2.0, starts=[4])[0]
    counts = np.bincount(paths[:, 1], minlength=31).astype(float)
    expected = row * paths.shape[0]
    keep = expected >= 5
    obs = np.r_[counts[keep], counts[~keep].sum()]
    exp = np.r_[expected[keep], expected[~keep].sum()]
    res = stats.chisquare(obs, exp * obs.sum() / exp.sum())
    assert res.pvalue > 1e-6


def test_simulate_unbounded_chain_mean():
    # Immigration–death from 0: Poisson((ι/δ)(1 − e^{−δt})) (Karlin & Taylor 1975, 2nd ed.);
    # the empirical mean is within 5 standard errors (Gillespie 1977).
    iota, delta = 4.0, 1.0
    chain = BirthDeathChain(lambda n: np.full(np.shape(n), iota), lambda n: delta * n)
    times = np.array([0.0, 0.5, 3.0])
    paths = chain.simulate(0, times, n_paths=5000, seed=7)
    for j in (1, 2):
        m = iota / delta * (1 - np.exp(-delta * times[j]))
        assert abs(paths[:, j].mean() - m) <= 5 * np.sqrt(m / paths.shape[0])


@settings(max_examples=15, **SETTINGS)
@given(finite_chains(low=-1.0, high=1.0, max_cap=20), st.data())
def test_step_simulate_matches_matrix_power(chain_rates, data):
    birth, death = chain_rates
    step = BirthDeathChain(birth, death).to_step()
    n_cap = birth.size - 1
    start = data.draw(st.integers(0, n_cap))
    seed = data.draw(st.integers(0, 2**31 - 1))
    steps = np.array([0, 3, 20])
    n_paths = 2000
    paths = step.simulate(start, steps, n_paths=n_paths, seed=seed)
    assert paths.dtype == np.int64 and paths.shape == (n_paths, 3)
    assert np.all(paths[:, 0] == start)
    np.testing.assert_array_equal(paths, step.simulate(start, steps, n_paths=n_paths, seed=seed))
    up, down = step.rates_upto(n_cap)
    m = step_matrix(up, down)
    sizes = np.arange(n_cap + 1)
    for j in (1, 2):
        row = np.linalg.matrix_power(m, int(steps[j]))[start]  # common practice: k-step matrix
        mean = float(sizes @ row)
        se = np.sqrt(float((sizes - mean) ** 2 @ row) / n_paths)
        assert abs(paths[:, j].mean() - mean) <= 5 * se + 1e-12  # 5 standard errors


# ------------------------------------------------------------- step chains
@st.composite
def step_chains(draw, absorbing: bool | None = None, max_cap: int = 40):
    """Random step chain: p_n, q_n >= 0 with p_n + q_n <= 1."""
    n_cap = draw(st.integers(2, max_cap))
    u = np.array(draw(st.lists(st.floats(0.001, 1.0), min_size=n_cap + 1, max_size=n_cap + 1)))
    share = np.array(draw(st.lists(st.floats(0.001, 0.999), min_size=n_cap + 1, max_size=n_cap + 1)))
    p = u * share
    q = u * (1 - share)
    q[0] = 0.0
    if absorbing is None:
        absorbing = draw(st.booleans())
    if absorbing:
        p[0] = 0.0
    return p, q


@settings(max_examples=40, **SETTINGS)
@given(step_chains(), st.integers(0, 200))
def test_step_transition_rows_sum_to_one(chain_pq, k):
    p, q = chain_pq
    m = StepChain(p, q).transition(k)
    assert np.all((m >= 0) & (m <= 1))
    np.testing.assert_allclose(m.sum(axis=1), 1.0, rtol=0, atol=1e-12)  # common practice
    # common practice: the k-step matrix is the k-th power (numpy.linalg.matrix_power)
    np.testing.assert_allclose(m, np.linalg.matrix_power(step_matrix(p, q), k), rtol=0, atol=1e-12)


@settings(max_examples=40, **SETTINGS)
@given(step_chains(absorbing=False))
def test_step_stationary_balances(chain_pq):
    p, q = chain_pq
    s = StepChain(p, q).stationary()
    assert s.exists
    assert s.pmf.sum() == pytest.approx(1.0, abs=1e-12)
    assert s.residual <= 1e-10
    # common practice: π P = π (global balance), in log space
    assert log_global_balance_residual(s.log_pmf, p, q) <= 1e-10


@settings(max_examples=30, **SETTINGS)
@given(step_chains(absorbing=True, max_cap=30))
def test_step_mean_time_equals_linear_system(chain_pq):
    p, q = chain_pq
    # Karlin & Taylor (1975) ch. 3: (I − P_T) τ = 1 on sizes 1..N, solved with mpmath.lu_solve;
    # I − P has off-diagonals −p, −q and diagonal p + q (built in mpmath from p, q: no rounding of 1 − r).
    with mpmath.workdps(400):
        a = mp_minus_restricted_generator(p, q)
        ref = [float(x) for x in mpmath.lu_solve(a, mpmath.matrix([1] * (p.size - 1)))]
    got = StepChain(p, q).mean_time_to_extinction()
    np.testing.assert_allclose(got[1:], ref, rtol=1e-9)
    assert got[0] == 0.0
