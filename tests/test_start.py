"""The sampler's start (infer/start.py) and the plain errors around sampling (infer/sampling.py).

Counts are simulated here by an exact event-by-event simulator written in this file
(Gillespie 1977, J. Phys. Chem. 81:2340), not by tallyfit's own code. No test samples for
long: they build the model and evaluate its log density, or stop pm.sample at once.
"""
from __future__ import annotations

import math
import warnings

import numpy as np
import pandas as pd
import pytest

from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import InputError, SamplerError
from tallyfit.infer.families import Allee, Linear, Logistic, PerSize
from tallyfit.infer.fit import fit_counts
from tallyfit.infer.model import Environment, build_count_model
from tallyfit.infer.start import START_QUANTILES, count_moments, find_start
from tallyfit.inputs.counts_csv import load_counts


def _simulate(birth, death, start, times, rng):
    """Sizes at ``times`` of a birth–death process with rates birth(n), death(n), from ``start``:
    exact exponential waiting times between events (Gillespie 1977); written here."""
    n, t, out = start, float(times[0]), [start]
    for t_next in times[1:]:
        while True:
            up, down = birth(n), death(n)
            if up + down <= 0.0:
                break
            t += rng.exponential(1.0 / (up + down))
            if t > t_next:
                break
            n += 1 if rng.random() * (up + down) < up else -1
        t = float(t_next)
        out.append(n)
    return np.array(out, dtype=float)


def _logistic_counts(seed: int, sites: int = 1, immigration: float = 0.0) -> CountData:
    # input data only: b = 0.6, d = 0.2, K = 60 (per-capita death d + (b - d) n / K), from 15
    rng = np.random.default_rng(seed)
    times = np.arange(12.0)
    frames = [pd.DataFrame({"site": f"pond {k}", "time": times,
                            "count": _simulate(lambda n: 0.6 * n + immigration,
                                               lambda n: n * (0.2 + 0.4 * n / 60.0), 15, times, rng)})
              for k in range(sites)]
    return load_counts(pd.concat(frames)) if sites > 1 else CountData.single(times, frames[0]["count"].values)


@pytest.fixture(scope="module")
def logistic_data() -> CountData:
    return _logistic_counts(3, immigration=0.5)


FAMILIES = {
    "linear": (Linear(), {}),
    "linear+immigration": (Linear(immigration=True), {}),
    "logistic": (Logistic(), {}),
    "logistic+immigration": (Logistic(immigration=True), {}),
    "allee": (Allee(), {}),
    "per-size": (PerSize(knots=4), {}),
    "pooled logistic": (Logistic(), {"pooling": True}),
    "linear, good and bad years": (Linear(), {"environment": Environment(varying="births")}),
    "linear, detection estimated": (Linear(), {"detection": "estimate"}),
}


@pytest.mark.parametrize("name", list(FAMILIES))
def test_start_is_finite_for_every_family(name, logistic_data):
    family, options = FAMILIES[name]
    data = _logistic_counts(4, sites=2, immigration=0.5) if options.get("pooling") else logistic_data
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        cm = build_count_model(data, family, **options)
    start = find_start(cm, chains=3, seed=11)
    # every term of the model's log density is finite there, by PyMC's own evaluation
    logp = cm.model.compile_logp(sum=False)
    for point in [start.point, *start.chain_points]:
        assert all(np.all(np.isfinite(v)) for v in logp(point))
    assert math.isfinite(start.log_density) and set(start.terms) >= {"count_loglik"}
    assert start.tried[0][0] == "the counts" and start.log_density == max(v for _, v in start.tried)
    # the chains start apart, reproducibly from the seed
    a, b = start.chain_points[0], start.chain_points[1]
    assert any(not np.allclose(a[k], b[k]) for k in a)
    again = find_start(cm, chains=3, seed=11)
    for p, q in zip(start.chain_points, again.chain_points):
        for k in p:
            np.testing.assert_array_equal(p[k], q[k])
    # each estimate lies inside its prior's 1%–99% range
    from tallyfit.infer.families import scipy_prior

    for k, v in start.data.parameters.items():
        if k in cm.priors and np.ndim(v) == 0:
            lo, hi = scipy_prior(cm.priors[k]).ppf(START_QUANTILES)
            assert lo * (1 - 1e-9) <= v <= hi * (1 + 1e-9), (k, v, lo, hi)


