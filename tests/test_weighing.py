"""Weighing models: PSIS-LOO with stacking weights, the weighed push-forward, and ``tallyfit weigh``.

The unit checks use hand-built posteriors whose pointwise log-likelihoods are scipy.stats
densities; the end-to-end check fits two families to counts made by a Gillespie simulator
written here (not tallyfit's), where the generating family is known.
"""
from __future__ import annotations

import json

import arviz as az
import numpy as np
import pandas as pd
import pytest
import scipy.stats as st
import xarray as xr

from tallyfit.cli import main
from tallyfit.infer.comparison import allocate_draws, loo_table, model_dependence, weighed_draws
from tallyfit.infer.errors import InputError
from tallyfit.runfolder.reader import RunFolderError
from tallyfit.runfolder.schema import WEIGHING_FILES, WEIGHTS_COLUMNS
from tallyfit.runfolder.weighing import open_weighing
from tallyfit.weigh import parse_models


# --------------------------------------------------------------------------- stacking and LOO
def _normal_posterior(y: np.ndarray, scale: float, seed: int) -> az.InferenceData:
    """A posterior of a normal mean with known ``scale``: draws of mu near 0, and each
    observation's log density under scipy.stats.norm."""
    rng = np.random.default_rng(seed)
    mu = rng.normal(0.0, 0.05, size=(2, 400))
    ll = st.norm.logpdf(y[None, None, :], loc=mu[..., None], scale=scale)
    return az.from_dict(posterior={"mu": mu}, log_likelihood={"counts": ll}, observed_data={"counts": y})


def test_loo_table_gives_the_generating_model_the_largest_stacking_weight():
    y = np.random.default_rng(1).normal(0.0, 1.0, size=60)  # generated with scale 1
    table = loo_table({"scale 1": _normal_posterior(y, 1.0, 2), "scale 3": _normal_posterior(y, 3.0, 3),
                       "scale 0.5": _normal_posterior(y, 0.5, 4)})
    # stacking weights lie in [0, 1] and sum to 1 (Yao, Vehtari, Simpson & Gelman 2018, eq. 4)
    assert table["weight"].sum() == pytest.approx(1.0, abs=1e-6)
    assert (table["weight"] >= -1e-12).all()
    assert table["weight"].idxmax() == "scale 1"
    assert table.index[0] == "scale 1" and table.loc["scale 1", "rank"] == 0
    # with mu nearly fixed, leave-one-out equals the plain log density: elpd_loo ≈ Σ log N(y_i; 0, 1)
    # (Vehtari, Gelman & Gabry 2017, eq. 1; the reference density from scipy.stats)
    assert table.loc["scale 1", "elpd_loo"] == pytest.approx(st.norm.logpdf(y).sum(), abs=0.5)
    assert table["reliable"].all() and (table["n_pareto_k_above_0_7"] == 0).all()


def test_loo_table_refuses_models_of_different_counts():
    y = np.random.default_rng(1).normal(size=30)
    with pytest.raises(InputError, match="different"):
        loo_table({"a": _normal_posterior(y, 1.0, 2), "b": _normal_posterior(y[:-1], 1.0, 3)})
    with pytest.raises(InputError, match="different counts"):
        loo_table({"a": _normal_posterior(y, 1.0, 2), "b": _normal_posterior(y + 1, 1.0, 3)})
    with pytest.raises(InputError, match="at least two"):
        loo_table({"a": _normal_posterior(y, 1.0, 2)})


# --------------------------------------------------------------------------- the weighed draws
def test_allocate_draws_is_hamiltons_largest_remainder():
    # 0.5, 0.3, 0.2 of 7: quotas 3.5, 2.1, 1.4 -> floors 3, 2, 1 and the one left to the largest
    # remainder (0.5): 4, 2, 1 (Hamilton's method; Balinski & Young 2001, Fair Representation, ch. 2)
    assert allocate_draws({"a": 0.5, "b": 0.3, "c": 0.2}, 7) == {"a": 4, "b": 2, "c": 1}
    rng = np.random.default_rng(0)
    for _ in range(50):
        w = rng.dirichlet(np.ones(4))
        n = int(rng.integers(1, 5000))
        got = allocate_draws(dict(zip("abcd", w)), n)
        assert sum(got.values()) == n
        assert all(abs(got[k] - wk * n) < 1 for k, wk in zip("abcd", w))
    with pytest.raises(InputError):
        allocate_draws({"a": -0.1, "b": 1.1}, 10)


