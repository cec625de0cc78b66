"""Fitting: MCMC posteriors against exact grid posteriors, the InferenceData, diagnostics,
the cap check, LOO comparison, and recovery on the bundled demo data (slow).

Exact references (CHECKS.md "Inference"): for one- and two-parameter models the posterior
is computed on a fine grid with scipy, from a likelihood that does not touch tallyfit's
likelihood code — the pure-death transition is Binomial(m, e^{-d t}) (common practice),
the linear birth–death transition is scipy.linalg.expm of the generator (Al-Mohy &
Higham 2009) — and MCMC means and 5%/95% quantiles must agree within a few Monte Carlo
standard errors (ArviZ's MCSE).
"""
from __future__ import annotations

import math
import tomllib
import warnings
from pathlib import Path

import arviz as az
import numpy as np
import pytest
from scipy import stats
from scipy.linalg import expm

from tallyfit.chain import BirthDeathChain
from tallyfit.infer.counts import CountData
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.infer.errors import CapTooSmallError, InputError
from tallyfit.infer.families import DataScale, Linear, Logistic, ParameterSpec, PerSize, RateFamily
from tallyfit.infer.fit import compare_families, fit_counts
from tallyfit.infer.likelihood import log_likelihood
from tallyfit.infer.model import PoolingWarning, build_count_model, build_model
from tallyfit.infer.observation import DetectionWarning, default_cap, normalise_detection

EXAMPLES = Path(__file__).resolve().parents[1] / "example_counts"
# Short chains for the fast suite: the tolerances below use each run's own MCSE.
# (cores=1: for models this small, worker start-up costs more than the chains themselves)
FAST = dict(chains=2, draws=500, tune=400, progressbar=False, cores=1, n_predictive=60,
            n_prior=100)
MCSE_TOL = 4.0  # "within a few Monte Carlo standard errors" (CHECKS.md)


class PureDeath(RateFamily):
    """Test family: pure death, b(n) = 0, d(n) = d, so λ_n = 0 and μ_n = d·n."""

    name = "pure-death"
    formula = "b(n) = 0,  d(n) = d"

    def _own_parameters(self):
        return [ParameterSpec("death_rate", "positive", "d")]

    def _own_default_priors(self, scale: DataScale):
        return {"death_rate": {"dist": "lognormal", "mu": math.log(0.3), "sigma": 1.0}}

    def _per_capita(self, xp, p, n, sizes):
        return 0.0 * n, p["death_rate"] + 0.0 * n


def _grid_summary(x: np.ndarray, logpost: np.ndarray) -> dict[str, float]:
    """Mean and 5/50/95% quantiles of a 1-D density given on a fine uniform grid."""
    w = np.exp(logpost - logpost.max())
    w /= w.sum()
    cdf = np.cumsum(w) - 0.5 * w  # midpoint rule
    q = np.interp([0.05, 0.5, 0.95], cdf, x)
    return {"mean": float(np.sum(w * x)), "q05": q[0], "q50": q[1], "q95": q[2]}


def _assert_matches_grid(result, name: str, grid: dict[str, float]) -> None:
    post = result.idata.posterior[name]
    mcse_mean = float(az.mcse(result.idata, var_names=[name], method="mean")[name])
    assert abs(float(post.mean()) - grid["mean"]) < MCSE_TOL * mcse_mean + 1e-3 * abs(grid["mean"]), \
        (name, float(post.mean()), grid["mean"], mcse_mean)
    for prob, key in ((0.05, "q05"), (0.95, "q95")):
        q = float(np.quantile(post.values.reshape(-1), prob))
        mcse_q = float(az.mcse(result.idata, var_names=[name], method="quantile", prob=prob)[name])
        assert abs(q - grid[key]) < MCSE_TOL * mcse_q + 2e-3 * abs(grid[key]), \
            (name, key, q, grid[key], mcse_q)


# --------------------------------------------------------------------------- pure death
@pytest.fixture(scope="module")
def pure_death_data() -> CountData:
    # simulated input (not a check value): m -> Binomial(m, e^{-d dt}), irregular intervals
    rng = np.random.default_rng(20240611)
    times = np.array([0.0, 1.0, 2.0, 3.0, 5.0, 6.0, 7.0, 8.5, 10.0])
    counts = [60]
    for dt in np.diff(times):
        counts.append(int(rng.binomial(counts[-1], math.exp(-0.18 * dt))))
    return CountData.single(times, np.array(counts, dtype=float))


