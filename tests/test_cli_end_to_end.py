"""The whole job from the command line on a small data set (short chains): every output file,
the report's images, the audit (including a tampered run), reproducibility and bad input."""
from __future__ import annotations

import base64
import io
import json
import re
import tomllib

import arviz as az
import numpy as np
import pandas as pd
import pytest
import xarray as xr
from PIL import Image

from tallyfit.chain import BirthDeathChain
from tallyfit.cli import main
from tallyfit.runfolder.schema import RUN_FILES

FAST = ["--chains", "2", "--draws", "150", "--tune", "150", "--max-size", "60", "--seed", "7", "--quiet"]


@pytest.fixture(scope="module")
def counts_csv(tmp_path_factory):
    # input data only (not a check value): an exact simulation of a small open population
    n = np.arange(200)
    chain = BirthDeathChain(lambda n: 0.4 * n + 1.0, lambda n: 0.5 * n)
    sizes = chain.simulate(8, np.arange(10.0), seed=4)[0]
    path = tmp_path_factory.mktemp("data") / "pond.csv"
    pd.DataFrame({"time": np.arange(2010, 2020), "count": sizes}).to_csv(path, index=False)
    return path


@pytest.fixture(scope="module")
def run_dir(counts_csv, tmp_path_factory):
    out = tmp_path_factory.mktemp("runs") / "pond"
    code = main(["fit", str(counts_csv), "--rates", "linear", "--out", str(out), *FAST])
    assert code in (0, 1)  # 1 only if a convergence check failed (recorded in summary.json)
    summary = json.loads((out / "summary.json").read_text())
    assert (code == 0) == summary["diagnostics"]["passed"]
    return out


def test_every_output_file_is_written(run_dir, counts_csv):
    for name in RUN_FILES:
        assert (run_dir / name).is_file(), name
    assert (run_dir / "counts.csv").read_bytes() == counts_csv.read_bytes()  # the input exactly as read
    idata = az.from_netcdf(run_dir / "posterior.nc")
    for group in ("posterior", "sample_stats", "log_likelihood", "posterior_predictive", "observed_data", "prior"):
        assert group in idata.groups(), group
    derived = xr.open_dataset(run_dir / "derived.nc")
    assert {"scenario", "chain", "draw", "size", "horizon"} <= set(derived.dims)
    summary = json.loads((run_dir / "summary.json").read_text())
    assert {"parameters", "derived", "diagnostics"} <= set(summary)
    for entry in summary["parameters"].values():
        assert {"mean", "sd", "q_lo", "q50", "q_hi", "r_hat", "ess_bulk", "ess_tail"} <= set(entry)
    assert "caution" in summary and "guidelines" in summary["caution"]
    run = tomllib.loads((run_dir / "run.toml").read_text())
    assert set(run["hashes"]) == {"counts.csv", "posterior.nc"} and run["settings"]["seed"] == 7
    assert "pymc" in run["versions"]
    table = pd.read_csv(run_dir / "summary.csv")
    assert {"kind", "quantity", "mean"} <= set(table.columns)


def test_report_images_decode_and_caution_is_shown(run_dir):
    html = (run_dir / "report.html").read_text()
    images = re.findall(r'src="data:image/png;base64,([^"]+)"', html)
    assert images
    for data in images:
        img = Image.open(io.BytesIO(base64.b64decode(data)))
        img.verify()
    assert "model-based" in html
    assert not re.search(r'(src|href)="https?://', html)  # self-contained


def test_calendar_years_speak_in_years(run_dir):
    # the counts are dated 2010..2019: the run says so and the report speaks in years
    data = json.loads((run_dir / "summary.json").read_text())["data"]
    assert data["time_unit"] == "year" and data["time_units"] == "years"
    assert "calendar years (2010 to 2019)" in data["time_unit_reason"]
    html = (run_dir / "report.html").read_text()
    assert "per time unit" not in html and "per year" in html


def test_audit_passes_or_reports_diagnostics_and_catches_tampering(run_dir, tmp_path, capsys):
    import shutil

    summary = json.loads((run_dir / "summary.json").read_text())
    code = main(["--quiet", "audit", str(run_dir)])
    assert code == (0 if summary["diagnostics"]["passed"] else 1)
    copy = tmp_path / "copy"
    shutil.copytree(run_dir, copy)
    with open(copy / "posterior.nc", "r+b") as fh:  # flip one byte of the posterior
        fh.seek(200)
        byte = fh.read(1)
        fh.seek(200)
        fh.write(bytes([byte[0] ^ 0xFF]))
    capsys.readouterr()
    assert main(["--quiet", "audit", str(copy)]) == 1
    assert "hash of posterior.nc" in capsys.readouterr().err


def test_same_seed_gives_identical_summary(run_dir, counts_csv, tmp_path):
    again = tmp_path / "again"
    main(["fit", str(counts_csv), "--rates", "linear", "--out", str(again), *FAST])
    assert (again / "summary.json").read_text() == (run_dir / "summary.json").read_text()


def test_bad_counts_exit_2_and_write_nothing(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text("time,count\n2001,5\n2002,-3\n")
    out = tmp_path / "never"
    assert main(["fit", str(bad), "--rates", "linear", "--out", str(out), *FAST]) == 2
    err = capsys.readouterr().err
    assert "bad.csv" in err and "count" in err and "Traceback" not in err
    assert not out.exists() and list(tmp_path.iterdir()) == [bad]


def test_unknown_family_exit_2(counts_csv, tmp_path, capsys):
    assert main(["fit", str(counts_csv), "--rates", "gompertz", "--out", str(tmp_path / "x"), *FAST]) == 2
    assert "gompertz" in capsys.readouterr().err


def test_pooled_two_site_run_uses_each_sites_rates(tmp_path):
    # input data only: two invented ponds simulated with different birth rates
    frames = []
    for site, b, seed in (("upper pond", 0.55, 1), ("lower pond", 0.35, 2)):
        chain = BirthDeathChain(lambda n, b=b: b * n + 1.0, lambda n: 0.45 * n)
        sizes = chain.simulate(10, np.arange(8.0), seed=seed)[0]
        frames.append(pd.DataFrame({"site": site, "time": np.arange(2010, 2018), "count": sizes}))
    csv = tmp_path / "ponds.csv"
    pd.concat(frames).to_csv(csv, index=False)
    cfg = tmp_path / "run.toml"
    cfg.write_text("[fit]\nimmigration = true\npooling = true\n")
    out = tmp_path / "pooled"
    code = main(["fit", str(csv), "--rates", "linear", "--config", str(cfg), "--out", str(out),
                 "--chains", "2", "--draws", "50", "--tune", "50", "--max-size", "60", "--seed", "3", "--quiet"])
    assert code in (0, 1)
    post = az.from_netcdf(out / "posterior.nc").posterior
    derived = xr.open_dataset(out / "derived.nc")
    assert sorted(post["site_offset"].coords["site"].values) == ["lower pond", "upper pond"]
    # the all-sites probability is the product of the sites' own probabilities (independent given the rates)
    np.testing.assert_allclose(derived["extinction_probability_all_sites"].values,
                               derived["extinction_probability"].prod("site").values, rtol=1e-12)
    assert "Partial pooling" in (out / "report.html").read_text()
