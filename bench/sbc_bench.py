"""Simulation-based calibration of the fitter for the linear and logistic families, and for
the logistic family with good and bad years ("logistic-env").

Talts, Betancourt, Simpson, Vehtari & Gelman (2018), "Validating Bayesian inference
algorithms with simulation-based calibration", arXiv:1804.06788: draw parameters θ from
the prior, simulate a data set from θ, fit it, and take the rank of θ among L posterior
draws (thinned to be nearly independent). If the fitter is calibrated the ranks are
uniform on 0..L. Printed per parameter:

* a chi-square test of uniformity of the ranks in B equal bins (scipy.stats.chisquare,
  B − 1 degrees of freedom) with its p-value, and the binned counts;
* the coverage of the central 50% and 90% posterior intervals (calibrated: 0.5 and 0.9,
  give or take the binomial standard error shown).

The data are simulated from the same model that is fitted: one site counted at
T + 1 yearly surveys from a fixed start size, the chain capped at the same size N as the
fit (the cap reflects, in the simulation as in the likelihood, so a path that reaches
it is still a draw from the fitted model), exact event-by-event paths
(chain.BirthDeathChain.simulate). With good and bad years each year draws its own
ε ~ Normal(0, σ²) and the year is simulated with births λ_0 + (λ_n − λ_0)·exp(ε − σ²/2);
the fit marginalises ε by quadrature, the simulation never does.
Priors are fixed (not scaled to each data set) and given to the fit explicitly.

Run:  .venv/bin/python bench/sbc_bench.py --replicates 100 --record sbc.jsonl   (long; resumable)
      .venv/bin/python bench/sbc_bench.py --draws 300 --tune 300 --record bench/results/sbc_300x2.jsonl
          (re-prints the table of the recorded 100 + 100 replicates without fitting again)
      .venv/bin/python bench/sbc_bench.py --replicates 8 --draws 200   (a quick look)
      .venv/bin/python bench/sbc_bench.py --families logistic-env --draws 200 --tune 200 \
          --record bench/results/sbc_env_200x2.jsonl
"""
from __future__ import annotations

import argparse
import json
import math
import os
import sys
import time
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from scipy import stats  # noqa: E402

from tallyfit.chain import BirthDeathChain  # noqa: E402
from tallyfit.infer.counts import CountData  # noqa: E402
from tallyfit.infer.families import Linear, Logistic  # noqa: E402
from tallyfit.infer.model import Environment  # noqa: E402

#: Fixed simulation design and priors per family.
DESIGNS = {
    "linear": dict(
        family=Linear(), start=20, years=12, cap=100,
        priors={"birth_rate": {"dist": "lognormal", "mu": math.log(0.4), "sigma": 0.3},
                "death_rate": {"dist": "lognormal", "mu": math.log(0.4), "sigma": 0.3}}),
    "logistic": dict(
        family=Logistic(), start=15, years=15, cap=100,
        priors={"birth_rate": {"dist": "lognormal", "mu": math.log(0.8), "sigma": 0.35},
                "death_rate": {"dist": "lognormal", "mu": math.log(0.25), "sigma": 0.35},
                "carrying_capacity": {"dist": "lognormal", "mu": math.log(40.0),
                                      "sigma": 0.3}}),
    # good and bad years on births; σ from the tool's default prior, halfnormal(0.5)
    "logistic-env": dict(
        family=Logistic(), start=15, years=15, cap=100, environment="births",
        priors={"birth_rate": {"dist": "lognormal", "mu": math.log(0.8), "sigma": 0.35},
                "death_rate": {"dist": "lognormal", "mu": math.log(0.25), "sigma": 0.35},
                "carrying_capacity": {"dist": "lognormal", "mu": math.log(40.0), "sigma": 0.3},
                "environment_sd": {"dist": "halfnormal", "sigma": 0.5}}),
}


