"""Checks of chain.environment (the annual chain under environmental variation) against outside
references, named beside each check."""
from __future__ import annotations

import numpy as np
import pytest
import scipy.linalg as sla
from scipy import integrate, stats

from reference import generator
from tallyfit.chain import BirthDeathChain, ChainError, EnvironmentalChain, RateError


def logistic(N: int, K: float, imm: float = 0.3) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(N + 1, dtype=float)
    return 0.9 * n + imm, n * (0.3 + 0.6 * n / K)


def scaled(birth, death, eps, sigma, affects):
    """Rates of one year with environment ε (the model of DESIGN.md §1, written out here)."""
    b = birth[0] + (birth - birth[0]) * np.exp(eps - sigma ** 2 / 2)
    d = death * (np.exp(-eps - sigma ** 2 / 2) if affects == "birth_and_death" else 1.0)
    return b, d


# -- σ = 0 is the plain chain ----------------------------------------------------------------
def test_sigma_zero_reproduces_birth_death_chain():
    # reference: BirthDeathChain (its solvers are checked against closed forms in
    # test_chain_closed_form.py); with σ = 0 the annual chain is exp(Q) exactly
    N = 40
    b, d = logistic(N, 20)
    c = EnvironmentalChain(b, d, 0.0)
    assert c.nodes == 1
    plain = BirthDeathChain(b, d)
    b0 = b.copy()
    b0[0] = 0.0
    absorbing = BirthDeathChain(b0, d)
    years = np.arange(1, 31)
    for start, k in [(5, 0), (8, 3), (30, 0)]:
        got = c.extinction_curve(start, years, k)
        ref = absorbing.extinction_curve(start, years.astype(float), k, tol=1e-13)
        assert np.max(np.abs(got.probability - ref.probability)) <= 1e-12
        assert np.all(got.error_bound <= 1e-10)
    qs, qref = c.quasi_stationary(), plain.quasi_stationary()
    assert np.abs(qs.pmf - qref.pmf).sum() <= 1e-11
    # annual decay −log ρ equals the continuous rate θ, as ρ = e^{−θ} (from memory: the spectral
    # mapping of exp)
    assert qs.decay_rate == pytest.approx(qref.decay_rate, rel=1e-9)
    lr, st = c.long_run(), plain.stationary()
    assert np.abs(lr.pmf - st.pmf).sum() <= 1e-12 and lr.residual <= 1e-12
    # Σ_{y≥1} S(y) ≤ E[T] ≤ Σ_{y≥0} S(y) for a non-increasing survival S (common practice)
    starts = np.array([1, 5, 20])
    mt = c.mean_time_to_extinction(starts)
    ref = absorbing.mean_time_to_extinction(starts)
    assert np.all(np.abs(mt.mean - ref) <= mt.error_bound) and np.all(mt.lower <= ref)
    assert np.all(mt.error_bound <= 0.5 + 1e-8 * ref)


def test_small_sigma_is_close_to_the_plain_chain():
    # reference: BirthDeathChain; the mean-corrected environment moves functionals by O(σ²)
    # (from memory: second-order expansion of E[f(ε)] for ε ~ N(0, σ²))
    b, d = logistic(40, 20)
    b0 = b.copy()
    b0[0] = 0.0
    ref = BirthDeathChain(b0, d).extinction_curve(5, np.array([10.0, 20.0]), 0).probability
    diffs = [np.max(np.abs(EnvironmentalChain(b, d, s).extinction_curve(5, [10, 20]).probability - ref))
             for s in (1e-2, 2e-2)]
    assert diffs[0] <= 1e-3 * ref.max() and diffs[1] / diffs[0] == pytest.approx(4.0, rel=0.05)