def test_moments_recover_growth_and_turnover_of_a_linear_process():
    # linear birth–death: E N_t = n0 e^{rt}, Var N_t = n0 (b + d)/r e^{rt}(e^{rt} - 1), r = b - d
    # (Bailey 1964, The Elements of Stochastic Processes, ch. 8 — from memory); with b = 0.5,
    # d = 0.3 over 40 sites × 8 unit intervals from 40 animals, over seeds 1–10 of this simulation
    # the method-of-moments estimates of r and b + d had standard deviations 0.005 and 0.09
    # (means 0.196 and 0.85); the bounds are 5 and about 3 of those
    rng = np.random.default_rng(1)
    times = np.arange(9.0)
    frames = [pd.DataFrame({"site": f"s{k}", "time": times,
                            "count": _simulate(lambda n: 0.5 * n, lambda n: 0.3 * n, 40, times, rng)})
              for k in range(40)]
    data = load_counts(pd.concat(frames))
    cm = build_count_model(data, Linear(), cap=int(data.max_count * 1.3) + 20)
    mom = count_moments(cm)
    assert mom.intrinsic_growth is None and mom.n_transitions == 320
    assert mom.growth == pytest.approx(0.2, abs=0.025)
    assert mom.turnover == pytest.approx(0.8, abs=0.3)
    start = find_start(cm, chains=1, seed=0)
    b, d = start.data.parameters["birth_rate"], start.data.parameters["death_rate"]
    assert b - d == pytest.approx(mom.growth) and b + d == pytest.approx(mom.turnover)


def test_logistic_moments_find_the_carrying_capacity_and_small_population_growth():
    # ten sites rising from 15 towards K = 60 with r_0 = b − d = 0.4: the one-step growth falls
    # linearly with size and crosses zero at K (the logistic law, Verhulst 1838 — common practice);
    # over seeds 1–10 of this simulation the estimates were K 51–66 and r_0 0.28–0.50
    data = _logistic_counts(5, sites=10)
    cm = build_count_model(data, Logistic())
    mom = count_moments(cm)
    assert 45 < mom.carrying_capacity < 75
    assert 0.2 < mom.intrinsic_growth < 0.6


# --------------------------------------------------------------------------- no finite start
def _impossible_settings():
    # a carrying capacity pinned far below the counts (K ≈ 1e-4 against counts near 60) by tight
    # priors, with the cap at the largest count (70): deaths n·(d + (b − d)·n/K) reach about 5e7 per
    # time unit at the cap, beyond the steps the likelihood takes for one census interval
    return {"birth_rate": {"dist": "lognormal", "mu": math.log(2.0), "sigma": 0.01},
            "death_rate": {"dist": "lognormal", "mu": 0.0, "sigma": 0.01},
            "carrying_capacity": {"dist": "lognormal", "mu": math.log(1e-4), "sigma": 0.01}}


def test_infeasible_start_is_refused_with_what_to_change(logistic_data):
    cm = build_count_model(logistic_data, Logistic(), priors=_impossible_settings(), cap=logistic_data.max_count)
    with pytest.raises(InputError) as err:
        find_start(cm, chains=2, seed=1)
    text = str(err.value)
    assert "starting point" in text and "count_loglik" in text and "too fast" in text
    # what to change: the prior that holds K far from the counts, the family, the cap
    assert "priors.carrying_capacity" in text and "--rates" in text and "--max-size" in text


def test_infeasible_start_stops_the_fit_before_sampling(logistic_data, monkeypatch):
    import pymc as pm

    def never(*args, **kwargs):
        raise AssertionError("pm.sample must not be reached")

    monkeypatch.setattr(pm, "sample", never)
    with pytest.raises(InputError, match="priors.carrying_capacity"):
        fit_counts(logistic_data, Logistic(), priors=_impossible_settings(), cap=logistic_data.max_count,
                   chains=1, draws=5, tune=5, progressbar=False, seed=2)