@pytest.fixture(scope="module")
def pure_death_fit(pure_death_data):
    return fit_counts(pure_death_data, PureDeath(), seed=11, **FAST)


def test_pure_death_posterior_matches_grid(pure_death_data, pure_death_fit):
    # exact transition: Binomial(m, e^{-d t}) (common practice, CHECKS.md "pure death");
    # prior density from scipy.stats.lognorm, posterior on a fine grid
    t, c, _ = pure_death_data.series[0].observed()
    d = np.linspace(1e-4, 1.5, 30001)
    logpost = stats.lognorm(s=1.0, scale=0.3).logpdf(d)
    for i in range(len(t) - 1):
        logpost = logpost + stats.binom.logpmf(c[i + 1], c[i], np.exp(-d * (t[i + 1] - t[i])))
    grid = _grid_summary(d, logpost)
    _assert_matches_grid(pure_death_fit, "death_rate", grid)


def test_pure_death_posterior_predictive_is_binomial(pure_death_data, pure_death_fit):
    # from m, the size after t is Binomial(m, e^{-d t}) (common practice): the mean of
    # the simulated first-interval counts over draws is the mean of m e^{-d t} over the
    # same draws, within the Monte Carlo error of the simulation
    pp = pure_death_fit.idata.posterior_predictive
    sim = pp["counts"].isel(count_cell=1).values.reshape(-1)
    d = pure_death_fit.idata.posterior["death_rate"].sel(draw=pp.draw).values.reshape(-1)
    m = int(pure_death_data.series[0].counts[0, 0])
    p = np.exp(-d * 1.0)
    expected = m * p
    se = math.sqrt(np.mean(m * p * (1 - p)) / sim.size + np.var(expected) / sim.size)
    assert abs(sim.mean() - expected.mean()) < 4 * se
    # exact counts: the simulated series start at the observed first count
    np.testing.assert_array_equal(pp["counts"].isel(count_cell=0).values, m)


# --------------------------------------------------------------------------- linear
LINEAR_PRIORS = {"birth_rate": {"dist": "lognormal", "mu": math.log(0.4), "sigma": 1.0},
                 "death_rate": {"dist": "lognormal", "mu": math.log(0.4), "sigma": 1.0}}


@pytest.fixture(scope="module")
def linear_data() -> CountData:
    # simulated input (not a check value): exact paths of a linear birth–death chain
    ch = BirthDeathChain(lambda n: 0.45 * n, lambda n: 0.5 * n)
    counts = ch.simulate(18, np.arange(13.0), seed=7)[0]
    return CountData.single(np.arange(13.0), counts.astype(float))


@pytest.fixture(scope="module")
def linear_fit(linear_data):
    return fit_counts(linear_data, Linear(), priors=LINEAR_PRIORS, seed=5, **FAST)


def _linear_grid_logpost(data: CountData, cap: int, u: np.ndarray, v: np.ndarray) -> np.ndarray:
    """log posterior on a (log b, log d) grid: generator exponential by scipy.linalg.expm."""
    t, c, _ = data.series[0].observed()
    n = np.arange(cap + 1)
    dts = np.diff(t)
    prior_b = stats.lognorm(s=1.0, scale=0.4)
    prior_d = stats.lognorm(s=1.0, scale=0.4)
    out = np.empty((u.size, v.size))
    for i, ub in enumerate(u):
        b = math.exp(ub)
        d = np.exp(v)
        lam = b * n.astype(float)
        lam[cap] = 0.0  # the cap reflects
        mu = d[:, None] * n[None, :]
        Q = np.zeros((v.size, cap + 1, cap + 1))
        Q[:, n[:-1], n[:-1] + 1] = lam[:-1]
        Q[:, n[1:], n[1:] - 1] = mu[:, 1:]
        Q[:, n, n] = -(lam[None, :] + mu)
        ll = np.zeros(v.size)
        for dt in np.unique(dts):
            P = expm(Q * dt)  # batched over the death-rate grid
            for k in np.flatnonzero(dts == dt):
                ll += np.log(np.maximum(P[:, c[k], c[k + 1]], 1e-300))
        # density of (log b, log d): prior density times the Jacobian b·d
        out[i] = ll + prior_b.logpdf(b) + prior_d.logpdf(d) + ub + v
    return out