def simulate_years(birth: np.ndarray, death: np.ndarray, sigma: float, start: int, years: int,
                   rng: np.random.Generator) -> np.ndarray:
    """Counts at 0..years: each year its own ε ~ N(0, σ²), births (not immigration) scaled by
    exp(ε − σ²/2), an exact path through that year (chain.BirthDeathChain.simulate)."""
    out = [start]
    for _ in range(years):
        eps = sigma * rng.standard_normal()
        b = birth[0] + (birth - birth[0]) * math.exp(eps - sigma ** 2 / 2)
        out.append(int(BirthDeathChain(b, death).simulate(out[-1], np.array([0.0, 1.0]),
                                                          seed=int(rng.integers(2**31)))[0][-1]))
    return np.array(out)


def one_replicate(args: tuple) -> dict:
    """Draw θ, simulate, fit, and return the ranks and interval hits of one replicate."""
    import arviz as az

    from tallyfit.infer.fit import fit_counts

    family_name, rep, seed, draws, tune, thin_to = args
    design = DESIGNS[family_name]
    fam = design["family"]
    rng = np.random.default_rng(seed)
    # θ from the family's prior (restricted to its support, e.g. logistic b > d)
    varying = design.get("environment")
    own = {k: v for k, v in design["priors"].items() if k != "environment_sd"}
    drawn = fam.draw_prior(fam.resolve_priors(own), 1, rng)
    theta = {k: float(drawn[k][0]) for k in own}
    sizes = np.arange(design["cap"] + 1)
    birth, death = fam.numpy_rates(theta, sizes)
    times = np.arange(design["years"] + 1, dtype=float)
    if varying:
        theta["environment_sd"] = float(abs(rng.normal(0.0, design["priors"]["environment_sd"]["sigma"])))
        path = simulate_years(birth[0], death[0], theta["environment_sd"], design["start"], design["years"], rng)
    else:
        path = BirthDeathChain(birth[0], death[0]).simulate(design["start"], times,
                                                            seed=int(rng.integers(2**31)))[0]
    data = CountData.single(times + 2000.0, path.astype(float))
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        r = fit_counts(data, fam, chains=2, draws=draws, tune=tune, cap=design["cap"],
                       priors=design["priors"], seed=int(rng.integers(2**31)),
                       progressbar=False, cores=1, n_predictive=20, n_prior=20,
                       environment=Environment(varying=varying))
    out = {"task": list(args), "family": family_name, "rep": rep, "seconds": time.perf_counter() - t0,
           "passed": bool(r.passed),
           "divergences": int(r.idata.sample_stats["diverging"].sum()),
           "max_r_hat": float(max(float(az.rhat(r.idata, var_names=[k])[k]) for k in theta)),
           "final_count": int(path[-1]), "theta": theta, "ranks": {},
           "in50": {}, "in90": {}}
    for k, true in theta.items():
        x = r.idata.posterior[k].values.reshape(-1)
        q = np.quantile(x, [0.05, 0.25, 0.75, 0.95])
        out["in50"][k] = bool(q[1] < true < q[2])
        out["in90"][k] = bool(q[0] < true < q[3])
        # thin to L near-independent draws (chains interleaved evenly), rank = #(draw < θ)
        chains = r.idata.posterior[k].values
        per = max(1, thin_to // chains.shape[0])
        idx = np.unique(np.round(np.linspace(0, chains.shape[1] - 1, per)).astype(int))
        thinned = chains[:, idx].reshape(-1)
        out["ranks"][k] = (int(np.sum(thinned < true)), int(thinned.size))
    return out


def summarise(results: list[dict], bins: int) -> None:
    """Print rank-uniformity statistics and interval coverage per family and parameter."""
    for fam in sorted({r["family"] for r in results}):
        rs = [r for r in results if r["family"] == fam]
        n = len(rs)
        passed = sum(r["passed"] for r in rs)
        secs = sum(r["seconds"] for r in rs)
        print(f"\n== {fam}: {n} replicates, every diagnostic threshold met in {passed} "
              f"(the ESS > 400 rule needs more than the draws of a short run), "
              f"{secs / max(n, 1):.1f} s per fit ==")
        known = [r for r in rs if "divergences" in r]
        if known:
            div = sum(r["divergences"] > 0 for r in known)
            rh = max(r["max_r_hat"] for r in known)
            print(f"   fits with divergent transitions: {div} of {len(known)}; "
                  f"largest R-hat: {rh:.3f}")
        print(f"{'parameter':<20}{'chi2':>8}{'dof':>5}{'p':>8}{'cover50':>9}{'cover90':>9}"
              f"{'(±se)':>8}   rank bins")
        for k in rs[0]["theta"]:
            L = rs[0]["ranks"][k][1]
            ranks = np.array([r["ranks"][k][0] for r in rs])
            # the L + 1 possible ranks spread over `bins` bins; expected counts from how
            # many possible ranks fall in each bin
            edges = np.linspace(0, L + 1, bins + 1)
            counts, _ = np.histogram(ranks, bins=edges)
            width, _ = np.histogram(np.arange(L + 1), bins=edges)
            expected = n * width / (L + 1)
            chi2, p = stats.chisquare(counts, expected)
            c50 = np.mean([r["in50"][k] for r in rs])
            c90 = np.mean([r["in90"][k] for r in rs])
            se = math.sqrt(0.9 * 0.1 / n)
            print(f"{k:<20}{chi2:8.2f}{bins - 1:5d}{p:8.3f}{c50:9.2f}{c90:9.2f}{se:8.2f}   "
                  + " ".join(str(c) for c in counts))
        if n < 5 * bins:
            print(f"(only {n} replicates for {bins} bins: the chi-square approximation needs "
                  f"about {5 * bins}; use --replicates 100 for the real check)")


def main(argv: list[str] | None = None) -> int:
    """Run the calibration study and print its table.

    Args:
        argv: command-line arguments (default sys.argv[1:]).

    Returns:
        0.
    """
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--replicates", type=int, default=100, help="replicates per family (≥ 100 "
                    "for the real check)")
    ap.add_argument("--families", nargs="+", default=["linear", "logistic"],
                    choices=sorted(DESIGNS))
    ap.add_argument("--draws", type=int, default=500, help="draws per chain (2 chains)")
    ap.add_argument("--tune", type=int, default=500, help="warm-up per chain")
    ap.add_argument("--thin", type=int, default=99, help="posterior draws L the rank is "
                    "taken among (ranks 0..L)")
    ap.add_argument("--bins", type=int, default=10, help="rank bins for the chi-square test")
    ap.add_argument("--jobs", type=int, default=min(2, os.cpu_count() or 1),
                    help="replicates fitted in parallel")
    ap.add_argument("--seed", type=int, default=2018)
    ap.add_argument("--record", type=Path, default=None,
                    help="JSON-lines file: each finished replicate is appended, and replicates "
                         "already recorded with the same settings are reused (resume a long run)")
    args = ap.parse_args(argv)
    seeds = np.random.SeedSequence(args.seed).generate_state(args.replicates * len(args.families))
    tasks = [(fam, rep, int(seeds[i * args.replicates + rep]), args.draws, args.tune, args.thin)
             for i, fam in enumerate(args.families) for rep in range(args.replicates)]
    t0 = time.perf_counter()
    results = []
    done: dict[tuple, dict] = {}
    if args.record is not None and args.record.exists():
        for line in args.record.read_text().splitlines():
            if line.strip():
                rec = json.loads(line)
                done[tuple(rec["task"])] = rec
    todo = [t for t in tasks if tuple(t) not in done]
    results = [done[tuple(t)] for t in tasks if tuple(t) in done]
    if results:
        print(f"  reusing {len(results)} recorded replicates from {args.record}", flush=True)
    with ProcessPoolExecutor(max_workers=args.jobs) as pool:
        for k, res in enumerate(pool.map(one_replicate, todo), 1):
            results.append(res)
            if args.record is not None:
                with open(args.record, "a") as fh:
                    fh.write(json.dumps(res) + "\n")
            if k % max(1, len(todo) // 20) == 0 or k == len(todo):
                print(f"  {k}/{len(todo)} fits done ({time.perf_counter() - t0:.0f} s)",
                      flush=True)
    print(f"\nSimulation-based calibration (Talts et al. 2018, arXiv:1804.06788); "
          f"{args.replicates} replicates per family, L = {args.thin} thinned draws, "
          f"{args.bins} bins; total {time.perf_counter() - t0:.0f} s with {args.jobs} jobs")
    summarise(results, args.bins)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
