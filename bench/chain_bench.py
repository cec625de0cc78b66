"""Benchmark the chain solvers against dense linear-algebra baselines, in one run.

For caps N = 100, 300, 1000, 3000 and a logistic-type chain with immigration

    λ_n = 0.5 n + 1,   μ_n = n (0.2 + 0.3 n / (0.4 N))      (carrying capacity 0.4 N)

it times, for tallyfit and for a baseline built from scipy.linalg:

  stationary         ours: BirthDeathChain.stationary()
                     baseline: scipy.linalg.solve of π Q = 0 with Σ π = 1
  extinction curve   20 horizons t = 5, 10, ..., 100 from size 10, immigration off (0 absorbs)
                     ours: extinction_curve(10, times)
                     baseline: one scipy.linalg.expm(5 Q) and 20 vector–matrix products
  mean time          immigration off; ours: mean_time_to_extinction() (log form, compared in logs)
                     baseline: scipy.linalg.solve(−Q_T, 1) on sizes 1..N
  transition rows    5 start sizes, dt = 1; ours: transition(1.0, starts)
                     baseline: scipy.linalg.expm(Q)[starts]

and prints: quantity, N, ours (s), baseline (s), ratio baseline/ours, and the largest
difference between the two (absolute for probabilities; for mean times the largest
difference of natural logs, i.e. ~ relative error, over sizes where the baseline is finite
and positive; both are also compared with the closed form evaluated in mpmath).

Run: .venv/bin/python bench/chain_bench.py [--caps 100 300 ...] [--baseline-limit 60]
Baselines run in a child process; one that takes longer than --baseline-limit seconds is
stopped and it and the remaining baselines for that N are marked skipped. Times are the
best of a few repeats after one warm-up call (numba compiles on first use; the warm-up
time is printed separately).
"""
from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

import numpy as np
from scipy import linalg

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tallyfit.chain import BirthDeathChain  # noqa: E402


def rates(n_cap: int, immigration: float = 1.0) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(n_cap + 1, dtype=float)
    return 0.5 * n + immigration, n * (0.2 + 0.3 * n / (0.4 * n_cap))


def generator(birth: np.ndarray, death: np.ndarray) -> np.ndarray:
    birth = birth.copy()
    birth[-1] = 0.0
    q = np.diag(birth[:-1], 1) + np.diag(death[1:], -1)
    q -= np.diag(q.sum(axis=1))
    return q


def best_time(fn, min_total: float = 0.3, max_reps: int = 5):
    """(best wall time over repeats, last result)."""
    best = np.inf
    total = 0.0
    reps = 0
    out = None
    while reps < max_reps and (reps == 0 or total < min_total):
        t0 = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t0
        best = min(best, dt)
        total += dt
        reps += 1
    return best, out


# ------------------------------------------------------------------- baselines
def base_stationary(q: np.ndarray) -> np.ndarray:
    a = q.T.copy()
    a[-1, :] = 1.0
    rhs = np.zeros(q.shape[0])
    rhs[-1] = 1.0
    return linalg.solve(a, rhs)


def base_extinction_curve(q0: np.ndarray, start: int, step: float, n_times: int) -> np.ndarray:
    e = linalg.expm(q0 * step)
    v = np.zeros(q0.shape[0])
    v[start] = 1.0
    out = np.empty(n_times)
    for k in range(n_times):
        v = v @ e
        out[k] = v[0]
    return out


def base_mean_time(q0: np.ndarray) -> np.ndarray:
    import warnings

    with np.errstate(all="ignore"), warnings.catch_warnings():
        warnings.simplefilter("ignore", linalg.LinAlgWarning)
        return linalg.solve(-q0[1:, 1:], np.ones(q0.shape[0] - 1))


def base_rows(q: np.ndarray, starts: np.ndarray, dt: float) -> np.ndarray:
    return linalg.expm(q * dt)[starts]


