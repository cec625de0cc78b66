"""Every rate family, with and without a detection model, pooled, and with good and bad years,
runs end to end from the command line (short chains: this checks the whole job runs and
writes a complete, auditable run folder; the statistics are checked elsewhere)."""
from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
import xarray as xr

from tallyfit.chain import BirthDeathChain
from tallyfit.cli import main
from tallyfit.runfolder.audit import audit_run
from tallyfit.runfolder.schema import RUN_FILES

SHORT = ["--chains", "2", "--draws", "25", "--tune", "25", "--seed", "5", "--quiet"]
# the per-size family's many parameters make unadapted NUTS trajectories long: fewer iterations
TINY = ["--draws", "10", "--tune", "10"]


@pytest.fixture(scope="module")
def counts(tmp_path_factory):
    """Input data only: exact simulations of two invented ponds (a regulated population with
    immigration), each counted once a year, and the same counts surveyed three times with
    detection 0.8."""
    folder = tmp_path_factory.mktemp("families")
    n = np.arange(400)
    chain = BirthDeathChain(lambda n: 0.8 * n + 0.5, lambda n: n * (0.3 + 0.5 * n / 30))
    rng = np.random.default_rng(8)
    frames, surveys = [], []
    for site, seed in (("reed pond", 1), ("alder pond", 2)):
        sizes = chain.simulate(20, np.arange(10.0), seed=seed)[0]
        frames.append(pd.DataFrame({"site": site, "time": np.arange(2011, 2021), "count": sizes}))
        for s in (1, 2, 3):
            surveys.append(pd.DataFrame({"site": site, "time": np.arange(2011, 2021), "survey": s,
                                         "count": rng.binomial(sizes, 0.8)}))
    exact, detect = folder / "ponds.csv", folder / "ponds_surveys.csv"
    pd.concat(frames).to_csv(exact, index=False)
    pd.concat(surveys).to_csv(detect, index=False)
    return {"exact": exact, "detect": detect, "folder": folder}


CASES = [
    ("linear", [], "exact"),
    ("logistic", [], "exact"),
    ("allee", [], "exact"),
    ("per-size", TINY, "exact"),
    ("logistic", ["--detection", "estimate", *TINY], "detect"),
    ("linear", ["--detection", "0.8"], "detect"),
    ("linear", ["--varying-years", "births", *TINY], "exact"),
]


@pytest.mark.parametrize("family, options, data", CASES, ids=[f"{f}-{d}-{'-'.join(o[:2])}" for f, o, d in CASES])
def test_every_family_runs_end_to_end(counts, family, options, data):
    out = counts["folder"] / f"run-{family}-{data}-{'-'.join(o.strip('-') for o in options[:2]) or 'plain'}"
    code = main(["fit", str(counts[data]), "--rates", family, "--out", str(out), *SHORT, *options])
    assert code in (0, 1)  # 1: short chains may fail a convergence check, which is recorded
    assert all((out / name).is_file() for name in RUN_FILES)
    summary = json.loads((out / "summary.json").read_text())
    assert summary["family"]["name"] == family
    assert (code == 0) == summary["diagnostics"]["passed"]
    audit = audit_run(out)
    assert not [c for c in audit.failed if c.name.startswith(("hash", "files", "run folder"))]
    if "--varying-years" in options:
        post = xr.open_dataset(out / "posterior.nc", group="posterior")
        assert "environment_sd" in post and float(post["environment_sd"].min()) >= 0


def test_pooled_per_size_run(counts, tmp_path):
    # the family adapted to the data (knots placed) is the one pushed forward
    cfg = tmp_path / "run.toml"
    cfg.write_text("[fit]\npooling = true\n")
    out = tmp_path / "pooled"
    code = main(["fit", str(counts["exact"]), "--rates", "per-size", "--config", str(cfg), "--out", str(out),
                 *SHORT, *TINY])
    assert code in (0, 1)
    derived = xr.open_dataset(out / "derived.nc")
    assert sorted(derived["site"].values.tolist()) == ["alder pond", "reed pond"]
    assert np.all(np.isfinite(derived["extinction_probability"].values))
