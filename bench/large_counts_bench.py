"""Counts in the thousands: likelihood cost against the size, and a whole fit of a 100-year series.

Part 1 (scaling): logistic rates λ_n = 0.5 n + 1, μ_n = n (0.2 + 0.3 n / K) for K from 100
to 10 000; 30 annual counts simulated at K by the Gillespie simulator below (written here,
not tallyfit's); the cap chosen by the tool's rule from the largest count. One
log-likelihood-and-gradient call is timed (median of repeats after a warm-up call),
and the slope of log time against log K is printed: the cost's scaling in N.

Part 2 (whole fit): a 100-year series of a colony around K = 3000 with good and bad years
(births × exp(ε − σ²/2), ε ~ Normal(0, σ²) drawn each year, σ = 0.35), simulated by the same
simulator, fitted by ``tallyfit fit`` as a user would (logistic, good and bad years, the cap
chosen by the tool). Printed: wall time, peak memory of the process tree, the exit code,
and whether each true value lies in its 90% interval. ``--plain`` fits without good and
bad years instead (a cheaper fit; σ is then not estimated).

Run:  .venv/bin/python bench/large_counts_bench.py [--part scaling|fit|both] [--draws 300] [--plain]
"""
from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tallyfit.infer.likelihood import log_likelihood_grad  # noqa: E402

B, D = 0.5, 0.2


def gillespie(K: float, start: int, years: int, rng: np.random.Generator, sigma: float = 0.0,
              immigration: float = 1.0) -> np.ndarray:
    """Exact simulation (Gillespie 1977) of births B·n·e^(ε−σ²/2) + ι and deaths n(D + (B − D)n/K), one ε per year."""
    n, out = start, [start]
    for _ in range(1, years):
        eps = rng.normal(0.0, sigma) if sigma > 0 else 0.0
        f = math.exp(eps - sigma ** 2 / 2)
        t = 0.0
        while True:
            up = B * f * n + immigration
            down = n * (D + (B - D) * n / K)
            total = up + down
            t += rng.exponential(1 / total)
            if t > 1.0:
                break
            n += 1 if rng.random() < up / total else -1
        out.append(n)
    return np.array(out)


def tool_cap(largest: int) -> int:
    """The tool's default cap rule (fit settings 'cap_rule'): ceil(max(M + 3√M + 15, 1.2 M))."""
    return int(math.ceil(max(largest + 3 * math.sqrt(largest) + 15, 1.2 * largest)))


def scaling(repeats: int = 3) -> None:
    rng = np.random.default_rng(5)
    rows = []
    for K in (100, 300, 1000, 3000, 10000):
        counts = gillespie(K, K, 30, rng)
        N = tool_cap(int(counts.max()))
        n = np.arange(N + 1, dtype=float)
        lam, mu = B * n + 1.0, n * (D + (B - D) * n / K)
        lam[N] = 0.0
        times = np.arange(counts.size, dtype=float)
        t0 = time.perf_counter()
        ll, gb, gd = log_likelihood_grad(times, counts, lam, mu)
        first = time.perf_counter() - t0
        ts = []
        for _ in range(repeats):
            t0 = time.perf_counter()
            log_likelihood_grad(times, counts, lam, mu)
            ts.append(time.perf_counter() - t0)
        rows.append({"K": K, "cap N": N, "largest count": int(counts.max()), "ll": round(float(ll), 2),
                     "finite gradient": bool(np.all(np.isfinite(gb)) and np.all(np.isfinite(gd))),
                     "first call s": round(first, 3), "ms per ll+grad": round(1000 * float(np.median(ts)), 2)})
    table = pd.DataFrame(rows)
    print(table.to_string(index=False))
    slope = np.polyfit(np.log(table["K"]), np.log(table["ms per ll+grad"]), 1)[0]
    print(f"cost ~ N^{slope:.2f} over K = 100..10000 (30 annual transitions)")


def whole_fit(draws: int, plain: bool) -> None:
    rng = np.random.default_rng(21)
    K, sigma = 3000.0, 0.35
    counts = gillespie(K, 400, 100, rng, sigma=0.0 if plain else sigma)
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "headland_colony.csv"
        pd.DataFrame({"time": np.arange(1921, 1921 + counts.size), "count": counts}).to_csv(path, index=False)
        out = Path(tmp) / "run"
        cmd = [sys.executable, "-m", "tallyfit.cli", "--quiet", "fit", str(path), "--rates", "logistic",
               "--out", str(out), "--chains", "2", "--draws", str(draws), "--tune", str(draws), "--seed", "2"]
        if not plain:
            cmd += ["--varying-years", "births"]
        print(f"counts: {counts.min()}..{counts.max()}, largest one-year ratio "
              f"{np.max(counts[1:] / np.maximum(counts[:-1], 1)):.2f}; running: {' '.join(cmd[2:])}", flush=True)
        t0 = time.perf_counter()
        proc = subprocess.Popen(cmd, env={**os.environ, "PYTHONPATH": str(ROOT)}, stderr=subprocess.PIPE, text=True)
        peak = 0
        ps = psutil.Process(proc.pid)
        while proc.poll() is None:
            try:
                rss = ps.memory_info().rss + sum(c.memory_info().rss for c in ps.children(recursive=True))
                peak = max(peak, rss)
            except psutil.Error:
                pass
            time.sleep(0.5)
        wall = time.perf_counter() - t0
        err = proc.stderr.read() if proc.stderr else ""
        print(f"exit {proc.returncode}; wall {wall / 60:.1f} min; peak memory {peak / 2 ** 30:.2f} GiB")
        if err.strip():
            print("stderr:", err.strip()[-2000:])
        if (out / "summary.json").is_file():
            params = json.loads((out / "summary.json").read_text())["parameters"]
            truth = {"birth_rate": B, "death_rate": D, "carrying_capacity": K}
            if not plain:
                truth["year_to_year_sd"] = sigma
            for name, value in truth.items():
                p = next((v for k, v in params.items() if k.startswith(name)), None)
                if p is None:
                    print(f"{name}: not in the summary")
                    continue
                inside = p["q_lo"] <= value <= p["q_hi"]
                print(f"{name}: truth {value:g}, posterior mean {p['mean']:.4g}, 90% interval "
                      f"{p['q_lo']:.4g}..{p['q_hi']:.4g} -> {'recovered' if inside else 'NOT recovered'}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--part", choices=["scaling", "fit", "both"], default="both")
    ap.add_argument("--draws", type=int, default=300)
    ap.add_argument("--plain", action="store_true", help="fit without good and bad years")
    args = ap.parse_args()
    if args.part in ("scaling", "both"):
        scaling()
    if args.part in ("fit", "both"):
        whole_fit(args.draws, args.plain)


if __name__ == "__main__":
    main()
