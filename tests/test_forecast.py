"""The forecast of the next censuses against outside references: its one-step predictive is
the posterior average of the rows of P(Δ) = expm(QΔ) (scipy.linalg.expm) from the last
count, and a Monte Carlo of the process (a Gillespie simulator written here) agrees with the
multi-step forecast to sampling error; quantiles against scipy's discrete distributions."""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg as sla
import xarray as xr
from scipy import stats

from reference import generator, gillespie_years
from tallyfit.chain import EnvironmentalChain
from tallyfit.infer.families import get_family
from tallyfit.infer.forecast import forecast_rows, pmf_quantiles
from tallyfit.infer.pushforward import PushForwardSpec, push_forward

N = 120



def test_one_step_forecast_is_the_posterior_average_of_expm_rows():
    # a posterior of five logistic draws; the forecast of the next count (Δ = 1, then 2)
    fam = get_family("logistic", immigration=True)
    rng = np.random.default_rng(3)
    draws = {"birth_rate": 0.9 * np.exp(0.1 * rng.standard_normal((1, 5))),
             "death_rate": 0.3 * np.exp(0.1 * rng.standard_normal((1, 5))),
             "carrying_capacity": 50 * np.exp(0.05 * rng.standard_normal((1, 5))),
             "immigration": 0.5 * np.exp(0.2 * rng.standard_normal((1, 5)))}
    post = xr.Dataset({k: (("chain", "draw"), v) for k, v in draws.items()},
                      coords={"chain": [0], "draw": np.arange(5)})
    spec = PushForwardSpec(cap=N, sites=("pond",), starts=(37,), horizons=(5.0,), forecast_steps=2,
                           forecast_interval=1.0, forecast_from=(2024.0,))
    ds = push_forward(fam, post, spec, workers=1)
    got = ds["forecast_pmf"].sel(scenario="baseline", site="pond").values  # (step, size)
    sizes = np.arange(N + 1)
    ref = np.zeros((2, N + 1))
    for j in range(5):
        b, d = fam.numpy_rates({k: v[:, j] for k, v in draws.items()}, sizes)
        Q = generator(b[0], d[0])
        ref[0] += sla.expm(Q)[37] / 5
        ref[1] += sla.expm(2 * Q)[37] / 5
    np.testing.assert_allclose(got, ref, atol=1e-9)
    np.testing.assert_array_equal(ds["forecast_time"].sel(site="pond").values, [2025.0, 2026.0])


@pytest.mark.parametrize("sigma", [0.0, 0.4])
def test_multi_step_forecast_matches_simulation(sigma):
    n = np.arange(N + 1.0)
    birth, death = 0.8 * n + 0.6, n * (0.3 + 0.5 * n / 40)
    annual = EnvironmentalChain(birth, death, sigma) if sigma > 0 else None
    rows = forecast_rows(birth, death, np.array([25]), 3, 1.0, annual)[0]
    assert rows.shape == (3, N + 1) and np.allclose(rows.sum(axis=1), 1, atol=1e-8)
    rng = np.random.default_rng(11)
    sims = np.array([gillespie_years(birth, death, sigma, 25, 3, rng) for _ in range(4000)])
    for k in range(3):
        mean = float(rows[k] @ n)
        sd = math.sqrt(float(rows[k] @ n ** 2) - mean ** 2)
        # the simulated mean lies within 4 standard errors (central limit theorem, common practice)
        assert abs(sims[:, k].mean() - mean) < 4 * sd / math.sqrt(sims.shape[0])
        # and the distributions agree: a chi-square test on the bins holding 98% of the mass
        cdf = np.cumsum(rows[k])
        edges = np.searchsorted(cdf, np.linspace(0.01, 0.99, 9))
        observed = np.histogram(sims[:, k], bins=np.concatenate([[-0.5], edges + 0.5, [N + 0.5]]))[0]
        expected = np.diff(np.concatenate([[0.0], cdf[edges], [1.0]])) * sims.shape[0]
        assert stats.chisquare(observed, expected * observed.sum() / expected.sum()).pvalue > 1e-3


def test_quantiles_of_a_pmf_are_scipys():
    sizes = np.arange(200)
    pmf = stats.poisson.pmf(sizes, 37.5)
    got = pmf_quantiles(pmf[None, :], (0.05, 0.5, 0.95))[0]
    np.testing.assert_array_equal(got, stats.poisson.ppf([0.05, 0.5, 0.95], 37.5).astype(int))