def test_linear_posterior_matches_grid(linear_data, linear_fit):
    # Al-Mohy & Higham (2009) matrix exponential via scipy.linalg.expm, on the same capped
    # chain; posterior on a fine grid in (log b, log d)
    cap = linear_fit.cap
    coarse_u = np.linspace(math.log(0.01), math.log(4.0), 16)
    coarse = _linear_grid_logpost(linear_data, cap, coarse_u, coarse_u)
    keep = np.argwhere(coarse > coarse.max() - 14)
    top = coarse_u.size - 1
    lo_u, hi_u = coarse_u[max(keep[:, 0].min() - 1, 0)], coarse_u[min(keep[:, 0].max() + 1, top)]
    lo_v, hi_v = coarse_u[max(keep[:, 1].min() - 1, 0)], coarse_u[min(keep[:, 1].max() + 1, top)]
    u = np.linspace(lo_u, hi_u, 50)
    v = np.linspace(lo_v, hi_v, 50)
    lp = _linear_grid_logpost(linear_data, cap, u, v)
    w = np.exp(lp - lp.max())
    for name, axis, x in (("birth_rate", 1, u), ("death_rate", 0, v)):
        # weights are per cell of the uniform log grid; the summary is of the rate exp(x)
        grid = _grid_summary(np.exp(x), np.log(w.sum(axis=axis)))
        _assert_matches_grid(linear_fit, name, grid)


# --------------------------------------------------------------------------- result
def test_fit_result_groups_settings_and_diagnostics(linear_data, linear_fit):
    r = linear_fit
    for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive",
                  "observed_data", "prior"):
        assert group in r.idata.groups(), group
    ll = r.idata.log_likelihood["counts"]
    assert ll.dims == ("chain", "draw", "obs") and ll.sizes["obs"] == 12
    # pointwise terms of a draw sum to that draw's log-likelihood (common practice);
    # the total from the public likelihood function with the family's rates
    k = (1, 17)
    draw = r.idata.posterior.isel(chain=k[0], draw=k[1])
    b, d = r.family.numpy_rates({"birth_rate": float(draw["birth_rate"]),
                                 "death_rate": float(draw["death_rate"])}, np.arange(r.cap + 1))
    t, c, _ = linear_data.series[0].observed()
    total = log_likelihood(t, c.astype(float), b[0], d[0])
    assert float(ll.isel(chain=k[0], draw=k[1]).sum()) == pytest.approx(total, abs=1e-8)
    np.testing.assert_array_equal(r.idata.observed_data["counts"].values, c)
    assert set(r.settings) >= {"seed", "chains", "draws", "tune", "cap", "family", "priors"}
    assert r.settings["seed"] == 5 and r.settings["priors"]["birth_rate"]["sigma"] == 1.0
    diag = r.diagnostics
    # Vehtari et al. (2021): limits R-hat < 1.01, ESS > 400
    assert diag.limits.r_hat == 1.01 and diag.limits.ess_bulk == 400 and diag.limits.ess_tail == 400
    table = diag.table
    for name in ("birth_rate", "death_rate"):
        assert table.loc[name, "r_hat_ok"] == (table.loc[name, "r_hat"] < 1.01)
        assert table.loc[name, "ess_tail_ok"] == (table.loc[name, "ess_tail"] > 400)
        # the table is ArviZ's rank-normalised R-hat and equal-tailed quantiles
        assert table.loc[name, "r_hat"] == pytest.approx(
            float(az.rhat(r.idata, var_names=[name], method="rank")[name]))
        draws = r.idata.posterior[name].values.ravel()
        assert (table.loc[name, "q_lo"], table.loc[name, "q_hi"]) == pytest.approx(
            tuple(np.quantile(draws, [0.05, 0.95])))
    assert diag.limits.bfmi == 0.3 and len(diag.bfmi) == 2 and len(diag.divergences) == 2
    assert diag.passed == (not diag.failed)
    assert list(table.columns[:5]) == ["mean", "sd", "q_lo", "q50", "q_hi"]
    assert r.cap_check["cap"] == r.cap and "message" in r.cap_check
    assert r.idata.prior["birth_rate"].sizes["draw"] == 100


def test_seed_reproduces_the_run(pure_death_data):
    tiny = dict(FAST, draws=40, tune=40, n_predictive=10, n_prior=10)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        one = fit_counts(pure_death_data, PureDeath(), seed=11, **tiny)
        two = fit_counts(pure_death_data, PureDeath(), seed=11, **tiny)
        other = fit_counts(pure_death_data, PureDeath(), seed=12, **tiny)
    for group, name in (("posterior", "death_rate"), ("posterior_predictive", "counts"),
                        ("prior", "death_rate")):
        np.testing.assert_array_equal(getattr(one.idata, group)[name].values,
                                      getattr(two.idata, group)[name].values)
    assert not np.array_equal(one.idata.posterior["death_rate"].values,
                              other.idata.posterior["death_rate"].values)