def mp_log_mean_time(birth: np.ndarray, death: np.ndarray, dps: int = 40) -> np.ndarray:
    """Closed-form mean time to extinction in mpmath, as natural logs (index 0 -> -inf).

    Allen (2010) An Introduction to Stochastic Processes with Applications to Biology, 2nd ed.,
    ch. 6: τ_n = Σ_{s=1..n} [(μ_1⋯μ_{s−1})/(λ_1⋯λ_{s−1})] Σ_{i=s..N} θ_i,
    θ_i = (λ_1⋯λ_{i−1})/(μ_1⋯μ_i); O(N) with running products and suffix sums.
    """
    import mpmath

    with mpmath.workdps(dps):
        n_cap = len(birth) - 1
        lam = [mpmath.mpf(float(x)) for x in birth]
        mu = [mpmath.mpf(float(x)) for x in death]
        theta = [mpmath.mpf(0)] * (n_cap + 1)
        prod = mpmath.mpf(1)  # λ_1⋯λ_{i−1} / (μ_1⋯μ_{i−1})
        for i in range(1, n_cap + 1):
            theta[i] = prod / mu[i]
            prod *= lam[i] / mu[i]  # λ_N = 0 (the cap reflects) only zeroes the unused last factor
        suffix = [mpmath.mpf(0)] * (n_cap + 2)
        for i in range(n_cap, 0, -1):
            suffix[i] = suffix[i + 1] + theta[i]
        out = [float("-inf")]
        tau = mpmath.mpf(0)
        ratio = mpmath.mpf(1)  # (μ_1⋯μ_{s−1}) / (λ_1⋯λ_{s−1})
        for s_ in range(1, n_cap + 1):
            tau += ratio * suffix[s_]
            out.append(float(mpmath.log(tau)))
            if s_ < n_cap:
                ratio *= mu[s_] / lam[s_]
        return np.array(out)


BASELINES = ("stationary", "extinction curve (20 t)", "mean time to extinction", "transition rows (5, dt=1)")


def _baseline_worker(n_cap: int, start: int, step: float, n_times: int, starts: list[int], out) -> None:
    """Child process: run the four baselines for one cap, posting (name, seconds, result) each."""
    birth, death = rates(n_cap)
    birth0, _ = rates(n_cap, immigration=0.0)
    q = generator(birth, death)
    q0 = generator(birth0, death)
    jobs = (lambda: base_stationary(q),
            lambda: base_extinction_curve(q0, start, step, n_times),
            lambda: base_mean_time(q0),
            lambda: base_rows(q, np.asarray(starts), 1.0))
    for name, job in zip(BASELINES, jobs):
        t, res = best_time(job, max_reps=2)
        out.put((name, t, res))