def test_infeasible_start_from_the_command_line_exits_2_and_writes_nothing(logistic_data, tmp_path, capsys):
    from tallyfit.cli import main

    csv = tmp_path / "pond.csv"
    t, c, _ = logistic_data.series[0].observed()
    pd.DataFrame({"time": 2000 + t.astype(int), "count": c}).to_csv(csv, index=False)
    cfg = tmp_path / "run.toml"
    cfg.write_text("[fit]\nimmigration = false\n" + "".join(
        f"[priors.{k}]\n" + "".join(f"{a} = {v!r}\n" if a != "dist" else f'dist = "{v}"\n' for a, v in spec.items())
        for k, spec in _impossible_settings().items()))
    out = tmp_path / "never"
    code = main(["fit", str(csv), "--rates", "logistic", "--config", str(cfg), "--out", str(out), "--chains", "1",
                 "--draws", "10", "--tune", "5", "--max-size", str(int(c.max())), "--seed", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err and "priors.carrying_capacity" in err
    assert not out.exists() and sorted(p.name for p in tmp_path.iterdir()) == ["pond.csv", "run.toml"]


# --------------------------------------------------------------------------- sampler failures
def _failing_sample(exc: BaseException, seen: dict):
    def sample(*args, **kwargs):
        seen.update(kwargs)
        raise exc
    return sample


def _initial_evaluation_error():
    from pymc.exceptions import SamplingError

    return SamplingError("Initial evaluation of model at starting point failed!\nStarting values:\n"
                         "{'birth_rate_log__': array(0.2)}\n\nLogp initial evaluation results:\n"
                         "{'birth_rate': -1.61, 'death_rate': -1.61, 'count_loglik': -inf}\n"
                         "You can call `model.debug()` for more details.")


def _chain_failure():
    # how PyMC reports a chain process's error: ParallelSamplingError raised from the original
    from pymc.sampling.parallel import ParallelSamplingError

    try:
        try:
            raise InputError("a count is above the maximum size 60", source="--max-size")
        except InputError as inner:
            raise ParallelSamplingError(f"Chain 0 failed with: {inner}", 0) from inner
    except ParallelSamplingError as outer:
        return outer


def _linker_error():
    return ValueError("Input dimension mismatch. (input[0].shape[0] = 3, input[1].shape[0] = 2)\n"
                      "Apply node that caused the error: Elemwise{add,no_inplace}(x, y)\nToposort index: 0\n"
                      "HINT: Re-running with most PyTensor optimizations disabled could provide a back-trace")


@pytest.mark.parametrize("make,kind,words", [
    (_initial_evaluation_error, InputError, ("could not start", "count_loglik -inf", "--max-size", "--rates")),
    (_chain_failure, InputError, ("above the maximum size 60",)),
    (lambda: MemoryError(), InputError, ("memory", "--max-size")),
    (lambda: FloatingPointError("invalid value encountered in multiply"), SamplerError,
     ("numerical failure", "FloatingPointError", "--seed")),
    (_linker_error, SamplerError, ("ValueError: Input dimension mismatch",)),
], ids=["initial evaluation", "chain process", "memory", "floating point", "linker"])
def test_sampler_failures_become_plain_errors(make, kind, words, logistic_data, monkeypatch):
    import pymc as pm

    seen: dict = {}
    monkeypatch.setattr(pm, "sample", _failing_sample(make(), seen))
    with pytest.raises(kind) as err:
        fit_counts(logistic_data, Linear(), chains=2, draws=5, tune=5, progressbar=False, seed=4)
    text = str(err.value)
    for w in words:
        assert w in text, (w, text)
    assert "Apply node" not in text and "Traceback" not in text and "\n" not in text
    # the checked per-chain starts went to the sampler, with PyMC's own jitter off
    assert seen["init"] == "adapt_full" and len(seen["initvals"]) == 2


def test_sampler_failure_from_the_command_line_exits_3_without_traceback(logistic_data, tmp_path, capsys,
                                                                           monkeypatch):
    import pymc as pm

    from tallyfit.cli import main

    monkeypatch.setattr(pm, "sample", _failing_sample(FloatingPointError("overflow encountered in exp"), {}))
    csv = tmp_path / "pond.csv"
    t, c, _ = logistic_data.series[0].observed()
    pd.DataFrame({"time": 2000 + t.astype(int), "count": c}).to_csv(csv, index=False)
    out = tmp_path / "never"
    code = main(["fit", str(csv), "--rates", "linear", "--out", str(out), "--chains", "1", "--draws", "10",
                 "--tune", "5", "--seed", "1", "--quiet"])
    err = capsys.readouterr().err
    assert code == 3 and "Traceback" not in err and "overflow encountered in exp" in err and "--seed" in err
    assert not out.exists()


def test_pymc_samples_from_the_checked_starts_of_a_pooled_model():
    # a vector parameter (the site offsets) and transformed scales go to pm.sample as they are
    from tallyfit.infer.sampling import sample_model

    cm = build_count_model(_logistic_counts(6, sites=2), Linear(), pooling=True)
    start = find_start(cm, chains=1, seed=5)
    idata = sample_model(cm, chains=1, draws=5, tune=5, seed=5, progressbar=False, cores=1,
                         initvals=start.chain_points)
    assert idata.posterior.sizes["draw"] == 5
    assert np.all(np.isfinite(idata.posterior["site_birth_rate"].values))
