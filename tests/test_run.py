"""Run folders: crash-safe writing, hashes and the audit (on a genuine small InferenceData)."""
from __future__ import annotations

import json
import os

import arviz as az
import numpy as np
import pytest

from tallyfit.cli import main
from tallyfit.runfolder.store import RUN_FILES, audit_run, sha256_file, staged_folder, write_run_toml


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


def test_sha256_matches_hashlib_known_value(tmp_path):
    # FIPS 180-4 test vector "abc" (common practice)
    path = tmp_path / "abc"
    path.write_bytes(b"abc")
    assert sha256_file(path) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"


def _fake_run(folder, *, good: bool):
    """A run folder around a genuine InferenceData: well-mixed iid draws (good) or stuck chains (bad)."""
    rng = np.random.default_rng(1)
    n_chain, n_draw = 4, 500
    if good:
        x = rng.normal(0.5, 0.1, (n_chain, n_draw))
    else:
        x = rng.normal(0.5, 0.01, (n_chain, n_draw)) + np.arange(n_chain)[:, None]  # chains disagree
    idata = az.from_dict(posterior={"birth_rate": x},
                         sample_stats={"diverging": np.zeros((n_chain, n_draw), bool),
                                       "energy": rng.normal(size=(n_chain, n_draw))})
    folder.mkdir()
    idata.to_netcdf(str(folder / "posterior.nc"))
    (folder / "counts.csv").write_text("time,count\n0,5\n1,6\n")
    for name in ("derived.nc", "summary.csv", "report.html"):
        (folder / name).write_text("x")
    (folder / "summary.json").write_text(json.dumps({"diagnostics": {"passed": good}}))
    write_run_toml(folder, {"seed": 1})


def test_audit_passes_a_good_run_and_fails_when_tampered(tmp_path, capsys):
    run = tmp_path / "good"
    _fake_run(run, good=True)
    res = audit_run(run)
    assert res.passed, res.problems
    assert main(["--quiet", "audit", str(run)]) == 0
    with open(run / "counts.csv", "a") as fh:
        fh.write("2,7\n")  # someone edits the data afterwards
    res = audit_run(run)
    assert not res.passed and any("hash counts.csv" in p for p in res.problems)
    assert main(["--quiet", "audit", str(run)]) == 1
    assert "hash counts.csv" in capsys.readouterr().err


def test_audit_recomputes_diagnostics(tmp_path):
    # Vehtari et al. (2021): chains that disagree give rank-normalised R-hat far above 1.01.
    run = tmp_path / "bad"
    _fake_run(run, good=False)
    res = audit_run(run)
    assert not res.passed
    assert any(p.startswith("r_hat of birth_rate") for p in res.problems)


def test_audit_of_missing_files(tmp_path):
    run = tmp_path / "empty"
    run.mkdir()
    res = audit_run(run)
    assert not res.passed
    assert {f"file {n}: missing" for n in RUN_FILES} <= set(res.problems)
    assert not audit_run(tmp_path / "nowhere").passed
