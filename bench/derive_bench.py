"""Push-forward benchmark: posterior draws through the chain solvers.

Target (issue: push-forward): 4000 draws at N = 500 within 30 s on 2 cores. The baseline
is the dense textbook route on the same draws in the same process — scipy.linalg.expm of
the absorbing generator per horizon, scipy.linalg.eig for the quasi-stationary law,
scipy.linalg.solve for the mean time to extinction, null space for the stationary law —
timed on a subset and scaled to all draws.

Run:  .venv/bin/python bench/derive_bench.py [--draws 4000] [--cap 500] [--workers 2]
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import scipy.linalg as sl
import xarray as xr

from tallyfit.infer.criterion_e import horizons_with_criterion_e
from tallyfit.infer.pushforward import PushForwardSpec, push_forward
from tallyfit.infer.families import get_family
from tallyfit.infer.scenarios import BASELINE


def posterior(n: int, seed: int = 0) -> xr.Dataset:
    rng = np.random.default_rng(seed)
    v = {"birth_rate": rng.lognormal(np.log(0.9), 0.05, n), "death_rate": rng.lognormal(np.log(0.3), 0.08, n),
         "carrying_capacity": rng.lognormal(np.log(60), 0.05, n), "immigration": rng.lognormal(np.log(0.5), 0.2, n)}
    return xr.Dataset({k: (("chain", "draw"), a.reshape(4, n // 4)) for k, a in v.items()},
                      coords={"chain": range(4), "draw": range(n // 4)})


def _generator(b: np.ndarray, d: np.ndarray) -> np.ndarray:
    bb = b.copy()
    bb[-1] = 0.0  # the cap reflects
    q = np.diag(bb[:-1], 1) + np.diag(d[1:], -1)
    return q - np.diag(q.sum(axis=1))


def baseline_one(b: np.ndarray, d: np.ndarray, start: int, horizons: np.ndarray) -> tuple[float, np.ndarray]:
    """The dense route for one draw: null space, expm per horizon, eig, solve."""
    q = _generator(b, d)
    ns = sl.null_space(q.T)[:, 0]
    _ = ns / ns.sum()
    b0 = b.copy()
    b0[0] = 0.0  # extinction: 0 absorbing
    qa = _generator(b0, d)
    ext = np.array([sl.expm(qa * t)[start, 0] for t in horizons])
    qt = qa[1:, 1:]
    w, vl = sl.eig(qt, left=True, right=False)
    _ = vl[:, np.argmax(w.real)]
    mtte = sl.solve(-qt, np.ones(b.size - 1), assume_a="gen")[start - 1]
    return mtte, ext


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--draws", type=int, default=4000)
    ap.add_argument("--cap", type=int, default=500)
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--baseline-draws", type=int, default=4)
    args = ap.parse_args()
    fam = get_family("logistic", immigration=True)
    post = posterior(args.draws)
    spec = PushForwardSpec(cap=args.cap, sites=("site",), starts=(60,), horizons=horizons_with_criterion_e([5, 50], None))
    push_forward(fam, post.isel(draw=slice(0, 2)), spec, [BASELINE], workers=1)  # compile
    t0 = time.perf_counter()
    ds = push_forward(fam, post, spec, [BASELINE], workers=args.workers)
    ours = time.perf_counter() - t0
    sizes = np.arange(args.cap + 1)
    t0 = time.perf_counter()
    errs = []
    for i in range(args.baseline_draws):
        draw = {k: post[k].values.ravel()[i:i + 1] for k in post.data_vars}
        b, d = fam.numpy_rates(draw, sizes)
        _, ext = baseline_one(b[0], d[0], 60, np.asarray(spec.horizons))
        got = ds["extinction_probability"].values.reshape(-1, len(spec.horizons))[i]
        errs.append(np.max(np.abs(ext - got)))
    base = (time.perf_counter() - t0) / args.baseline_draws * args.draws
    print(f"{'quantity set':28s} {'draws':>6s} {'N':>5s} {'ours (s)':>10s} {'baseline (s)':>13s} {'ratio':>7s} {'max |Δ ext|':>12s}")
    print(f"{'all derived, 1 scenario':28s} {args.draws:6d} {args.cap:5d} {ours:10.1f} {base:13.1f} "
          f"{base / ours:7.1f} {max(errs):12.2e}")
    print(f"(baseline timed on {args.baseline_draws} draws and scaled; workers={args.workers}; "
          f"target: <= 30 s for 4000 draws at N = 500)")


if __name__ == "__main__":
    main()