# -- the quadrature average ------------------------------------------------------------------
@pytest.mark.parametrize("affects", ["birth", "birth_and_death"])
@pytest.mark.parametrize("threshold", [None, 2])
def test_annual_matrix_matches_expm_averaged_over_a_fine_grid(affects, threshold):
    # reference: scipy.linalg.expm (Al-Mohy & Higham 2009) of each year's generator, averaged
    # over ε by the trapezoid rule on ±8σ with 241 points against scipy.stats.norm.pdf (for a
    # smooth integrand times a normal density the trapezoid rule converges geometrically:
    # Trefethen & Weideman 2014, SIAM Review 56:385–458)
    N, sigma = 15, 0.3
    b, d = logistic(N, 8)
    grid = np.linspace(-8 * sigma, 8 * sigma, 241)
    w = stats.norm.pdf(grid, 0, sigma)
    w[[0, -1]] *= 0.5
    w /= w.sum()
    ref = np.zeros((N + 1, N + 1))
    for e, we in zip(grid, w):
        bb, dd = scaled(b, d, e, sigma, affects)
        if threshold is not None:
            bb[: threshold + 1] = 0.0
            dd[: threshold + 1] = 0.0
        ref += we * sla.expm(generator(bb, dd))
    got = EnvironmentalChain(b, d, sigma, affects=affects, nodes=41).annual_matrix(threshold)
    assert np.max(np.abs(got - ref)) <= 1e-11
    assert np.all(got >= 0)
    # the default 13 nodes: entries next to the cap vary like e^{nε} (e^{2nε} with deaths
    # scaled too), the hardest case; the (2K+1)-node comparison must not understate the error
    got13 = EnvironmentalChain(b, d, sigma, affects=affects).annual_matrix(threshold)
    got27 = EnvironmentalChain(b, d, sigma, affects=affects, nodes=27).annual_matrix(threshold)
    assert np.max(np.abs(got13 - ref)) <= 1.1 * np.max(np.abs(got13 - got27)) + 1e-13


def test_quadrature_error_estimate_tracks_the_true_error():
    # reference: the 41-node Gauss–Hermite rule (numpy.polynomial.hermite.hermgauss) taken as
    # exact; comparing a rule with a finer one is common practice
    b, d = logistic(30, 15)
    exact = EnvironmentalChain(b, d, 0.6, nodes=41).extinction_curve(6, [5, 20]).probability
    for K in (3, 5):
        got = EnvironmentalChain(b, d, 0.6, nodes=K).extinction_curve(6, [5, 20], quadrature_error=True)
        err = np.abs(got.probability - exact)
        assert np.all(err <= 1.1 * got.quadrature_error + 1e-12)
        assert np.all(got.quadrature_error <= 1.1 * err + 1e-12)


# -- the linear process: log growth over one year ----------------------------------------------
def test_linear_process_log_growth_moments():
    # λ_n = b n, μ_n = d n, births × e^{ε−σ²/2}. Given ε the year is a linear birth–death
    # process with λ = b e^{ε−σ²/2}, r = λ − d: E[N_1] = n0 e^r and
    # Var[N_1] = n0 (λ+d)/r · e^r (e^r − 1)  (Bailey 1964, The Elements of Stochastic Processes,
    # ch. 8; Kendall 1948). Averaged over ε by scipy.integrate.quad these give E[N_1], E[N_1²].
    # Diffusion limit (Lande, Engen & Sæther 2003, ch. 1; Dennis, Munholland & Scott 1991): the
    # log growth L = log(N_1/n0) ≈ r_ε + (demographic noise of variance v_ε), v_ε =
    # Var[N_1|ε]/E[N_1|ε]² = (λ+d)(1 − e^{−r})/(r n0) → (b+d)/n0, so to second order in 1/n0
    #   E[L] = b − d − E[v_ε]/2  (E[e^{ε−σ²/2}] = 1; −v/2 from the delta method on log),
    #   Var[L] = b²(e^{σ²} − 1) + E[v_ε]  (the lognormal variance of b e^{ε−σ²/2}, ≈ b²σ²),
    # both with remainders O(1/n0²), checked at 4/n0².
    b, d, sigma, n0, N = 0.6, 0.5, 0.2, 400, 3000
    n = np.arange(N + 1, dtype=float)
    rows, bound = EnvironmentalChain(b * n, d * n, sigma).annual_rows([n0])
    row = rows[0]
    assert bound[0] <= 1e-15 and row[2500:].sum() <= 1e-20  # the cap plays no part

    def average(f):
        return integrate.quad(lambda e: f(e) * stats.norm.pdf(e, 0, sigma), -10 * sigma, 10 * sigma,
                              epsabs=0, epsrel=1e-13, limit=200)[0]

    def lam(e):
        return b * np.exp(e - sigma ** 2 / 2)

    def mean1(e):
        return n0 * np.exp(lam(e) - d)

    def var1(e):
        r = lam(e) - d
        return n0 * (lam(e) + d) / r * np.exp(r) * (np.exp(r) - 1)

    assert row @ n == pytest.approx(average(mean1), rel=1e-10)
    assert row @ n ** 2 == pytest.approx(average(lambda e: var1(e) + mean1(e) ** 2), rel=1e-10)
    ev = average(lambda e: var1(e) / mean1(e) ** 2)
    log_growth = np.log(np.maximum(n, 1) / n0)
    m = row @ log_growth
    v = row @ (log_growth - m) ** 2
    assert abs(m - (b - d - ev / 2)) <= 4 / n0 ** 2
    assert abs(m - (b - d)) > 10 / n0 ** 2  # the demographic term is really seen
    assert abs(v - (b ** 2 * np.expm1(sigma ** 2) + ev)) <= 4 / n0 ** 2
    assert ev == pytest.approx((b + d) / n0, rel=0.1)


