"""Many sites on Dask: one run folder per site, an index, failures isolated, reruns skip."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tallyfit.chain import BirthDeathChain
from tallyfit.batch import run_batch, site_folder_name
from tallyfit.inputs.settings import RunSettings


@pytest.fixture(scope="module")
def batch_csv(tmp_path_factory):
    # input data only: two small sites simulated exactly, and one whose counts exceed the cap
    chain = BirthDeathChain(lambda n: 0.4 * n + 1.0, lambda n: 0.5 * n)
    rows = []
    for k, site in enumerate(["East Pond", "West Pond"]):
        sizes = chain.simulate(7, np.arange(8.0), seed=10 + k)[0]
        rows += [{"site": site, "time": 2000 + t, "count": int(c)} for t, c in enumerate(sizes)]
    rows += [{"site": "Big Lake", "time": 2000 + t, "count": 500 + t} for t in range(4)]
    path = tmp_path_factory.mktemp("data") / "ponds.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def test_batch_runs_each_site_isolates_failures_and_skips_on_rerun(batch_csv, tmp_path):
    settings = RunSettings(rates="linear", chains=2, draws=100, tune=100, max_size=50, seed=3)
    out = tmp_path / "batch"
    index = run_batch(batch_csv, settings, out, n_workers=2, log=lambda s: None)
    status = dict(zip(index["site"], index["status"]))
    assert status["East Pond"] == "ok" and status["West Pond"] == "ok"
    assert status["Big Lake"] == "failed"  # counts above the cap N=50: reported, the others went on
    big = index.set_index("site").loc["Big Lake", "detail"]
    assert "max-size" in big and "503" in big
    for site in ("East Pond", "West Pond"):
        assert (out / site_folder_name(site) / "report.html").is_file()
    assert not (out / site_folder_name("Big Lake")).exists()  # nothing half-written
    on_disk = pd.read_csv(out / "index.csv")
    assert list(on_disk["site"]) == list(index["site"])
    again = run_batch(batch_csv, settings, out, n_workers=1, log=lambda s: None)
    status2 = dict(zip(again["site"], again["status"]))
    assert status2["East Pond"] == "skipped" and status2["West Pond"] == "skipped"
    assert status2["Big Lake"] == "failed"


def test_site_folder_names_are_safe():
    assert site_folder_name("North Spit / 2") == "North_Spit_2"
    assert site_folder_name("..") == "site"
