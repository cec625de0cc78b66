"""Time per log-likelihood + gradient: the obvious PyTensor model against ours, one process.

Baseline: the hand-written PyMC/PyTensor model — the full (N+1)×(N+1) generator built
from rate tensors, PyTensor's matrix exponential (one per distinct interval length),
log of the needed entries (or, with detection, the dense forward algorithm over all
sizes 0..N), and pytensor.grad for the gradient, compiled once with pytensor.function.
Ours: infer.likelihood.op.CountLikelihoodOp compiled the same way (value and gradient).

Chain: λ_n = 0.6 n + 0.5, μ_n = n (0.3 + 0.3 n / K) with K = 0.4 N; data simulated
exactly from the chain (chain.BirthDeathChain.simulate) at yearly censuses from K.
Modes: exact counts, and detection (p = 0.7, 3 replicate surveys, p estimated).

Run: .venv/bin/python bench/likelihood_bench.py [--quick]
"""
from __future__ import annotations

import argparse
import os
import sys
import time

# One BLAS thread unless told otherwise: on a 2-core machine shared with other work,
# multi-threaded BLAS made the baseline's eigen-decompositions ~50x slower when we
# measured, so this gives the baseline its best setting. Must be set before numpy loads.
for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import numpy as np  # noqa: E402
import pytensor  # noqa: E402
import pytensor.tensor as pt  # noqa: E402
from scipy.special import gammaln  # noqa: E402

sys.path.insert(0, os.path.join(os.path.dirname(__file__), ".."))

from tallyfit.chain import BirthDeathChain  # noqa: E402
from tallyfit.infer.likelihood.op import CountLikelihoodOp  # noqa: E402

try:  # whichever exists in this PyTensor
    from pytensor.tensor.linalg import expm  # type: ignore[attr-defined]
except ImportError:  # pragma: no cover
    from pytensor.tensor.slinalg import expm

P_DETECT = 0.7
REPLICATES = 3
BASELINE_LIMIT = 30.0  # seconds for one call; beyond that the baseline is skipped


def rates(N: int) -> tuple[np.ndarray, np.ndarray]:
    n = np.arange(N + 1, dtype=float)
    K = 0.4 * N
    return 0.6 * n + 0.5, n * (0.3 + 0.3 * n / K)