# -- long-run law --------------------------------------------------------------------------
@pytest.mark.parametrize("affects", ["birth", "birth_and_death"])
def test_long_run_matches_power_iteration(affects):
    # reference: power iteration of the dense P̄ (numpy.linalg.matrix_power, 2^12 years; common
    # practice for the stationary law of an ergodic chain) and the global-balance residual
    b, d = logistic(40, 20)
    c = EnvironmentalChain(b, d, 0.4, affects=affects)
    P = c.annual_matrix()
    ref = np.linalg.matrix_power(P / P.sum(axis=1, keepdims=True), 4096)[0]
    lr = c.long_run()
    assert lr.exists and np.abs(lr.pmf - ref).sum() <= 1e-10
    assert np.abs(lr.pmf @ P - lr.pmf).sum() <= 1e-12 and lr.residual <= 1e-12
    assert lr.mean == pytest.approx(np.arange(41) @ ref, rel=1e-10)
    assert lr.top_mass == pytest.approx(ref[36:].sum(), rel=1e-9)  # sizes ≥ 0.9·N
    none = EnvironmentalChain(np.where(np.arange(41) == 0, 0.0, b), d, 0.4).long_run()
    assert not none.exists and "absorbing" in none.reason


def test_quasi_stationary_is_the_left_eigenvector():
    # reference: scipy.linalg.eig of P̄ on sizes ≥ 1 (0 absorbing), the eigenvalue of largest modulus
    b, d = logistic(30, 12)
    c = EnvironmentalChain(b, d, 0.5, affects="birth_and_death")
    T = c.annual_matrix(0)[1:, 1:]
    vals, left = sla.eig(T, left=True, right=False)
    i = int(np.argmax(vals.real))
    x = np.abs(left[:, i].real)
    x /= x.sum()
    qs = c.quasi_stationary()
    assert qs.converged and np.abs(qs.pmf[1:] - x).sum() <= 1e-10
    assert qs.decay_rate == pytest.approx(-np.log(vals[i].real), rel=1e-9)
    assert qs.residual <= 1e-13


# -- extinction curve against simulation ------------------------------------------------------------
def simulate_years(birth, death, sigma, start, years, threshold, n_paths, rng):
    """Gillespie (1977) within each year with ε ~ N(0, σ²) drawn per path and year; returns
    P(hit ≤ threshold by the end of year y) for y = 1..years."""
    N = birth.size - 1
    size = np.full(n_paths, start)
    hit = np.zeros(n_paths, dtype=bool)
    out = np.empty(years)
    iota = birth[0]
    for y in range(years):
        g = np.exp(rng.normal(0.0, sigma, n_paths) - sigma ** 2 / 2)
        clock = np.zeros(n_paths)
        live = ~hit
        while live.any():
            idx = np.flatnonzero(live)
            n = size[idx]
            lam = np.where(n < N, iota + (birth[n] - iota) * g[idx], 0.0)
            tot = lam + death[n]
            clock[idx] += rng.exponential(1.0, idx.size) / tot
            done = clock[idx] > 1.0
            up = rng.random(idx.size) * tot < lam
            move = ~done
            size[idx[move]] += np.where(up[move], 1, -1)
            newly = idx[move][size[idx[move]] <= threshold]
            hit[newly] = True
            live[idx[done]] = False
            live[newly] = False
        out[y] = hit.mean()
    return out


