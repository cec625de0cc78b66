"""The report: a genuine small run folder in, a self-contained report.html and figures/ out.

The run folder is made the way infer.pipeline makes one, short of sampling: posterior
draws of the logistic family with immigration are invented (independent draws near the
Heron Fen demo's true rates; demo data, never check values) instead of NUTS; everything
else is the project's own code: the model (infer.model.build_count_model), the pointwise
log-likelihood, the posterior predictive series, the diagnostics and the cap check
(infer.fit), prior draws from the model's resolved priors, the push-forward and its
summary (infer.derive), and run.toml (infer.run).
"""
from __future__ import annotations

import base64
import hashlib
import html
import io
import json
import re
import shutil
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from tallyfit.infer.data import load_counts
from tallyfit.infer.derive import PushForwardSpec, horizons_with_iucn, push_forward, summarise
from tallyfit.infer.families import get_family, scipy_prior
from tallyfit.infer.fit import check_cap, diagnose, observed_data_group, simulate_posterior_counts
from tallyfit.infer.model import build_count_model, pointwise_log_likelihood
from tallyfit.runfolder.store import CAUTION as RUN_CAUTION
from tallyfit.runfolder.store import write_run_toml
from tallyfit.infer.scenarios import BASELINE, Scenario
from tallyfit.reports import build_report
from tallyfit.reports.checks import run_checks
from tallyfit.reports.html import format_probability
from tallyfit.reports.narrative import CAUTION
from tallyfit.reports.predictive import predictive_bands
from tallyfit.reports.run_folder import RunFolderError, load_run
from tallyfit.reports.tables import category_table, extinction_table, scenario_differences, trend_table

PIL = pytest.importorskip("PIL.Image")

ROOT = Path(__file__).resolve().parents[1]
COUNTS = ROOT / "example_counts" / "heron_fen.csv"
CAP = 150
FAMILY = get_family("logistic", immigration=True)
CENTRE = {"birth_rate": (0.9, 0.10), "death_rate": (0.3, 0.20), "carrying_capacity": (60.0, 0.05),
          "immigration": (0.5, 0.40)}
FIGURES = {"summary_categories.png", "data_predictive.png", "rates.png", "distributions.png",
           "extinction_all_sites.png", "scenarios.png", "diagnostics_trace_rank.png",
           "diagnostics_prior_posterior.png", "diagnostics_pareto_k.png"}


def _draws(chains: int, draws: int, seed: int) -> dict[str, np.ndarray]:
    rng = np.random.default_rng(seed)
    return {k: m * np.exp(s * rng.standard_normal((chains, draws))) for k, (m, s) in CENTRE.items()}


def _samples(values: dict[str, np.ndarray]) -> xr.Dataset:
    first = next(iter(values.values()))
    return xr.Dataset({k: (("chain", "draw"), v) for k, v in values.items()},
                      coords={"chain": np.arange(first.shape[0]), "draw": np.arange(first.shape[1])})


SETTINGS = {"rates": "logistic", "immigration": True, "chains": 2, "draws": 30, "tune": 0, "seed": 4242,
            "max_size": CAP, "horizons": [5.0, 50.0], "thresholds": [0, 10], "credible_level": 0.9,
            "scenarios": [{"name": "cull", "harvest_rate": 0.15, "description": "remove 15% a year"}]}


def _fit_groups(chains: int, draws: int, seed: int, divergent: int = 0,
                n_predictive: int = 30) -> tuple[az.InferenceData, dict, dict]:
    """InferenceData, diagnostics and cap check as infer.fit makes them, with invented draws instead of NUTS."""
    data = load_counts(COUNTS)
    cm = build_count_model(data, FAMILY, cap=CAP)
    post = _samples(_draws(chains, draws, seed))
    post.attrs["tallyfit_family"] = cm.family.describe(cm.priors)
    rng = np.random.default_rng(seed + 1)
    diverging = np.zeros((chains, draws), dtype=bool)
    diverging.flat[rng.choice(chains * draws, size=divergent, replace=False)] = True
    predictive = simulate_posterior_counts(cm, post, n_predictive, rng)
    prior = {k: scipy_prior(cm.priors[k]).rvs(size=(1, 400), random_state=seed + 2 + i) for i, k in enumerate(CENTRE)}
    idata = az.InferenceData(
        posterior=post,
        sample_stats=_samples({"diverging": diverging, "energy": rng.normal(size=(chains, draws))}),
        log_likelihood=xr.Dataset({"counts": pointwise_log_likelihood(cm, post)}),
        posterior_predictive=predictive, observed_data=observed_data_group(data), prior=_samples(prior))
    diagnostics = diagnose(idata, cm.var_names)
    return idata, diagnostics, check_cap(cm, post, predictive)


