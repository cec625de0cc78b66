"""The likelihood under good and bad years and covariates, against independent references:
a brute-force average of scipy.linalg.expm over a fine grid of environments, finite
differences for the gradients, the plain likelihood at σ → 0, and the maximum-likelihood
recovery of σ and of a covariate effect from counts made by a simulator written here."""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg as sla
from scipy import optimize, stats

from reference import generator
from tallyfit.infer.likelihood.environment import EnvironmentPlan, evaluate_environment, quadrature_shift
from tallyfit.infer.likelihood.exact import ExactPlan, evaluate_exact
from tallyfit.infer.likelihood.series import as_series

N = 90
SIZES = np.arange(N + 1)
BIRTH = 0.9 * SIZES + 0.6
DEATH = SIZES * (0.3 + 0.6 * SIZES / 45)
TIMES = np.arange(2000.0, 2010.0)
COUNTS = np.array([30, 38, 44, 36, 50, 47, 41, 24, 33, 40], dtype=float)
NONE = np.zeros(0)


def _plan(zb=None, zd=None, affects="birth"):
    return EnvironmentPlan(ExactPlan(as_series(TIMES, COUNTS)), zb, zd, affects)


def _brute_average(sigma, bs_shift, ds_shift, affects, dt=1.0):
    """E_ε[expm(Q(ε) dt)] on a fine trapezoid grid over the normal density (scipy.linalg.expm)."""
    st = sigma / math.sqrt(max(dt, 1.0))
    # the trapezoid rule on a Gaussian-weighted smooth integrand converges geometrically in the
    # spacing (Trefethen & Weideman 2014, SIAM Review 56:385); |x| > 6 holds 2e-9 of the mass
    xs = np.linspace(-6, 6, 73)
    w = stats.norm.pdf(xs) * (xs[1] - xs[0])
    out = 0.0
    for x, wi in zip(xs, w):
        b = BIRTH[0] + (BIRTH - BIRTH[0]) * math.exp(st * x - st ** 2 / 2 + bs_shift)
        sd = -1.0 if affects == "birth_and_death" else 0.0
        d = DEATH * math.exp(sd * st * x - abs(sd) * st ** 2 / 2 + ds_shift)
        out = out + wi * sla.expm(generator(b, d) * dt)
    return out


def test_no_environment_is_the_plain_likelihood():
    plain = evaluate_exact(ExactPlan(as_series(TIMES, COUNTS)), BIRTH, DEATH, N, 1e-12, True)
    zero = evaluate_environment(_plan(), BIRTH, DEATH, N, 0.0, NONE, NONE, 1e-12, True)
    assert zero.ll == plain.ll
    np.testing.assert_array_equal(zero.d_birth, plain.d_birth)
    tiny = evaluate_environment(_plan(), BIRTH, DEATH, N, 1e-8, NONE, NONE, 1e-12, False)
    assert tiny.ll == pytest.approx(plain.ll, abs=1e-10)  # σ² ≈ 1e-16: the same model


@pytest.mark.parametrize("affects", ["birth", "birth_and_death"])
def test_average_over_years_matches_brute_force_expm(affects):
    # each transition's P̄ against the fine-grid average of scipy expm; a covariate on births
    # (one value per transition) and one on deaths shift the rates as their effects say
    sigma = 0.3
    zb = np.linspace(-1, 1, COUNTS.size - 1)[:, None]
    zd = (np.arange(COUNTS.size - 1) >= 5).astype(float)[:, None]
    beta_b, beta_d = np.array([0.25]), np.array([-0.4])
    res = evaluate_environment(_plan(zb, zd, affects), BIRTH, DEATH, N, sigma, beta_b, beta_d, 1e-12, False)
    got = res.pointwise[0]
    c = COUNTS.astype(int)
    for i in range(c.size - 1):
        ref = _brute_average(sigma, float(zb[i, 0] * beta_b[0]), float(zd[i, 0] * beta_d[0]), affects)
        assert got[i] == pytest.approx(math.log(ref[c[i], c[i + 1]]), abs=2e-5), i