def simulate(N: int, T: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    b, d = rates(N)
    times = np.arange(T + 1, dtype=float)
    path = BirthDeathChain(b, d).simulate(int(0.4 * N), times, n_paths=1, seed=seed)[0]
    rng = np.random.default_rng(seed + 1)
    reps = rng.binomial(path[:, None], P_DETECT, size=(T + 1, REPLICATES)).astype(float)
    return times, path.astype(float), reps


def generator_tensor(bv, dv, N: int):
    lam = pt.set_subtensor(bv[N], 0.0)  # the cap reflects
    idx = np.arange(N + 1)
    Q = pt.zeros((N + 1, N + 1))
    Q = pt.set_subtensor(Q[idx[:-1], idx[1:]], lam[:-1])
    Q = pt.set_subtensor(Q[idx[1:], idx[:-1]], dv[1:])
    Q = pt.set_subtensor(Q[idx, idx], -(lam + dv))
    return Q


def baseline_exact(N: int, times: np.ndarray, counts: np.ndarray):
    bv, dv = pt.dvectors("b", "d")
    Q = generator_tensor(bv, dv, N)
    dts = np.diff(times)
    m, n = counts[:-1].astype(int), counts[1:].astype(int)
    ll = 0.0
    for dt in np.unique(dts):
        sel = dts == dt
        P = expm(Q * dt)
        ll = ll + pt.sum(pt.log(P[m[sel], n[sel]]))
    gb, gd = pytensor.grad(ll, [bv, dv])
    f = pytensor.function([bv, dv], [ll, gb, gd])
    return lambda b, d: f(b, d)


def baseline_detection(N: int, times: np.ndarray, reps: np.ndarray):
    bv, dv = pt.dvectors("b", "d")
    pv = pt.dscalar("p")
    Q = generator_tensor(bv, dv, N)
    dts = np.diff(times)
    Ps = {dt: expm(Q * dt) for dt in np.unique(dts)}
    sizes = np.arange(N + 1, dtype=float)
    ll = 0.0
    v = None
    for i in range(times.size):
        y = reps[i]
        lc = np.zeros(N + 1)
        for yy in y:
            ok = sizes >= yy
            term = np.full(N + 1, -1e4)  # exp underflows to 0 below the count
            term[ok] = gammaln(sizes[ok] + 1) - gammaln(yy + 1) - gammaln(sizes[ok] - yy + 1)
            lc = lc + term
        S, R = float(y.sum()), float(y.size)
        e = pt.exp(lc + S * pt.log(pv) + (R * sizes - S) * pt.log1p(-pv))
        if v is None:
            v = e / pt.sum(e)  # uniform prior over 0..N given the first counts
            continue
        v = pt.dot(v, Ps[dts[i - 1]]) * e
        s = pt.sum(v)
        ll = ll + pt.log(s)
        v = v / s
    gb, gd, gp = pytensor.grad(ll, [bv, dv, pv])
    f = pytensor.function([bv, dv, pv], [ll, gb, gd, gp])
    return lambda b, d: f(b, d, P_DETECT)


def ours(times: np.ndarray, counts: np.ndarray, detection: bool):
    bv, dv = pt.dvectors("b", "d")
    if detection:
        pv = pt.dscalar("p")
        op = CountLikelihoodOp((times, counts), detection="estimate")
        ll = op(bv, dv, pv)
        f = pytensor.function([bv, dv, pv], [ll, *pytensor.grad(ll, [bv, dv, pv])])
        return (lambda b, d: f(b, d, P_DETECT)), op
    op = CountLikelihoodOp((times, counts))
    ll = op(bv, dv)
    f = pytensor.function([bv, dv], [ll, *pytensor.grad(ll, [bv, dv])])
    return (lambda b, d: f(b, d)), op


def time_calls(fn, b, d, min_total: float = 1.0, max_calls: int = 50, first=None):
    """Seconds per call; the rates are nudged each call so no cache can answer."""
    out = first if first is not None else fn(b, d)  # warm up (and first value)
    calls, t0 = 0, time.perf_counter()
    while True:
        s = 1.0 + 1e-9 * (calls + 1)
        fn(b * s, d * s)
        calls += 1
        el = time.perf_counter() - t0
        if el >= min_total or calls >= max_calls:
            return el / calls, out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="N = 100, 300 and T = 10, 30 only")
    args = ap.parse_args()
    Ns = [100, 300] if args.quick else [100, 300, 1000]
    Ts = [10, 30] if args.quick else [10, 30, 100]
    print(f"pytensor {pytensor.__version__}; cores: {os.cpu_count()}; "
          f"OPENBLAS_NUM_THREADS={os.environ.get('OPENBLAS_NUM_THREADS')}; "
          f"load average {os.getloadavg()[0]:.1f}")
    hdr = (f"{'N':>5} {'T':>4} {'mode':>9} {'baseline s':>11} {'ours s':>10} {'ratio':>8} "
           f"{'|ll diff|':>10} {'bound':>9} {'steps':>8}")
    print(hdr)
    print("-" * len(hdr))
    base_slow: dict[tuple[int, str], bool] = {}
    for N in Ns:
        b, d = rates(N)
        for T in Ts:
            times, path, reps = simulate(N, T, seed=N + T)
            for mode in ("exact", "detection"):
                det = mode == "detection"
                data = reps if det else path
                f_ours, op = ours(times, data, det)
                t_ours, out_o = time_calls(f_ours, b, d)
                res = op.last_result()
                if base_slow.get((N, mode)):
                    print(f"{N:>5} {T:>4} {mode:>9} {'skipped (too slow)':>22} {t_ours:>10.2e}"
                          f" {'':>8} {'':>10} {res.error_bound:>9.1e} {res.steps:>8}")
                    continue
                f_base = baseline_detection(N, times, reps) if det else baseline_exact(N, times, path)
                t0 = time.perf_counter()
                out_b = f_base(b, d)
                first_call = time.perf_counter() - t0
                if first_call > BASELINE_LIMIT:
                    base_slow[(N, mode)] = True
                    print(f"{N:>5} {T:>4} {mode:>9} {'skipped (too slow: %.0f s)' % first_call:>22}"
                          f" {t_ours:>10.2e} {'':>8} {abs(float(out_b[0]) - float(out_o[0])):>10.1e}"
                          f" {res.error_bound:>9.1e} {res.steps:>8}")
                    continue
                min_total = 1.0 if first_call < 1.0 else 0.0
                t_base, _ = time_calls(f_base, b, d, min_total=min_total,
                                       max_calls=20 if first_call < 1.0 else 2, first=out_b)
                diff = abs(float(out_b[0]) - float(out_o[0]))
                print(f"{N:>5} {T:>4} {mode:>9} {t_base:>11.3e} {t_ours:>10.2e} "
                      f"{t_base / t_ours:>8.1f} {diff:>10.1e} {res.error_bound:>9.1e} {res.steps:>8}",
                      flush=True)
    print("\nbaseline: one PyTensor expm per distinct interval length (all intervals are 1 here), "
          "so its time barely depends on T;\nours: cost ~ Σ over intervals of (steps × window "
          "width), independent of N once the window fits. steps = B-steps per evaluation.")


if __name__ == "__main__":
    main()