def test_compare_families(pure_death_data, pure_death_fit):
    # a linear model of the same data; its birth rate gets a tight prior near 0 so that
    # the short chains are not spent in the funnel b -> 0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        linear = fit_counts(pure_death_data, Linear(), seed=3, priors={
            "birth_rate": {"dist": "lognormal", "mu": math.log(0.02), "sigma": 0.5}}, **FAST)
    table = compare_families({"pure-death": pure_death_fit, "linear": linear})
    assert set(table.index) == {"pure-death", "linear"}
    assert {"elpd_loo", "rank", "max_pareto_k", "n_pareto_k_above_0_7", "reliable"} <= set(table.columns)
    # elpd_loo is ArviZ's PSIS-LOO (Vehtari, Gelman & Gabry 2017)
    loo = az.loo(pure_death_fit.idata)
    assert table.loc["pure-death", "elpd_loo"] == pytest.approx(loo.elpd_loo)
    with pytest.raises(InputError):
        compare_families([pure_death_fit])


# --------------------------------------------------------------------------- model checks
def test_model_settings_are_checked():
    data = load_counts(EXAMPLES / "copper_tarn.csv")
    assert normalise_detection(None) is None and normalise_detection(1.0) is None
    assert normalise_detection("estimate") == "estimate" and normalise_detection("0.7") == 0.7
    for bad in (0.0, 1.5, "sometimes", -1):
        with pytest.raises(InputError):
            normalise_detection(bad)
    m = data.max_count
    assert default_cap(data) == math.ceil(max(m + 3 * math.sqrt(m) + 15, 1.2 * m))
    assert default_cap(data, 0.5) == math.ceil(2 * m + 3 * math.sqrt(2 * m) + 15)
    with pytest.raises(CapTooSmallError):
        build_model(data, "linear", cap=m - 1)
    with pytest.raises(CapTooSmallError):
        build_model(data, "linear", cap=m + 5, detection=0.5)
    with pytest.raises(InputError, match="no parameter"):
        build_model(data, "linear", priors={"carrying_capacity": {"dist": "lognormal",
                                                                  "mu": 3, "sigma": 1}})
    with pytest.warns(DetectionWarning, match="no replicate surveys"):
        cm = build_count_model(data, "linear", detection="estimate")
    assert cm.messages and "detection" in cm.model.named_vars


def test_return_from_zero_needs_immigration_and_pooling_needs_sites():
    # common practice: without immigration (λ_0 = 0) size 0 is absorbing
    data = CountData.single([0.0, 1.0, 2.0, 3.0], [3.0, 0.0, 2.0, 4.0])
    with pytest.raises(InputError, match="immigration"):
        build_model(data, "linear")
    build_model(data, Linear(immigration=True))  # fine with immigration
    with pytest.warns(PoolingWarning):
        cm = build_count_model(data, Linear(immigration=True), pooling=True)
    assert not cm.pooling and "site_offset" not in cm.model.named_vars


def test_exact_counts_refuse_disagreeing_replicates():
    data = load_counts(EXAMPLES / "five_dunes.csv")
    with pytest.raises(InputError, match="detection"):
        build_model(data, "logistic")


def test_pooled_model_log_likelihood_is_sum_over_sites():
    # the Potential at a point equals Σ_sites log L(site counts | site rates), each site's
    # birth rate scaled by exp(offset); totals from the public likelihood function
    data = load_counts(EXAMPLES / "five_dunes.csv")
    cm = build_count_model(data, Logistic(), detection=0.7, pooling=True)
    model = cm.model
    point = model.initial_point()
    z = np.array([0.3, -0.5, 0.1, 0.8, -1.2])
    point["site_offset_z"] = z
    import pytensor

    names = ["count_loglik", "birth_rate", "death_rate", "carrying_capacity", "site_scale"]
    graphs = model.replace_rvs_by_values([model[k] for k in names])
    fn = pytensor.function(model.value_vars, graphs, on_unused_input="ignore")
    value, b0, d0, k0, scale = (float(v) for v in fn(*[point[v.name] for v in model.value_vars]))
    total = 0.0
    for s, zs in zip(data.series, z):
        b, d = cm.family.numpy_rates({"birth_rate": b0 * math.exp(scale * zs),
                                      "death_rate": d0, "carrying_capacity": k0},
                                     np.arange(cm.cap + 1))
        total += log_likelihood(s.times, s.counts, b[0], d[0], detection=0.7)
    assert value == pytest.approx(total, rel=1e-9)


