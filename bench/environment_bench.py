"""Benchmark the annual chain under environmental variation (chain.environment) against dense
scipy baselines, in one process.

Chains: the heron-fen-like chain λ_n = 0.9 n + 0.6, μ_n = n (0.3 + 0.6 n / 60) on 0..116,
and the same shape at larger caps, μ_n = n (0.3 + 0.6 n / K) with K = N / 1.93 (so that N
sits where it does for the heron fen). σ = 0.3, births scaled, Gauss–Hermite nodes 13.

Tables:
  1. one annual matrix P̄ = Σ_k ω_k exp(Q_k): ours (uniformization over 1/2^s year, s
     squarings, deficit tracked) vs scipy.linalg.expm of each node's generator, averaged;
     largest entry difference.
  2. the piece length REACH = Λτ: time of one P̄ for several values (the constant in
     chain/environment_kernels.py is the fastest).
  3. dense vs vectors, for what one posterior draw needs of the curves (one start, thresholds
     0 and 10, 100 years): building the two absorbing P̄ once and iterating vectors through
     them, against carrying the vector through each node's uniformization every year.
  4. one posterior draw (two starts, thresholds 0 and 10, 100 years; mean time to extinction;
     quasi-stationary and long-run laws), ours vs the same from expm-averaged matrices and
     scipy.linalg (solve, eig), and the hours for 4000 draws on 2 cores (draws in parallel,
     as the push-forward runs them). "Δ log mean" compares with the dense scipy solve, which
     loses all accuracy once the mean time nears 1/ε (cond(I − T) is about the mean time);
     "σ=0 check" is ours at σ = 0 against BirthDeathChain's closed-form mean time (logs).

Times are the best of a few repeats after a warm-up (numba compiles on first use). BLAS
threads: --threads (default 1, as in push-forward workers, one process per core; set before
numpy loads). Run: .venv/bin/python bench/environment_bench.py [--caps 116 300 500]
"""
from __future__ import annotations

import argparse
import os
import sys
import time
from pathlib import Path

ARGS = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
ARGS.add_argument("--caps", type=int, nargs="+", default=[116, 300, 500])
ARGS.add_argument("--nodes", type=int, nargs="+", default=[9, 13])
ARGS.add_argument("--threads", type=int, default=1)
ARGS.add_argument("--baseline-limit", type=int, default=300, help="skip expm baselines above this cap")
OPTS = ARGS.parse_args()
for _k in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ[_k] = str(OPTS.threads)

import numpy as np  # noqa: E402
from numba import njit  # noqa: E402
from scipy import linalg  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))

from tallyfit.chain import BirthDeathChain, EnvironmentalChain, environment_nodes  # noqa: E402
from tallyfit.chain.environment_kernels import POISSON_TAIL, annual_mixture  # noqa: E402
from tallyfit.chain.uniformization import (_poisson_extent, _poisson_weights, _step_forward,  # noqa: E402
                                           _window_steps)

SIGMA = 0.3
YEARS = np.arange(1, 101)
THRESHOLDS = (0, 10)


def rates(n_cap: int) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(n_cap + 1, dtype=float)
    k = 60.0 if n_cap == 116 else n_cap / 1.93
    return 0.9 * n + 0.6, n * (0.3 + 0.6 * n / k)


def best_time(fn, reps: int = 3):
    fn()
    best, out = np.inf, None
    for _ in range(reps):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def generator(birth: np.ndarray, death: np.ndarray) -> np.ndarray:
    up = birth.copy()
    up[-1] = 0.0
    q = np.diag(up[:-1], 1) + np.diag(death[1:], -1)
    return q - np.diag(q.sum(axis=1))


