"""Screening before a model is built: impossible jumps (typing slips) and fits too large.

Checks:
* the passage-time and climbing bounds of :mod:`tallyfit.infer.screening` are upper bounds
  of the exact chance of a change at least as large: against scipy.linalg.expm of the
  birth–death generator (the transition law P(t) = e^{Qt}; Kolmogorov's forward equations),
  for rises and falls, with and without immigration, linear and logistic rates;
* they are not empty: where the exact chance is astronomically small, so is the bound;
* counts made by a Gillespie simulator written here (Gillespie 1977, J. Phys. Chem.
  81:2340), with good and bad years, are never flagged (no false alarm on 720 intervals, with and without good and bad years in the model);
* the typing slip of the issue (5, 900000000, 4) is refused at once, naming the file, line
  and column, exit 2 and nothing written; accepted deliberately it is then refused for its
  memory, naming the setting; the memory estimate and its refusal; the time estimate's note.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from reference import generator, gillespie_years

from tallyfit.cli import main
from tallyfit.infer.counts import CountData
from tallyfit.infer.families import get_family
from tallyfit.infer import cost, screening
from tallyfit.infer.cost import (FitTooLargeError, describe_duration, estimate_memory, estimate_sampling_time,
                                 require_memory_for_fit)
from tallyfit.infer.screening import ImplausibleCountsError, change_chances, check_changes, implausible_changes


def _point_priors(values: dict[str, float]) -> dict[str, dict]:
    """Priors so narrow (lognormal σ = 1e-4) that every prior draw is the given rates."""
    return {k: {"dist": "lognormal", "mu": math.log(v), "sigma": 1e-4} for k, v in values.items()}


def _exact_tail(family, values: dict[str, float], n0: int, n1: int, t: float, cap: int) -> float:
    """P(N_t ≥ n1) for a rise, P(N_t ≤ n1) for a fall, from scipy.linalg.expm on 0..cap."""
    b, d = family.numpy_rates({k: np.array([v]) for k, v in values.items()}, np.arange(cap + 1))
    row = scipy.linalg.expm(generator(b[0], d[0]) * t)[n0]
    return float(row[n1:].sum() if n1 > n0 else row[:n1 + 1].sum())


CASES = [  # family, immigration, rates, (n0, n1, t)
    ("linear", False, {"birth_rate": 0.5, "death_rate": 0.4}, [(10, 30, 1.0), (10, 60, 1.0), (40, 15, 1.0),
                                                              (40, 2, 1.0)]),
    ("linear", True, {"birth_rate": 0.3, "death_rate": 0.3, "immigration": 2.0}, [(0, 8, 1.0), (5, 40, 2.0),
                                                                                    (30, 5, 1.0)]),
    ("logistic", False, {"birth_rate": 0.8, "death_rate": 0.2, "carrying_capacity": 20.0},
     [(15, 35, 1.0), (15, 60, 1.0), (20, 45, 3.0), (30, 8, 1.0)]),
    ("logistic", True, {"birth_rate": 0.8, "death_rate": 0.2, "carrying_capacity": 20.0, "immigration": 1.0},
     [(2, 30, 1.0), (18, 70, 2.0), (25, 4, 1.0)]),
]


@pytest.mark.parametrize("name, immigration, values, changes", CASES)
def test_bounds_hold_against_the_exact_transition_law(name, immigration, values, changes):
    fam = get_family(name, immigration=immigration)
    for n0, n1, t in changes:
        data = CountData.single([0.0, t], [n0, n1])
        chance = float(change_chances(data, fam, priors=_point_priors(values))["chance"].iloc[0])
        exact = _exact_tail(fam, values, n0, n1, t, cap=260)
        # an upper bound (Monte Carlo over identical draws: no sampling error)
        assert chance >= exact * (1 - 1e-6), (name, n0, n1, t, chance, exact)


def test_bound_is_small_where_the_exact_chance_is_astronomically_small():
    # a logistic colony at K = 20 cannot reach 200 in a year: deaths above K outrun births
    values = {"birth_rate": 0.8, "death_rate": 0.2, "carrying_capacity": 20.0}
    fam = get_family("logistic", immigration=False)
    exact = _exact_tail(fam, values, 20, 200, 1.0, cap=400)
    chance = float(change_chances(CountData.single([0.0, 1.0], [20, 200]), fam,
                                  priors=_point_priors(values))["chance"].iloc[0])
    assert exact < 1e-30
    assert chance < 1e-20
    # and a linear population cannot fall from 400 to 0 in a year at deaths of 0.4
    values = {"birth_rate": 0.5, "death_rate": 0.4}
    chance = float(change_chances(CountData.single([0.0, 1.0], [400, 0]), get_family("linear", immigration=False),
                                  priors=_point_priors(values))["chance"].iloc[0])
    assert chance <= (1 - math.exp(-0.4)) ** 400 * (1 + 1e-9)   # P(every animal dies) of the pure-death bound


def test_simulated_counts_with_good_and_bad_years_are_never_flagged():
    from tallyfit.infer.model import Environment

    rng = np.random.default_rng(12)
    fam = get_family("logistic", immigration=True)
    flagged = 0
    for rep in range(12):
        # logistic rates with immigration, written out here: λ_n = 1.2 n + 1, μ_n = n (0.3 + 0.9 n/K)
        n = np.arange(20001.0)
        k = rng.uniform(30, 3000)
        start = int(rng.integers(5, 60))
        sizes = [start] + gillespie_years(1.2 * n + 1.0, n * (0.3 + 0.9 * n / k), 0.5, start, 30, rng)
        data = CountData.single(np.arange(1990.0, 2021.0), sizes)
        for env in (Environment(), Environment(varying="births")):
            flagged += len(implausible_changes(data, fam, environment=env))
    assert flagged == 0


def test_typing_slip_is_refused_with_file_line_and_column(tmp_path):
    from tallyfit.inputs.counts_csv import load_counts

    counts = tmp_path / "tarn.csv"
    counts.write_text("time,count\n1,5\n2,900000000\n3,4\n")
    data = load_counts(counts)
    # the linear family allows births of 40 per animal at its 99.9%, so the rise alone is
    # possible; the rise and the fall back together are far beyond the priors
    with pytest.raises(ImplausibleCountsError) as err:
        check_changes(data, get_family("linear", immigration=True))
    e = err.value
    assert e.line == 3 and e.column == "count" and str(counts) in str(e)
    assert "900000000" in str(e) and "goes back to 4" in str(e) and "--accept-jumps" in str(e)
    assert e.changes[0].count == 900000000 and e.changes[0].chance < screening.JUMP_LIMIT
    assert check_changes(data, "linear", accept=True)[0].after_count == 4
    # a logistic population may overshoot a carrying capacity the counts place anywhere and
    # crash: not beyond its rates' priors (the memory refusal below catches this slip)
    assert implausible_changes(data, get_family("logistic", immigration=True)) == []


def test_cli_refuses_the_slip_then_its_memory(tmp_path, capsys):
    counts = tmp_path / "tarn.csv"
    counts.write_text("time,count\n1,5\n2,900000000\n3,4\n")
    out = tmp_path / "run"
    short = ["--chains", "2", "--draws", "20", "--tune", "20"]
    assert main(["fit", str(counts), "--rates", "linear", "--out", str(out), *short]) == 2
    err = capsys.readouterr().err
    assert "line 3" in err and "typing slip" in err and not out.exists()
    for extra in (["--rates", "linear", "--accept-jumps"], []):   # accepted, or the logistic default
        assert main(["fit", str(counts), "--out", str(out), *short, *extra]) == 2
        err = capsys.readouterr().err
        assert "GiB" in err and "line 3" in err and "--max-size" in err and not out.exists()


def test_memory_estimate_and_refusal():
    small = estimate_memory(1000, processes=3, available=8 * 2 ** 30)
    big = estimate_memory(10 ** 8, processes=3, available=8 * 2 ** 30)
    assert small.fits and not big.fits
    # linear in the cap and in the processes
    assert estimate_memory(2 * 10 ** 8, processes=3, available=1).needed_bytes - big.needed_bytes == \
        3 * cost.BYTES_PER_SIZE * 10 ** 8
    require_memory_for_fit(small, largest_count=800)
    with pytest.raises(FitTooLargeError) as err:
        require_memory_for_fit(big, largest_count=9 * 10 ** 7, where="c.csv line 7", cap_given=False)
    assert err.value.needed_bytes == big.needed_bytes and err.value.cap == 10 ** 8
    assert "c.csv line 7" in str(err.value) and "--max-size" in str(err.value)
    medium = estimate_memory(10 ** 7, processes=5, available=12 * 2 ** 30)   # one process fits, five do not
    with pytest.raises(FitTooLargeError, match="--chains"):
        require_memory_for_fit(medium, largest_count=10 ** 6, cap_given=True)


def test_time_estimate_words(monkeypatch):
    low, mid, high = estimate_sampling_time(0.01, chains=4, draws=1000, tune=1000, processes=2)
    # two rounds of two chains, 2000 iterations each, LEAPFROG_STEPS evaluations per iteration
    assert (low, mid, high) == pytest.approx(tuple(0.01 * k * 4000 for k in cost.LEAPFROG_STEPS))
    assert describe_duration(40) == "40 seconds" and describe_duration(720) == "12 minutes"
    assert describe_duration(3.5 * 3600) == "3.5 hours"


def test_fit_says_how_long_sampling_will_take(monkeypatch):
    from tallyfit.infer.fit import fit_counts

    monkeypatch.setattr(cost, "LEAPFROG_STEPS", (10 ** 6,) * 3)   # as if every evaluation were slow
    said: list[str] = []
    data = CountData.single(np.arange(2000.0, 2008.0), [12, 14, 13, 17, 15, 18, 16, 19])
    fit_counts(data, get_family("linear", immigration=False), chains=1, draws=10, tune=10, seed=1,
               progressbar=False, cores=1, n_predictive=5, n_prior=20, log=said.append)
    assert any(s.startswith("time: sampling will take roughly") for s in said)