def baselines(n_cap: int, start: int, step: float, n_times: int, starts: np.ndarray,
              limit: float, threads: int = 1) -> dict:
    """{name: (seconds, result)} for the baselines that finished within ``limit`` seconds each.

    They run in a child process (spawned, so BLAS threads start clean) which is terminated
    when one baseline passes the limit; that one and the rest are then reported as skipped.
    ``threads`` BLAS threads are given to the child (set before it imports numpy).
    """
    import multiprocessing as mp
    import os
    import queue

    ctx = mp.get_context("spawn")
    out = ctx.Queue()
    proc = ctx.Process(target=_baseline_worker, args=(n_cap, start, step, n_times, starts.tolist(), out))
    saved = {k: os.environ.get(k) for k in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS")}
    for k in saved:
        os.environ[k] = str(threads)
    try:
        proc.start()
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v
    got: dict = {}
    try:
        for k in range(len(BASELINES)):
            # the first wait also covers the child's start-up (imports), which is not timed
            try:
                name, t, res = out.get(timeout=limit * (2 if k == 0 else 1) + (30 if k == 0 else 0))
            except queue.Empty:
                break
            got[name] = (t, res)
    finally:
        if proc.is_alive():
            proc.terminate()  # our own child, by its handle
        proc.join()
    return got


# ----------------------------------------------------------------------- bench
def run(caps: list[int], limit: float, threads: int = 1) -> list[tuple]:
    rows = []
    start, step, n_times = 10, 5.0, 20
    times = step * np.arange(1, n_times + 1)
    for n_cap in caps:
        birth, death = rates(n_cap)
        birth0, _ = rates(n_cap, immigration=0.0)
        chain = BirthDeathChain(birth, death)
        chain0 = BirthDeathChain(birth0, death)
        starts = np.linspace(1, n_cap, 5).round().astype(int)

        # warm-up (numba compilation on first use)
        t0 = time.perf_counter()
        chain.transition(0.1, starts=starts[:1])
        chain0.extinction_curve(start, times[:1])
        warm = time.perf_counter() - t0

        ours = {
            BASELINES[0]: best_time(chain.stationary),
            BASELINES[1]: best_time(lambda: chain0.extinction_curve(start, times)),
            BASELINES[2]: best_time(lambda: chain0.mean_time_to_extinction(log=True)),
            BASELINES[3]: best_time(lambda: chain.transition(1.0, starts=starts)),
        }
        base = baselines(n_cap, start, step, n_times, starts, limit, threads)

        # mean times reach e^{0.39 K}: compare in logs, and compare both with the closed form
        # evaluated in mpmath (Allen 2010 ch. 6)
        b0 = birth0.copy()
        b0[-1] = 0.0
        exact = mp_log_mean_time(b0, death)

        for name in BASELINES:
            t_ours, mine = ours[name]
            t_base, ref = base.get(name, (None, None))
            if name == BASELINES[2]:
                vs_exact = f"ours vs mpmath {np.abs(mine[1:] - exact[1:]).max():.1e}"
                if ref is None:
                    err = f"skipped (> {limit:.0f} s); {vs_exact}"
                else:
                    ok = np.isfinite(ref) & (ref > 0)
                    if ok.any():
                        d = np.abs(mine[1:][ok] - np.log(ref[ok])).max()
                        e = np.abs(exact[1:][ok] - np.log(ref[ok])).max()
                        err = f"{d:.2e} log; baseline vs mpmath {e:.1e}; {vs_exact}"
                    else:
                        err = f"baseline solve failed ({(~ok).sum()} sizes <= 0 or inf); {vs_exact}"
                    if ok.any() and not ok.all():
                        err += f"; {(~ok).sum()} baseline sizes <= 0 or inf"
            elif ref is None:
                err = f"skipped (> {limit:.0f} s)"
            elif name == BASELINES[0]:
                err = f"{np.abs(mine.pmf - ref).max():.2e}"
            elif name == BASELINES[1]:
                err = f"{np.abs(mine.probability - ref).max():.2e}"
            else:
                err = f"{np.abs(mine - ref).max():.2e}"
            rows.append((name, n_cap, t_ours, t_base, err))
        print(f"# N={n_cap}: first-call warm-up {warm:.2f} s; max total rate "
              f"{np.max(birth[:-1] + death[:-1]):.0f}", file=sys.stderr, flush=True)
    return rows


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--caps", type=int, nargs="+", default=[100, 300, 1000, 3000])
    ap.add_argument("--baseline-limit", type=float, default=60.0,
                    help="skip a baseline that takes longer than this (seconds, per baseline call)")
    ap.add_argument("--baseline-threads", type=int, default=1,
                    help="BLAS threads for the baselines (default 1: ours is single-threaded, and on a "
                         "loaded 2-core machine 2 BLAS threads were up to 10x slower than 1)")
    args = ap.parse_args(argv)
    rows = run(args.caps, args.baseline_limit, args.baseline_threads)
    head = f"{'quantity':<26} {'N':>5} {'ours (s)':>10} {'baseline (s)':>13} {'ratio':>8}  max error"
    print(head)
    print("-" * len(head))
    for name, n_cap, t_ours, t_base, err in rows:
        base = f"{t_base:13.4f}" if t_base is not None else f"{'—':>13}"
        ratio = f"{t_base / t_ours:8.1f}" if t_base is not None else f"{'—':>8}"
        print(f"{name:<26} {n_cap:>5} {t_ours:10.4f} {base} {ratio}  {err}")
    print(f"\nbaselines: scipy.linalg with {args.baseline_threads} BLAS thread(s); ours single-threaded.")
    print("ratio = baseline / ours; max error = largest |ours − baseline| (probabilities) or "
          "largest |log ours − log baseline| (mean times).")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