def _derived(value: float, cap: int, chains: int = 2, draws: int = 300, seed: int = 0) -> xr.Dataset:
    """A push-forward-shaped Dataset: one scenario, per-draw extinction probabilities around
    ``value`` and a size distribution over 0..cap."""
    rng = np.random.default_rng(seed)
    p = np.clip(rng.normal(value, 0.02, size=(1, chains, draws, 2)), 0, 1)
    pmf = rng.dirichlet(np.ones(cap + 1), size=(1, chains, draws))
    return xr.Dataset(
        {"extinction_probability_all_sites": (("scenario", "chain", "draw", "horizon"), p),
         "stationary_pmf": (("scenario", "chain", "draw", "size"), pmf),
         "forecast_time": (("site", "step"), np.zeros((1, 2)))},
        coords={"scenario": ["baseline"], "chain": np.arange(chains), "draw": np.arange(draws),
                "horizon": [10.0, 100.0], "size": np.arange(cap + 1), "site": ["s"], "step": [1, 2]})


def test_weighed_draws_are_the_weighted_mixture_of_the_models_draws():
    a, b = _derived(0.1, 20, seed=1), _derived(0.6, 30, seed=2)
    n = 600  # each model has 600 draws: with weights 2/3 and 1/3 it gives 400 and 200
    out = weighed_draws({"a": a, "b": b}, {"a": 2 / 3, "b": 1 / 3}, n_draws=n, seed=3)
    assert dict(zip(*np.unique(out["model"].values, return_counts=True))) == {"a": 400, "b": 200}
    assert "forecast_time" not in out  # only per-draw variables are resampled
    # the weighed mean is the weights' mixture of the models' means, to the resampling's error
    # (standard error of a mean of k draws without replacement, Cochran 1977, Sampling Techniques, eq. 2.12)
    exact = 2 / 3 * float(a["extinction_probability_all_sites"].mean()) + 1 / 3 * float(
        b["extinction_probability_all_sites"].mean())
    got = float(out["extinction_probability_all_sites"].mean())
    assert got == pytest.approx(exact, abs=4 * 0.02 / np.sqrt(200))
    # every weighed draw is one of its model's draws, picked once (without replacement)
    va = a["extinction_probability_all_sites"].values.reshape(-1, 2)
    picked = out["extinction_probability_all_sites"].isel(draw=out["model"].values == "a").values.reshape(-1, 2)
    assert len({tuple(r) for r in picked}) == 400 and {tuple(r) for r in picked} <= {tuple(r) for r in va}
    # the smaller cap is padded with probability 0 above it, so every draw still sums to 1
    pmf = out["stationary_pmf"]
    assert pmf.sizes["size"] == 31
    np.testing.assert_allclose(pmf.sum("size").values, 1.0, rtol=1e-12)
    assert float(pmf.isel(draw=out["model"].values == "a").sel(size=slice(21, 30)).max()) == 0.0


def test_weighed_draws_with_all_draws_of_each_model_is_exact():
    a, b = _derived(0.2, 10, draws=100, seed=4), _derived(0.5, 10, draws=300, seed=5)
    out = weighed_draws({"a": a, "b": b}, {"a": 0.25, "b": 0.75}, n_draws=800, seed=6)
    # 200 of a's 200 draws and 600 of b's 600: the weighed mean is the exact mixture
    exact = 0.25 * float(a["extinction_probability_all_sites"].mean()) + 0.75 * float(
        b["extinction_probability_all_sites"].mean())
    assert float(out["extinction_probability_all_sites"].mean()) == pytest.approx(exact, rel=1e-12)


def test_model_dependence_sentences():
    common = dict(what="the probability of extinction within 100 years", weighed_risk=(0.3, 0.1, 0.5))
    one = model_dependence({"a": 0.98, "b": 0.02}, {"a": 0.3, "b": 0.9}, {"a": "VU", "b": "CR"}, **common)
    assert not one["depends"] and one["carrying"] == ["a"] and "favour a" in one["sentence"]
    two = model_dependence({"a": 0.6, "b": 0.4}, {"a": 0.1, "b": 0.6}, {"a": "VU", "b": "CR"}, **common)
    assert two["depends"] and "depends on the model" in two["sentence"] and "60.0% under b" in two["sentence"]
    same = model_dependence({"a": 0.6, "b": 0.4}, {"a": 0.30, "b": 0.32}, {"a": "VU", "b": "VU"}, **common)
    assert not same["depends"] and "depends little" in same["sentence"]