# --------------------------------------------------------------------------- demo data
def _truth(name: str) -> dict:
    with open(EXAMPLES / f"{name}.toml", "rb") as fh:
        return tomllib.load(fh)["true_rates"]


def test_fast_end_to_end_fit_on_small_demo():
    # copper_tarn (invented demo, linear decline, two blank years). Its path is less
    # variable than the true rates imply: the exact grid posterior (see the linear grid
    # test's method) puts b and d themselves below the truth, so what must be recovered
    # here is the net growth rate b - d.
    truth = _truth("copper_tarn")
    r = fit_counts(load_counts(EXAMPLES / "copper_tarn.csv"), "linear", seed=2, chains=2, draws=250,
                   tune=250, progressbar=False, cores=1, n_predictive=40, n_prior=40)
    post = r.idata.posterior
    net = (post["birth_rate"] - post["death_rate"]).values.reshape(-1)
    lo, hi = np.quantile(net, [0.05, 0.95])
    assert lo < truth["birth_rate"] - truth["death_rate"] < hi
    assert r.idata.log_likelihood["counts"].sizes["obs"] == 29  # 30 surveys, one site
    assert r.idata.observed_data["counts"].sizes["count_cell"] == 30


@pytest.mark.slow
@pytest.mark.parametrize("name,family,options", [
    ("heron_fen", "logistic", {"immigration": True}),
    ("five_dunes", "logistic", {}),
    ("copper_tarn", "linear", {}),
])
def test_demo_recovery(name, family, options):
    # truth inside the 90% interval for every parameter (copper_tarn: the net growth
    # rate, see test_fast_end_to_end_fit_on_small_demo); diagnostics must pass
    from tallyfit.infer.families import get_family

    meta_truth = _truth(name)
    detection = "estimate" if name == "five_dunes" else None
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = fit_counts(load_counts(EXAMPLES / f"{name}.csv"), get_family(family, **options), seed=1,
                       detection=detection, progressbar=False, cores=2)
    assert r.passed, r.diagnostics.failed
    post = r.idata.posterior
    if name == "copper_tarn":
        checks = {"net": ((post["birth_rate"] - post["death_rate"]).values,
                          meta_truth["birth_rate"] - meta_truth["death_rate"])}
    else:
        checks = {k: (post[k].values, v) for k, v in meta_truth.items() if k in post}
    if detection == "estimate":
        with open(EXAMPLES / f"{name}.toml", "rb") as fh:
            checks["detection"] = (post["detection"].values, tomllib.load(fh)["detection"])
    for k, (x, true) in checks.items():
        lo, hi = np.quantile(x.reshape(-1), [0.05, 0.95])
        assert lo < true < hi, (k, lo, true, hi)


def test_priors_that_barely_meet_the_logistic_support_stop_before_sampling():
    # b far below d under the priors: almost no prior draw is a regulated population
    data = load_counts(EXAMPLES / "copper_tarn.csv")
    priors = {"birth_rate": {"dist": "lognormal", "mu": math.log(0.05), "sigma": 0.1},
              "death_rate": {"dist": "lognormal", "mu": math.log(2.0), "sigma": 0.1}}
    with pytest.raises(InputError, match="support"):
        fit_counts(data, "logistic", priors=priors, chains=1, draws=5, tune=5,
                   progressbar=False)


@pytest.mark.parametrize("family,pooling", [(PerSize(knots=4), False), (Logistic(), True)],
                         ids=["per-size", "pooled logistic"])
def test_prior_group_has_the_models_variables_and_dimensions(family, pooling):
    # common practice (ArviZ InferenceData schema): the prior group is labelled like the
    # posterior — the same names and the same named dimensions as the model's variables
    from tallyfit.infer.sampling import sample_prior

    data = load_counts(EXAMPLES / "five_dunes.csv")
    cm = build_count_model(data, family, detection=0.7, pooling=pooling)
    prior = sample_prior(cm, 25, seed=3)
    for name in cm.var_names:
        assert name in prior, name
        dims = tuple(cm.model.named_vars_to_dims.get(name) or ())
        assert prior[name].dims == ("chain", "draw") + dims
        assert np.all(np.isfinite(prior[name].values))
    if pooling:
        np.testing.assert_allclose(prior["site_birth_rate"].values,
                                   prior["birth_rate"].values[..., None]
                                   * np.exp(prior["site_offset"].values))
