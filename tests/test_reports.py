"""The report: a genuine small run folder in (tests/runs.py: the project's own model, fit
checks, push-forward and run-folder writer around invented posterior draws), a
self-contained report.html and figures/ out."""
from __future__ import annotations

import base64
import html
import io
import json
import shutil
from pathlib import Path
import re

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from runs import CENTRE, FAMILY, make_run_folder
from tallyfit.reports import build_report
from tallyfit.reports.html import format_probability
from tallyfit.reports.predictive import predictive_bands
from tallyfit.reports.tables import category_table, extinction_table, scenario_differences, trend_table
from tallyfit.runfolder.audit import audit_run
from tallyfit.runfolder.reader import RunFolderError, open_run
from tallyfit.runfolder.schema import CAUTION

PIL = pytest.importorskip("PIL.Image")

FIGURES = {"summary_categories.png", "data_predictive.png", "rates.png", "distributions.png",
           "extinction_all_sites.png", "scenarios.png", "diagnostics_trace_rank.png",
           "diagnostics_prior_posterior.png", "diagnostics_pareto_k.png"}


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory) -> Path:
    return make_run_folder(tmp_path_factory.mktemp("run") / "heron", warnings=("<b>bold</b> & <script>x</script>",))


@pytest.fixture(scope="module")
def good_run_dir(tmp_path_factory) -> Path:
    """A run with a well-mixed posterior (4 × 150 independent draws) that passes every check."""
    return make_run_folder(tmp_path_factory.mktemp("good") / "heron", chains=4, draws=150, seed=12, divergent=0)


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
    assert html.escape(CAUTION) in _page(run_dir) and html.escape(CAUTION) in _page(good_run_dir)
    assert json.loads((run_dir / "summary.json").read_text())["caution"] == CAUTION
    for word in ("model-based", "assumptions", "guidelines", "qualified review"):
        assert word in CAUTION


def test_failed_diagnostics_banner(run_dir: Path) -> None:
    banner = _banner(_page(run_dir))
    assert 'class="box alert"' in banner and "failed" in banner
    assert "divergences: 2 divergent transitions" in banner
    # 60 draws cannot reach an ESS of 400: the finding is listed once, naming both of its sources
    assert banner.count("bulk ESS:") == 1
    assert "recomputed from posterior.nc; summary.json records the same verdict" in banner


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
    failed = audit_run(folder).failed
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
    cats = category_table(ds, open_run(run_dir).categories)
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
    counts = open_run(run_dir).counts
    trend = trend_table(ds, counts, "baseline")
    n = int(pd.read_csv(run_dir / "counts.csv")["count"].iloc[-1])
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


def test_predictive_bands_place_each_site_and_time(run_dir: Path) -> None:
    # the schema's one layout: a variable over count cells with each cell's site and time
    rng = np.random.default_rng(0)
    a = 100 + np.array([1.0, 2.0, 4.0]) + 0 * rng.random((2, 5, 3))
    b = 200 + np.array([1.0, 3.0]) + 0 * rng.random((2, 5, 2))
    cells = xr.Dataset({"counts": (("chain", "draw", "count_cell"), np.concatenate([a, b], axis=2))},
                       coords={"chain": [0, 1], "draw": np.arange(5), "count_cell": np.arange(5),
                               "cell_site": ("count_cell", ["A", "A", "A", "B", "B"]),
                               "cell_time": ("count_cell", [1.0, 2.0, 4.0, 1.0, 3.0])})
    idata = az.InferenceData(posterior=az.from_dict(posterior={"x": rng.random((2, 5))}).posterior,
                             posterior_predictive=cells)
    got = predictive_bands(idata, ["A", "B"])
    assert not got.notes
    assert got.bands["A"]["time"].tolist() == [1.0, 2.0, 4.0]
    assert np.allclose(got.bands["A"]["q50"], [101, 102, 104]) and np.allclose(got.bands["B"]["q95"], [201, 203])
    # a site with no cells, or another layout, is explained, not guessed
    assert predictive_bands(idata, ["A", "C"]).notes == ["no posterior predictive counts for site 'C'"]
    odd = az.from_dict(posterior={"x": rng.random((2, 5))}, posterior_predictive={"z": rng.random((2, 5, 7))})
    assert not predictive_bands(odd, ["A"]).bands
    # the writer's run folder has the layout the reader expects
    real = predictive_bands(az.from_netcdf(run_dir / "posterior.nc"), ["site"])
    assert not real.notes and len(real.bands["site"]) == 30


def test_probability_format_for_managers() -> None:
    assert format_probability(0.1234) == "12.3%"
    assert format_probability(0.0234) == "2.3%"
    assert format_probability(0.00042) == "0.042%"
    assert format_probability(3e-9) == "< 0.001%"
    assert format_probability(0.99995) == "> 99.9%"
    assert format_probability(0.0) == "0%" and format_probability(float("nan")) == "—"


def test_first_screen_answers_in_a_sentence(run_dir: Path, good_run_dir: Path) -> None:
    # the headline comes before every section: the risk at the longest horizon with its interval
    # (read back from derived.nc) and whether the checks passed
    for folder, verdict in ((run_dir, "failed: treat these numbers as provisional"), (good_run_dir, "Every check passed")):
        page = _page(folder)
        m = re.search(r'<p class="headline">(.*?)</p>', page)
        assert m and page.index('class="headline"') < page.index('id="summary"')
        text = html.unescape(m.group(1))
        # horizons 5 and 50 plus criterion E's (VU: 100 years without a generation time)
        assert "within 100" in text and "90% interval" in text and "criterion E category" in text
        assert verdict in text


def test_forecast_of_the_next_censuses_is_shown(good_run_dir: Path) -> None:
    # the table's medians are summary.json's, which are the quantiles of derived.nc's forecast pmf
    page = _page(good_run_dir)
    assert "How many to expect at the next censuses" in page and "figures/forecast.png" in page
    summary = json.loads((good_run_dir / "summary.json").read_text())
    steps = summary["derived"]["baseline"]["forecast"]["site"]
    derived = xr.open_dataset(good_run_dir / "derived.nc")
    pmf = derived["forecast_pmf"].sel(scenario="baseline", site="site").values
    assert len(steps) == pmf.shape[0] == 3
    for k, step in enumerate(steps):
        cdf = np.cumsum(pmf[k]) / pmf[k].sum()
        assert step["q50"] == int(np.argmax(cdf >= 0.5 - 1e-12))
        assert step["q05"] <= step["q25"] <= step["q50"] <= step["q75"] <= step["q95"]


def test_a_warning_the_run_recorded_and_a_failed_check_are_one_line(run_dir: Path, tmp_path: Path) -> None:
    # the fit recorded the same finding the audit recomputes (here: the divergent transitions)
    folder = tmp_path / "run"
    shutil.copytree(run_dir, folder)
    audit = audit_run(folder)
    finding = next(c for c in audit.failed if c.name == "divergences")
    summary = json.loads((folder / "summary.json").read_text())
    summary["warnings"] = [finding.detail]
    (folder / "summary.json").write_text(json.dumps(summary))
    banner = _banner(html.unescape((build_report(folder)).read_text()))
    assert banner.count(finding.detail) == 1
    assert "also recorded by the run in summary.json" in banner
    assert "Warnings recorded by the run" not in banner
