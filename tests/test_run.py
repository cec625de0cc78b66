"""Run folders: crash-safe writing, hashes, the schema's reader and the one audit."""
from __future__ import annotations

import json
import os
import shutil

import arviz as az
import numpy as np
import pytest
import xarray as xr

from runs import make_run_folder
from tallyfit.cli import main
from tallyfit.runfolder.audit import audit_run
from tallyfit.runfolder.reader import RunFolderError, open_run
from tallyfit.runfolder.schema import RUN_FILES, SUMMARY_SECTIONS, categories_from_attrs
from tallyfit.runfolder.store import json_value, sha256_file, staged_folder


def test_staged_folder_renames_only_when_complete(tmp_path):
    target = tmp_path / "run"
    with staged_folder(target) as tmp:
        (tmp / "a.txt").write_text("first")
    assert (target / "a.txt").read_text() == "first"
    with pytest.raises(KeyboardInterrupt):
        with staged_folder(target) as tmp:
            (tmp / "a.txt").write_text("second, interrupted")
            raise KeyboardInterrupt
    assert (target / "a.txt").read_text() == "first"  # the earlier run is untouched
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]  # no partial folder left behind
    with staged_folder(target) as tmp:
        (tmp / "b.txt").write_text("replacement")
    assert sorted(p.name for p in target.iterdir()) == ["b.txt"]


def test_leftovers_of_a_killed_run_are_cleared(tmp_path):
    stale = tmp_path / ".run.partial-999999999"  # a process id that cannot be running
    stale.mkdir()
    (stale / "posterior.nc").write_bytes(b"half")
    with staged_folder(tmp_path / "run") as tmp:
        (tmp / "a.txt").write_text("ok")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run"]


def test_sha256_matches_known_value(tmp_path):
    # FIPS 180-4 test vector "abc" (common practice)
    path = tmp_path / "abc"
    path.write_bytes(b"abc")
    assert sha256_file(path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def test_json_values_are_plain():
    doc = json_value({"a": np.float64(1.5), "b": np.int64(3), "c": np.array([1.0, np.nan]), "d": (np.bool_(True),)})
    assert doc == {"a": 1.5, "b": 3, "c": [1.0, None], "d": [True]}
    assert json.loads(json.dumps(doc, allow_nan=False)) == doc
    with pytest.raises(TypeError):
        json_value({"x": object()})


@pytest.fixture(scope="module")
def good_run(tmp_path_factory):
    """A well-mixed run (4 × 150 independent draws) written by the writer, without a report."""
    return make_run_folder(tmp_path_factory.mktemp("run") / "good", chains=4, draws=150, seed=12, divergent=0,
                           report=False)


def test_writer_follows_the_schema(good_run):
    rf = open_run(good_run)
    assert not rf.notes
    assert set(json.loads((good_run / "summary.json").read_text())) == set(SUMMARY_SECTIONS)
    assert rf.categories == ["below VU", "VU", "EN", "CR"]
    assert rf.criterion_e_horizons == {"CR": 10.0, "EN": 20.0, "VU": 100.0} and rf.generation_time is None
    assert [s["name"] for s in rf.scenario_settings] == rf.scenarios == ["baseline", "cull"]
    with xr.open_dataset(good_run / "derived.nc") as ds:
        assert categories_from_attrs(ds["iucn_category"].attrs, "derived.nc") == rf.categories
    assert rf.counts is not None and rf.counts["count"].notna().sum() == 30


def test_audit_passes_a_good_run_and_fails_when_tampered(good_run, tmp_path, capsys):
    run = tmp_path / "copy"
    shutil.copytree(good_run, run)
    (run / "report.html").write_text("<!DOCTYPE html>")  # the writer was asked for no report
    res = audit_run(run)
    assert res.passed, [(c.name, c.detail) for c in res.failed + res.not_made]
    assert main(["--quiet", "audit", str(run)]) == 0
    with open(run / "counts.csv", "a") as fh:
        fh.write("2025,7\n")  # someone edits the data afterwards
    res = audit_run(run)
    assert [c.name for c in res.failed] == ["hash of counts.csv"]
    assert main(["--quiet", "audit", str(run)]) == 1
    assert "hash of counts.csv" in capsys.readouterr().err


def test_audit_recomputes_diagnostics(good_run, tmp_path):
    # Vehtari et al. (2021): chains that disagree give rank-normalised R-hat far above 1.01.
    run = tmp_path / "stuck"
    shutil.copytree(good_run, run)
    idata = az.from_netcdf(run / "posterior.nc")
    post = idata.posterior.load()
    post["birth_rate"] = post["birth_rate"] + post["chain"]  # every chain somewhere else
    idata.posterior = post
    idata.to_netcdf(str(run / "changed.nc"))  # not over the file it is being read from
    os.replace(run / "changed.nc", run / "posterior.nc")
    res = audit_run(run)
    names = [c.name for c in res.failed]
    assert "R-hat" in names and "hash of posterior.nc" in names
    r_hat = next(c for c in res.failed if c.name == "R-hat")
    assert "birth_rate" in r_hat.detail and "disagrees" in r_hat.source  # summary.json recorded a pass


def test_off_schema_files_are_named_not_guessed(good_run, tmp_path):
    run = tmp_path / "renamed"
    shutil.copytree(good_run, run)
    doc = json.loads((run / "summary.json").read_text())
    doc["checks"] = doc.pop("diagnostics")  # a renamed key
    (run / "summary.json").write_text(json.dumps(doc))
    rf = open_run(run)
    assert rf.summary is None and any("summary.json" in n and "diagnostics" in n for n in rf.notes)
    assert not audit_run(run).passed
    with xr.open_dataset(good_run / "derived.nc") as ds:
        broken = ds.load()
    del broken.attrs["criterion_e_horizons_json"]
    broken.to_netcdf(run / "derived.nc", engine="h5netcdf")
    with pytest.raises(RunFolderError, match="criterion_e_horizons_json"):
        open_run(run)


def test_audit_of_missing_or_damaged_files(tmp_path):
    run = tmp_path / "empty"
    run.mkdir()
    res = audit_run(run)
    assert not res.passed
    files = next(c for c in res.checks if c.name == "files")
    assert not files.passed and all(n in files.detail for n in RUN_FILES)
    assert not audit_run(tmp_path / "nowhere").passed
    (run / "posterior.nc").write_bytes(b"\x89HDF\r\n\x1a\n but not really")
    (run / "derived.nc").write_bytes(b"nothing")
    res = audit_run(run)
    assert any(c.name == "run folder readable" and "posterior.nc" in c.detail for c in res.failed)