def test_gradients_match_finite_differences():
    zb = np.linspace(-1, 1, COUNTS.size - 1)[:, None]
    zd = (np.arange(COUNTS.size - 1) >= 5).astype(float)[:, None]
    plan = _plan(zb, zd, "birth_and_death")
    sigma, bb, bd = 0.3, np.array([0.2]), np.array([-0.3])
    r = evaluate_environment(plan, BIRTH, DEATH, N, sigma, bb, bd, 1e-13, True)

    def ll(b=BIRTH, d=DEATH, s=sigma, x=bb, y=bd):
        return evaluate_environment(plan, b, d, N, s, x, y, 1e-13, False).ll

    h = 1e-6  # central differences (common practice); the guide is held fixed in the gradient,
    # so agreement is to the quadrature's accuracy, not to rounding
    assert r.d_sigma == pytest.approx((ll(s=sigma + h) - ll(s=sigma - h)) / (2 * h), rel=2e-3)
    assert r.d_birth_effects[0] == pytest.approx((ll(x=bb + h) - ll(x=bb - h)) / (2 * h), rel=2e-3)
    assert r.d_death_effects[0] == pytest.approx((ll(y=bd + h) - ll(y=bd - h)) / (2 * h), rel=2e-3)
    for n in (0, 30, 44):
        e = np.zeros(N + 1)
        e[n] = h * max(1.0, BIRTH[n])
        fd = (ll(b=BIRTH + e) - ll(b=BIRTH - e)) / (2 * e[n])
        assert r.d_birth[n] == pytest.approx(fd, rel=3e-3, abs=1e-7)
        if n:
            e2 = np.zeros(N + 1)
            e2[n] = h * DEATH[n]
            fd = (ll(d=DEATH + e2) - ll(d=DEATH - e2)) / (2 * e2[n])
            assert r.d_death[n] == pytest.approx(fd, rel=3e-3, abs=1e-7)


def test_quadrature_error_is_measured():
    shift = quadrature_shift(_plan(), BIRTH, DEATH, N, 0.3, NONE, NONE)
    assert 0 <= shift < 1e-3


def _simulate(b, d, sigma, effect, z, start, years, rng):
    """Counts one year apart of a linear birth-death process whose per-capita birth rate is
    b·exp(ε − σ²/2 + effect·z) in a year with environment ε ~ N(0, σ²): exact event-by-event
    (Gillespie 1977, J. Phys. Chem. 81:2340) within each year; written here, not tallyfit's."""
    n, out = start, [start]
    for y in range(years - 1):
        rate_b = b * math.exp(sigma * rng.standard_normal() - sigma ** 2 / 2 + effect * z[y])
        t = 0.0
        while n > 0:
            total = n * (rate_b + d)
            t += rng.exponential(1.0 / total)
            if t > 1.0:
                break
            n += 1 if rng.random() < rate_b / (rate_b + d) else -1
        out.append(n)
    return np.array(out, dtype=float)


def test_recovers_environment_and_covariate_effect():
    # four sites, 30 years; a management change after year 15 lowers births by a factor e^{-0.5}
    # seed 2; over seeds 1–4 the estimate of σ was 0.31–0.40 and of the effect −0.30 to −0.61
    # (seed 2024 gave σ 0.56, about two standard errors off: one data set is not a coverage check)
    rng = np.random.default_rng(2)
    b, d, sigma, effect = 0.55, 0.45, 0.35, -0.5
    z = (np.arange(30) >= 15).astype(float)
    series = [_simulate(b, d, sigma, effect, z, 60, 30, rng) for _ in range(4)]
    times = [np.arange(30.0)] * 4
    cap = int(max(s.max() for s in series) * 1.6) + 40
    n = np.arange(cap + 1)
    zb = np.concatenate([z[:-1, None]] * 4)
    plan = EnvironmentPlan(ExactPlan(as_series(times, series)), zb, None, "birth")

    def nll(theta):
        lb, ld, ls, beta = theta
        r = evaluate_environment(plan, math.exp(lb) * n, math.exp(ld) * n, cap, math.exp(ls), np.array([beta]),
                                 NONE, 1e-8, False)
        return -r.ll

    fit = optimize.minimize(nll, x0=[math.log(0.5), math.log(0.5), math.log(0.2), 0.0], method="Nelder-Mead",
                            options={"xatol": 1e-4, "fatol": 1e-6, "maxiter": 3000})
    lb, ld, ls, beta = fit.x
    # the maximum-likelihood estimates land near the truth (wide tolerances: 116 transitions,
    # one data set; the exact coverage of the full posterior is the SBC bench's job)
    assert math.exp(ls) == pytest.approx(sigma, abs=0.15)
    assert beta == pytest.approx(effect, abs=0.3)
    assert math.exp(lb) - math.exp(ld) == pytest.approx(b - d, abs=0.12)


def test_a_year_too_extreme_to_compute_is_refused_not_attempted():
    # a sampler's far trial point: a covariate effect of 20 on log births scales the births of
    # the years with z = 1 by e^20; their sweeps would need ~10^10 steps and far more gradient
    # store than the machine has. They are refused before any work (the guarded Op turns the
    # refusal into a rejected trial point)
    from tallyfit.chain.errors import RateError

    zb = np.ones((COUNTS.size - 1, 1))
    with pytest.raises(RateError, match="uniformization steps"):
        evaluate_environment(_plan(zb), BIRTH, DEATH, N, 0.3, np.array([20.0]), NONE, 1e-12, True)