def test_parse_models():
    models = parse_models(["linear", "logistic+years"], "births_and_deaths")
    assert [(m.rates, m.varying_years, m.folder_name) for m in models] == [
        ("linear", "none", "linear"), ("logistic", "births_and_deaths", "logistic-years")]
    with pytest.raises(InputError, match="at least two"):
        parse_models(["linear"])
    with pytest.raises(InputError, match="gompertz"):
        parse_models(["linear", "gompertz"])
    with pytest.raises(InputError, match="twice"):
        parse_models(["linear", "linear"])


# --------------------------------------------------------------------------- end to end
def _gillespie_logistic(b: float, d: float, K: float, start: int, years: int, seed: int) -> np.ndarray:
    """Exact simulation (Gillespie 1977, J. Phys. Chem. 81:2340) of births b·n and deaths
    n·(d + (b − d)·n/K), recorded at whole years; written here, independent of tallyfit."""
    rng = np.random.default_rng(seed)
    n, t, out = start, 0.0, [start]
    for year in range(1, years):
        while True:
            up, down = b * n, n * (d + (b - d) * n / K)
            total = up + down
            if total == 0:
                break
            step = rng.exponential(1 / total)
            if t + step > year:
                break
            t += step
            n += 1 if rng.random() < up / total else -1
        t = float(year)
        out.append(n)
    return np.array(out)


@pytest.fixture(scope="module")
def weighing(tmp_path_factory):
    folder = tmp_path_factory.mktemp("weigh")
    # a colony founded by 8 that grows fast (b − d = 0.5 a year) and levels off at K = 80
    sizes = _gillespie_logistic(0.6, 0.1, 80.0, 8, 26, seed=11)
    counts = folder / "new_colony.csv"
    pd.DataFrame({"time": np.arange(2000, 2000 + sizes.size), "count": sizes}).to_csv(counts, index=False)
    out = folder / "weighing"
    argv = ["weigh", str(counts), "--models", "linear", "logistic", "--out", str(out), "--no-immigration",
            "--chains", "2", "--draws", "200", "--tune", "200", "--seed", "4", "--quiet"]
    code = main(argv)
    return code, out, argv


def test_weigh_gives_the_generating_family_the_largest_weight(weighing):
    code, out, _ = weighing
    assert code in (0, 1)  # 1: short chains may miss a convergence limit; the comparison is still written
    for name in WEIGHING_FILES:
        assert (out / name).is_file()
    wf = open_weighing(out)
    assert list(wf.table.columns) == list(WEIGHTS_COLUMNS)
    w = wf.table.set_index("model")["weight"]
    assert w.sum() == pytest.approx(1.0, abs=1e-6)
    assert w.idxmax() == "logistic"  # the family that made the counts
    # the weighed draws come from the models as the weights say (largest remainders of 400 draws)
    n = wf.weighed.sizes["draw"]
    got = dict(zip(*np.unique(wf.weighed["model"].values, return_counts=True)))
    assert got == {k: v for k, v in allocate_draws(w.to_dict(), n).items() if v}
    # the weighed summary in weighing.json is that of weighed.nc
    doc = json.loads((out / "weighing.json").read_text())
    mean10 = doc["weighed"]["baseline"]["extinction_probability_all_sites"]["threshold=0"]["10"]["mean"]
    assert mean10 == pytest.approx(float(wf.weighed["extinction_probability_all_sites"]
                                         .sel(scenario="baseline", threshold=0, horizon=10.0).mean()))
    html = (out / "report.html").read_text()
    assert "Which model the counts support" in html and 'href="models/logistic/report.html"' in html
    assert doc["caution"] in html.replace("&#x27;", "'")


def test_weigh_rerun_refits_nothing_and_an_unfinished_folder_is_refused(weighing, capsys):
    code, out, argv = weighing
    before = {m: (out / "models" / m / "posterior.nc").stat().st_mtime_ns for m in ("linear", "logistic")}
    assert main([a for a in argv if a != "--quiet"]) == code
    assert "0 to fit, 2 already fitted" in capsys.readouterr().out
    assert {m: (out / "models" / m / "posterior.nc").stat().st_mtime_ns for m in before} == before
    # a changed results file no longer matches weighing.json's SHA-256: refused, not read
    (out / "weights.csv").write_text((out / "weights.csv").read_text().replace("logistic", "logistik"))
    with pytest.raises(RunFolderError, match="does not match"):
        open_weighing(out)
    (out / "weighing.json").unlink()
    with pytest.raises(RunFolderError, match="did not finish"):
        open_weighing(out)