def expm_average(birth: np.ndarray, death: np.ndarray, nodes: int, threshold: int | None) -> np.ndarray:
    """Baseline P̄: scipy.linalg.expm of each node's generator, weighted."""
    _, w, bs, _ = environment_nodes(SIGMA, nodes)
    out = np.zeros((birth.size, birth.size))
    for wk, bk in zip(w, bs):
        b = birth[0] + (birth - birth[0]) * bk
        d = death.copy()
        if threshold is not None:
            b[: threshold + 1] = 0.0
            d[: threshold + 1] = 0.0
        out += wk * linalg.expm(generator(b, d))
    return out


def ours_matrix(birth, death, nodes, threshold, reach=None):
    from tallyfit.chain import environment_kernels as ek

    _, w, bs, ds = environment_nodes(SIGMA, nodes)
    lo = 0 if threshold is None else threshold
    n_abs = 0 if threshold is None else 1
    W = birth.size - lo
    P, dlt = np.empty((W, W)), np.empty(W)
    annual_mixture(birth, death, birth.size - 1, lo, birth.size - 1, n_abs, bs, ds, w,
                   ek.REACH if reach is None else reach, POISSON_TAIL, P, dlt)
    return P


@njit(cache=True)
def _vector_year(birth, death, N, lo, n_abs, bss, dss, om, v, tail):
    """v P̄ by uniformizing the vector through each node (absolute accuracy: left Poisson cut)."""
    W = N - lo + 1
    p, q, d = np.empty(W), np.empty(W), np.empty(W)
    out = np.zeros(W)
    a, b = np.empty(W), np.empty(W)
    for g in range(bss.shape[0]):
        Lam = _window_steps(birth, death, lo, N, N, p, q, d, bss[g], dss[g])
        for j in range(n_abs):
            p[j] = 0.0
            q[j] = 0.0
            d[j] = 1.0
        K, rb = _poisson_extent(Lam, tail)
        w = np.empty(K + 1)
        _poisson_weights(Lam, K, rb, w, True)
        a[:] = v
        for k in range(K + 1):
            if w[k] > 0.0:
                out += om[g] * w[k] * a
            if k < K:
                _step_forward(a, b, p, q, d, W)
                a, b = b, a
    return out


def curves_by_vectors(birth, death, nodes, start):
    _, w, bs, ds = environment_nodes(SIGMA, nodes)
    N = birth.size - 1
    res = []
    for k in THRESHOLDS:
        v = np.zeros(N - k + 1)
        v[start - k] = 1.0
        out = np.empty(YEARS.size)
        for y in range(YEARS.size):
            v = _vector_year(birth, death, N, k, 1, bs, ds, w, v, 1e-13)
            out[y] = v[0]
        res.append(out)
    return np.array(res)


def draw_ours(birth, death, nodes, starts):
    c = EnvironmentalChain(birth, death, SIGMA, nodes=nodes)
    cv = c.extinction_curves(starts, YEARS, THRESHOLDS)
    return cv, c.mean_time_to_extinction(starts), c.quasi_stationary(), c.long_run()


def draw_baseline(birth, death, nodes, starts):
    out = {}
    for k in THRESHOLDS:
        P = expm_average(birth, death, nodes, k)
        V = np.zeros((len(starts), P.shape[0]))
        V[np.arange(len(starts)), starts] = 1.0
        curve = []
        for _ in YEARS:
            V = V @ P
            curve.append(V[:, k])
        out[k] = np.array(curve).T
        if k == 0:
            T = P[1:, 1:]
            out["mean"] = linalg.solve(np.eye(T.shape[0]) - T, np.ones(T.shape[0]))[np.asarray(starts) - 1] - 0.5
            vals, left = linalg.eig(T, left=True, right=False)
            i = int(np.argmax(vals.real))
            x = np.abs(left[:, i].real)
            out["quasi"] = x / x.sum()
    P = expm_average(birth, death, nodes, None)
    a = P.T - np.eye(P.shape[0])
    a[-1, :] = 1.0
    rhs = np.zeros(P.shape[0])
    rhs[-1] = 1.0
    out["long_run"] = linalg.solve(a, rhs)
    return out


