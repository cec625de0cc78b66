"""Sampler coordinates of the linear family with immigration: divergences and ESS, with and without.

Data: 18 annual counts of an invented pond population with births 0.3·n + 2 and deaths
0.35·n a year, simulated by the Gillespie simulator below (written here, not tallyfit's),
started at 30. Each seed fits the linear family with immigration at the default settings
(4 chains × 1000 draws after 1000 warm-up, default lognormal priors), once in the family's
sampler coordinates (log births at the median count, logit immigrants' share) and once —
the baseline, in the same process — with every parameter on its own log scale (the
coordinates switched off). Printed per fit: divergences, the smallest bulk and tail ESS,
R-hat, sampling time and ESS per second; then the totals.

Run:  .venv/bin/python bench/coordinates_bench.py [--seeds 1 2 3] [--draws 1000]
"""
from __future__ import annotations

import argparse
import sys
import time
import warnings
from pathlib import Path

import arviz as az
import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from tallyfit.infer.counts import CountData  # noqa: E402
from tallyfit.infer.families import Linear  # noqa: E402
from tallyfit.infer.fit import fit_counts  # noqa: E402


def gillespie(b: float, d: float, imm: float, start: int, years: int, seed: int) -> np.ndarray:
    """Sizes at whole years of births b·n + ι and deaths d·n (exact simulation, Gillespie 1977)."""
    rng = np.random.default_rng(seed)
    n, t, out = start, 0.0, [start]
    for year in range(1, years):
        while True:
            up, down = b * n + imm, d * n
            step = rng.exponential(1 / (up + down))
            if t + step > year:
                break
            t += step
            n += 1 if rng.random() < up / (up + down) else -1
        t = float(year)
        out.append(n)
    return np.array(out, dtype=float)


class PlainLinear(Linear):
    """The linear family with its sampler coordinates switched off (the baseline)."""

    def sampling_coordinates(self, scale):  # noqa: D401 - same signature as the family's
        return None


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3])
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--cores", type=int, default=2)
    args = ap.parse_args()
    counts = gillespie(0.3, 0.35, 2.0, 30, 18, seed=4)
    data = CountData.single(np.arange(2003.0, 2003.0 + counts.size), counts)
    print("counts:", counts.astype(int).tolist(), flush=True)
    rows = []
    for seed in args.seeds:
        for label, fam in (("coordinates", Linear(immigration=True)), ("own log scales", PlainLinear(immigration=True))):
            t0 = time.perf_counter()
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                r = fit_counts(data, fam, chains=4, draws=args.draws, tune=args.draws, seed=seed,
                               cores=args.cores, progressbar=False)
            wall = time.perf_counter() - t0

            s = az.summary(r.idata, var_names=["birth_rate", "death_rate", "immigration"], kind="diagnostics")
            sampling = float(r.timing.get("sampling", wall)) if isinstance(r.timing, dict) else wall
            rows.append({"seed": seed, "sampler space": label,
                         "divergences": int(r.idata.sample_stats["diverging"].sum()),
                         "min ess_bulk": float(s["ess_bulk"].min()), "min ess_tail": float(s["ess_tail"].min()),
                         "max r_hat": float(s["r_hat"].max()), "sampling s": round(sampling, 1),
                         "ess_bulk per s": round(float(s["ess_bulk"].min()) / sampling, 1),
                         "checks passed": bool(r.passed)})
            print(rows[-1], flush=True)
    df = pd.DataFrame(rows)
    print(df.to_string(index=False))
    tot = df.groupby("sampler space")[["divergences"]].sum()
    eps = df.groupby("sampler space")["ess_bulk per s"].median()
    print(tot.join(eps.rename("median ess_bulk per s")).to_string())


if __name__ == "__main__":
    main()