def _summary(idata: az.InferenceData, diagnostics: dict, cap_check: dict, ds: xr.Dataset,
             warnings: list[str]) -> dict:
    """summary.json laid out as infer.pipeline writes it."""
    from tallyfit.infer.fit import parameter_table

    table = parameter_table(idata, list(CENTRE), diagnostics)
    return {"caution": RUN_CAUTION,
            "data": {"source": str(COUNTS), "sites": ["site"], "n_counts": 30,
                     "sha256": hashlib.sha256(COUNTS.read_bytes()).hexdigest()},
            "family": {"name": FAMILY.name, "formula": FAMILY.formula}, "settings": SETTINGS, "cap": CAP,
            "starts": {"site": int(pd.read_csv(COUNTS)["count"].iloc[-1])},
            "parameters": {n: {k: float(v) for k, v in row.items()} for n, row in table.iterrows()},
            "derived": summarise(ds), "diagnostics": diagnostics, "cap_check": cap_check, "warnings": warnings}


def make_run_folder(folder: Path, *, warnings: tuple[str, ...] = ()) -> Path:
    """A complete small run folder (2 chains × 30 draws, two divergent) at ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    shutil.copyfile(COUNTS, folder / "counts.csv")
    idata, diagnostics, cap_check = _fit_groups(2, 30, seed=7, divergent=2)
    idata.to_netcdf(str(folder / "posterior.nc"))
    counts = pd.read_csv(COUNTS)["count"].to_numpy()
    spec = PushForwardSpec(cap=CAP, sites=("site",), starts=(int(counts[-1]),),
                           horizons=horizons_with_iucn((5.0, 50.0), None), thresholds=(0, 10))
    ds = push_forward(FAMILY, idata.posterior, spec,
                      (BASELINE, Scenario("cull", harvest_rate=0.15, description="remove 15% a year")), workers=1)
    ds.to_netcdf(folder / "derived.nc", engine="h5netcdf")
    summary = _summary(idata, diagnostics, cap_check, ds, list(warnings))
    (folder / "summary.json").write_text(json.dumps(summary, indent=1, default=float), encoding="utf-8")
    write_run_toml(folder, SETTINGS, extra={"run": {"seed": SETTINGS["seed"], "cap": CAP}})
    return folder


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    folder = make_run_folder(tmp_path_factory.mktemp("run") / "heron", warnings=("<b>bold</b> & <script>x</script>",))
    build_report(folder)
    return folder


@pytest.fixture(scope="module")
def good_run_dir(run_dir: Path, tmp_path_factory) -> Path:
    """The same run with a well-mixed posterior (4 × 150 independent draws) that passes every check."""
    folder = tmp_path_factory.mktemp("good") / "heron"
    shutil.copytree(run_dir, folder)
    (folder / "report.html").unlink()
    shutil.rmtree(folder / "figures")
    idata, diagnostics, cap_check = _fit_groups(4, 150, seed=12, n_predictive=12)
    assert diagnostics["passed"]
    idata.to_netcdf(str(folder / "posterior.nc"))
    ds = xr.open_dataset(folder / "derived.nc").load()
    summary = _summary(idata, diagnostics, cap_check, ds, [])
    summary["caution"] = ""  # the report then shows its own caution
    (folder / "summary.json").write_text(json.dumps(summary, default=float), encoding="utf-8")
    write_run_toml(folder, SETTINGS, extra={"run": {"seed": SETTINGS["seed"], "cap": CAP}})
    build_report(folder)
    return folder


def _page(folder: Path) -> str:
    return (folder / "report.html").read_text(encoding="utf-8")


def _banner(text: str) -> str:
    return text.split("<nav>", 1)[0]


def _images(text: str) -> list[bytes]:
    return [base64.b64decode(m) for m in re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', text)]


def test_report_is_self_contained(run_dir: Path) -> None:
    text = _page(run_dir)
    assert text.startswith("<!DOCTYPE html>")
    srcs = re.findall(r'\bsrc\s*=\s*"([^"]*)"', text)
    hrefs = re.findall(r'\bhref\s*=\s*"([^"]*)"', text)
    assert srcs and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert hrefs and all(h.startswith("#") for h in hrefs)
    assert not re.search(r"<(script|link|iframe|object)\b", text, re.I)
    assert "url(" not in text and "@import" not in text
    for anchor in re.findall(r'href="#([^"]+)"', text):  # every contents link has its section
        assert f'id="{anchor}"' in text
    for title in ("Summary", "Data and model fit", "Birth and death rates", "Size distributions",
                  "Extinction risk", "Scenarios", "Diagnostics for review"):
        assert title in text


def test_embedded_figures_decode_and_match_files(run_dir: Path) -> None:
    images = _images(_page(run_dir))
    files = {p.name: p.read_bytes() for p in (run_dir / "figures").glob("*.png")}
    assert FIGURES <= set(files)
    assert len(images) == len(files)
    assert sorted(images) == sorted(files.values())
    for png in images:
        with PIL.open(io.BytesIO(png)) as im:
            im.verify()
        with PIL.open(io.BytesIO(png)) as im:
            assert im.format == "PNG" and im.size[0] > 100 and im.size[1] > 100


def test_caution_text_is_shown(run_dir: Path, good_run_dir: Path) -> None:
    assert html.escape(RUN_CAUTION) in _page(run_dir)  # summary.json's caution
    assert html.escape(CAUTION) in _page(good_run_dir)  # the report's own when summary.json has none
    for word in ("model-based", "assumptions", "guidelines", "qualified review"):
        assert word in CAUTION


def test_failed_diagnostics_banner(run_dir: Path) -> None:
    banner = _banner(_page(run_dir))
    assert 'class="box alert"' in banner and "failed" in banner
    assert "fit diagnostics (recorded)" in banner  # infer.fit.diagnose recorded passed = false
    assert "bulk ESS" in banner  # 60 draws cannot reach an ESS of 400
    assert "divergences: 2 divergent transitions" in banner


def test_no_failure_banner_when_every_check_passes(good_run_dir: Path) -> None:
    text = _page(good_run_dir)
    banner = _banner(text)
    assert 'class="box alert"' not in banner
    assert 'class="box ok"' in banner
    assert ">FAIL<" not in text


def test_tampered_counts_fail_the_hash_check(good_run_dir: Path, tmp_path: Path) -> None:
    folder = tmp_path / "tampered"
    shutil.copytree(good_run_dir, folder)
    with open(folder / "counts.csv", "a", encoding="utf-8") as fh:
        fh.write("2025,61\n")
    failed = run_checks(load_run(folder)).failed
    assert [c.name for c in failed] == ["hash of counts.csv"]
    assert "differs" in failed[0].detail


def test_text_from_files_is_escaped(run_dir: Path) -> None:
    text = _page(run_dir)
    assert "<b>bold</b>" not in text and "<script>x</script>" not in text
    assert "&lt;b&gt;bold&lt;/b&gt; &amp; &lt;script&gt;x&lt;/script&gt;" in text


def test_missing_posterior_is_refused(tmp_path: Path) -> None:
    (tmp_path / "derived.nc").write_bytes(b"")
    with pytest.raises(RunFolderError) as err:
        build_report(tmp_path)
    assert err.value.path.name == "posterior.nc"
    with pytest.raises(RunFolderError):
        build_report(tmp_path / "no-such-folder")


def test_extinction_and_category_tables_follow_the_draws(run_dir: Path) -> None:
    ds = xr.open_dataset(run_dir / "derived.nc").load()
    ext = extinction_table(ds, "baseline")
    direct = ds["extinction_probability_all_sites"].sel(scenario="baseline").mean(("chain", "draw"))
    for r in ext.itertuples(index=False):
        assert r.mean == pytest.approx(float(direct.sel(threshold=r.threshold, horizon=r.horizon)), rel=1e-12)
        draws = ds["extinction_probability_all_sites"].sel(scenario="baseline", threshold=r.threshold,
                                                          horizon=r.horizon).values.ravel()
        assert (r.lo, r.hi) == pytest.approx(tuple(np.quantile(draws, [0.05, 0.95])), rel=1e-12)
    cats = category_table(ds)
    assert list(cats.index) == ["baseline", "cull"]
    assert np.allclose(cats.sum(axis=1), 1.0)
    assert list(cats.columns) == ["below VU", "VU", "EN", "CR"]


def test_scenario_differences_are_paired(run_dir: Path) -> None:
    ds = xr.open_dataset(run_dir / "derived.nc").load()
    diff = scenario_differences(ds)
    row = diff[(diff["scenario"] == "cull") & (diff["quantity"] == "P(falling to 10 or fewer within 100)")].iloc[0]
    base = ds["extinction_probability_all_sites"].sel(scenario="baseline", threshold=10, horizon=100.0)
    cull = ds["extinction_probability_all_sites"].sel(scenario="cull", threshold=10, horizon=100.0)
    assert row.diff_mean == pytest.approx(float((cull - base).mean()), rel=1e-12)
    # a removal rate added to every death rate makes falling to the threshold likelier in every draw
    # (monotone coupling of birth-death chains; common practice)
    assert row.p_higher == 1.0 and row.diff_lo > 0


def test_trend_is_the_expected_change_of_the_fitted_rates(run_dir: Path) -> None:
    ds = xr.open_dataset(run_dir / "derived.nc").load()
    counts = pd.read_csv(run_dir / "counts.csv").assign(site="site")
    trend = trend_table(ds, counts, "baseline")
    n = int(counts["count"].iloc[-1])
    assert trend["last_count"].tolist() == [n] and trend["size"].tolist() == [n]
    # λ_n − μ_n from the family's own formula, draw by draw
    post = az.from_netcdf(run_dir / "posterior.nc").posterior
    birth, death = FAMILY.numpy_rates({k: post[k].values.ravel() for k in CENTRE}, np.array([n]))
    drift = birth[:, 0] - death[:, 0]
    assert trend["mean"].iloc[0] == pytest.approx(drift.mean(), rel=1e-9)
    assert trend["p_increase"].iloc[0] == pytest.approx(np.mean(drift > 0))
    moved = trend_table(ds, counts, "baseline", starts={"site": n + 20})  # a start size given by the run
    b2, d2 = FAMILY.numpy_rates({k: post[k].values.ravel() for k in CENTRE}, np.array([n + 20]))
    assert moved["mean"].iloc[0] == pytest.approx((b2 - d2)[:, 0].mean(), rel=1e-9)


def test_predictive_bands_place_each_site_and_time() -> None:
    # layout "one variable per site" and layout "one variable over observations"
    counts = pd.DataFrame({"site": ["A"] * 3 + ["B"] * 2, "time": [1.0, 2.0, 4.0, 1.0, 3.0],
                           "count": [5, 6, 7, 8, 9]})
    rng = np.random.default_rng(0)
    a = 100 + np.array([1.0, 2.0, 4.0]) + 0 * rng.random((2, 5, 3))
    b = 200 + np.array([1.0, 3.0]) + 0 * rng.random((2, 5, 2))
    per_site = az.from_dict(posterior={"x": rng.random((2, 5))}, posterior_predictive={"counts_A": a, "counts_B": b})
    got = predictive_bands(per_site, counts, ["A", "B"])
    assert not got.notes
    assert got.bands["A"]["time"].tolist() == [1.0, 2.0, 4.0]
    assert np.allclose(got.bands["A"]["q50"], [101, 102, 104]) and np.allclose(got.bands["B"]["q95"], [201, 203])
    obs = xr.Dataset({"y": (("chain", "draw", "obs"), np.concatenate([a, b], axis=2))},
                     coords={"chain": [0, 1], "draw": np.arange(5), "obs": np.arange(5),
                             "obs_site": ("obs", ["A", "A", "A", "B", "B"]),
                             "obs_time": ("obs", [1.0, 2.0, 4.0, 1.0, 3.0])})
    idata = az.InferenceData(posterior=per_site.posterior, posterior_predictive=obs)
    got = predictive_bands(idata, counts, ["A", "B"])
    assert np.allclose(got.bands["B"]["q05"], [201, 203]) and got.bands["B"]["time"].tolist() == [1.0, 3.0]
    # a layout that cannot be placed is explained, not guessed
    odd = az.from_dict(posterior={"x": rng.random((2, 5))},
                       posterior_predictive={"z": rng.random((2, 5, 7)), "w": rng.random((2, 5, 7))})
    got = predictive_bands(odd, counts, ["A", "B"])
    assert not got.bands and len(got.notes) == 2


def test_probability_format_for_managers() -> None:
    assert format_probability(0.1234) == "12.3%"
    assert format_probability(0.0234) == "2.3%"
    assert format_probability(0.00042) == "0.042%"
    assert format_probability(3e-9) == "< 0.001%"
    assert format_probability(0.99995) == "> 99.9%"
    assert format_probability(0.0) == "0%" and format_probability(float("nan")) == "—"