def main() -> None:
    print(f"BLAS threads {OPTS.threads}; σ = {SIGMA}; heron-fen-like chains\n")
    b, d = rates(116)
    print("1. one annual matrix P̄ (N = 116)")
    print(f"{'nodes':>6} {'ours ms':>9} {'expm ms':>9} {'ratio':>7} {'max |diff|':>11}")
    for nodes in OPTS.nodes:
        t_o, P_o = best_time(lambda: ours_matrix(b, d, nodes, None))
        t_b, P_b = best_time(lambda: expm_average(b, d, nodes, None), reps=2)
        print(f"{nodes:>6} {t_o * 1e3:9.2f} {t_b * 1e3:9.2f} {t_b / t_o:7.1f} {np.abs(P_o - P_b).max():11.1e}")

    print("\n2. piece length REACH = Λτ (N = 116, 13 nodes, one P̄)")
    print(f"{'reach':>6} {'ms':>9}")
    for reach in (1.0, 2.0, 4.0, 8.0, 16.0):
        t, _ = best_time(lambda: ours_matrix(b, d, 13, None, reach))
        print(f"{reach:6.0f} {t * 1e3:9.2f}")

    print("\n3. curves of one draw, one start (40), thresholds 0 and 10, 100 years (N = 116, 13 nodes)")
    c_dense = lambda: EnvironmentalChain(b, d, SIGMA).extinction_curves([40], YEARS, THRESHOLDS)  # noqa: E731
    t_d, dense = best_time(c_dense)
    t_v, vec = best_time(lambda: curves_by_vectors(b, d, 13, 40), reps=1)
    diff = np.abs(dense.probability[:, 0] - vec).max()
    print(f"dense (build 2 P̄, iterate) {t_d * 1e3:8.1f} ms;  vectors (per node, per year) {t_v * 1e3:8.1f} ms;"
          f"  ratio {t_v / t_d:5.1f};  max |diff| {diff:.1e}")

    print("\n4. one posterior draw: curves (2 starts × thresholds 0, 10 × 100 years), mean time, "
          "quasi-stationary, long run")
    print(f"{'N':>5} {'nodes':>6} {'ours ms':>9} {'baseline ms':>12} {'ratio':>7} {'4000 draws, 2 cores':>20}"
          f" {'max |Δ curve|':>14} {'Δ log mean':>11} {'σ=0 check':>10} {'mean time (y)':>14}")
    for N in OPTS.caps:
        b, d = rates(N)
        starts = [N // 3, N // 2]
        plain = EnvironmentalChain(b, d, 0.0).mean_time_to_extinction(starts).mean
        closed = BirthDeathChain(np.where(np.arange(N + 1) == 0, 0.0, b), d).mean_time_to_extinction(
            np.array(starts), log=True)
        check = np.abs(np.log(plain) - closed).max()
        for nodes in OPTS.nodes:
            t_o, (cv, mt, qs, lr) = best_time(lambda: draw_ours(b, d, nodes, starts))
            base = ""
            if N <= OPTS.baseline_limit:
                t_b, ref = best_time(lambda: draw_baseline(b, d, nodes, starts), reps=1)
                dc = max(np.abs(cv.probability[j] - ref[k]).max() for j, k in enumerate(THRESHOLDS))
                dm = np.abs(np.log(mt.mean) - np.log(ref["mean"])).max()
                base = f"{t_b * 1e3:12.1f} {t_b / t_o:7.1f}"
                tail = f" {dc:14.1e} {dm:11.1e}"
            else:
                base, tail = f"{'skipped':>12} {'':>7}", f" {'':>14} {'':>11}"
            hours = 4000 * t_o / 2 / 3600
            print(f"{N:5d} {nodes:6d} {t_o * 1e3:9.1f} {base} {hours:17.2f} h{tail} {check:10.1e}"
                  f" {mt.mean[0]:14.3e}")


if __name__ == "__main__":
    main()