@pytest.mark.parametrize("threshold", [0, 2])
def test_extinction_curve_matches_simulation(threshold):
    # reference: exact simulation (Gillespie 1977, J. Phys. Chem. 81:2340) written above,
    # 20000 paths: the binomial standard error sqrt(p(1−p)/n) ≤ 0.0036; checked at 4.5 of them
    N = 30
    n = np.arange(N + 1, dtype=float)
    b, d = 0.8 * n + 0.2, n * (0.3 + 0.5 * n / 15)
    sigma, start, years, paths = 0.6, 4, 8, 20000
    mc = simulate_years(b, d, sigma, start, years, threshold, paths, np.random.default_rng(20240611))
    got = EnvironmentalChain(b, d, sigma).extinction_curve(start, np.arange(1, years + 1), threshold)
    se = np.sqrt(np.maximum(mc * (1 - mc), 1e-4) / paths)
    assert np.all(np.abs(got.probability - mc) <= 4.5 * se)
    assert got.probability[-1] > 0.05  # the check is not of tiny numbers
    # and the environment matters at this σ: the plain chain is far outside the simulation's error
    b0 = b.copy()
    b0[0] = 0.0
    plain = BirthDeathChain(b0, d).extinction_curve(start, np.arange(1.0, years + 1), threshold).probability
    assert np.max(np.abs(plain - mc) / se) > 10


# -- windows and batches --------------------------------------------------------------------------
def test_window_bound_holds_against_the_whole_range():
    # reference: the same chain computed on the whole range (whose matrix matches expm above);
    # bound: windowed ≤ whole ≤ windowed + error_bound, up to rounding, which error_bound also
    # covers (common practice for truncations)
    N = 210
    b, d = logistic(N, 12)
    c = EnvironmentalChain(b, d, 0.3, nodes=5)
    years = np.array([1, 10, 50])
    win = c.extinction_curves([10, 30], years, [0, 4])
    assert np.all(win.window_top < N)
    ref = np.stack([[_whole_range_curve(c, s, years, k) for s in (10, 30)] for k in (0, 4)])
    assert np.all(np.abs(ref - win.probability) <= win.error_bound)
    assert np.all(win.error_bound <= 5e-9 * np.maximum(win.probability, 1e-3))


def _whole_range_curve(c, start, years, k):
    P = c.annual_matrix(k)
    v = np.zeros(c.cap + 1)
    v[start] = 1.0
    out = []
    for y in range(1, years.max() + 1):
        v = v @ P
        if y in years:
            out.append(v[k])
    return np.array(out)


def test_batch_matches_single_curves():
    # reference: the single-start call (the batch must only share the work; BLAS may sum rows
    # of different batches in another order, so equal to rounding)
    b, d = logistic(40, 20)
    c = EnvironmentalChain(b, d, 0.3)
    batch = c.extinction_curves([3, 12, 0], [1, 5, 25], [0, 2])
    for i, s in enumerate([3, 12, 0]):
        for j, k in enumerate([0, 2]):
            one = c.extinction_curve(s, [1, 5, 25], k)
            np.testing.assert_allclose(batch.probability[j, i], one.probability, rtol=1e-13, atol=0)
    assert np.all(batch.probability[:, 2] == 1.0)  # start at or below the threshold


def test_mean_time_against_a_dense_solve():
    # reference: scipy.linalg.solve of (I − T) z = 1 on sizes ≥ 1 of the dense P̄ (the
    # fundamental matrix of an absorbing chain: Kemeny & Snell 1960, Finite Markov Chains, ch. 3)
    b, d = logistic(30, 10)
    c = EnvironmentalChain(b, d, 0.4)
    T = c.annual_matrix(0)[1:, 1:]
    z = sla.solve(np.eye(30) - T, np.ones(30))
    mt = c.mean_time_to_extinction(np.arange(1, 31), quadrature_error=True)
    assert np.allclose(mt.mean, z - 0.5, rtol=1e-9)
    assert np.all(mt.lower <= mt.mean) and np.all(np.isfinite(mt.quadrature_error))


# -- arguments ---------------------------------------------------------------------------------
def test_bad_arguments_are_refused():
    b, d = logistic(20, 10)
    c = EnvironmentalChain(b, d, 0.3)
    with pytest.raises(ChainError, match="whole numbers"):
        c.extinction_curve(5, [1.5, 3])
    with pytest.raises(ChainError, match=">= 1"):
        c.extinction_curve(5, [0, 3])
    with pytest.raises(ChainError, match="threshold"):
        c.extinction_curve(5, [3], threshold=20)
    with pytest.raises(ChainError, match="start"):
        c.mean_time_to_extinction([21])
    with pytest.raises(ChainError, match="sigma"):
        EnvironmentalChain(b, d, -0.1)
    with pytest.raises(ChainError, match="affects"):
        EnvironmentalChain(b, d, 0.1, affects="death")
    low = b.copy()
    low[0] = 5.0
    with pytest.raises(RateError, match="immigration") as err:
        EnvironmentalChain(low, d, 0.1)
    assert err.value.size == 1
    EnvironmentalChain(low, d, 0.0)  # without environment nothing is scaled
