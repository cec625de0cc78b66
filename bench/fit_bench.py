"""Fit benchmark: wall time, ESS per second and gradient evaluations per demo data set.

For each bundled demo data set (example_counts/*.csv; family, immigration and detection
from its TOML: immigration when the true rate is non-zero, detection estimated when
there are replicate surveys) the full fit runs — 4 chains × 1000 draws after 1000
warm-up draws, on 2 cores — and the table shows:

* wall time of the whole fit and of the NUTS sampling alone;
* gradient evaluations: leapfrog steps summed over the kept draws (sample_stats
  n_steps), and over warm-up too (every step is one likelihood-and-gradient sweep);
* ESS per second: the smallest bulk ESS over the summarised parameters divided by the
  sampling wall time (and the same for tail ESS);
* seconds per gradient evaluation per core (sampling time × cores / all steps);
* whether the diagnostics passed, and the cap check.

Baseline (DEVELOPERS.md: a ratio against a baseline run in the same process): the same
fit of the first data set with PyMC's default sampler settings (diagonal mass matrix,
"jitter+adapt_diag", target acceptance 0.8) instead of tallyfit's (dense mass matrix,
0.95); the ratio of ESS per second and the divergences are printed. Skip it with
--no-baseline.

The issue's target: the single-site logistic demo (heron_fen) finishes 4 × 1000 draws in
under 2 minutes on 2 cores.

Run:  .venv/bin/python bench/fit_bench.py [--sets heron_fen ...] [--draws 1000] [--no-baseline]
"""
from __future__ import annotations

import argparse
import sys
import time
import tomllib
import warnings
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tallyfit.inputs.counts_csv import load_counts  # noqa: E402
from tallyfit.infer.diagnostics import diagnose  # noqa: E402
from tallyfit.infer.families import get_family  # noqa: E402

EXAMPLES = ROOT / "example_counts"


def demo_settings(name: str) -> dict:
    """Family, options and detection for a demo data set, from its TOML.

    Args:
        name: data set name (file stem in example_counts/).

    Returns:
        dict with family (a RateFamily), detection, truth (true rates) and data.
    """
    with open(EXAMPLES / f"{name}.toml", "rb") as fh:
        meta = tomllib.load(fh)
    truth = meta["true_rates"]
    family = get_family(meta["family"], immigration=truth.get("immigration", 0.0) > 0)
    data = load_counts(EXAMPLES / f"{name}.csv")
    detection = None if float(meta.get("detection", 1.0)) == 1.0 else (
        "estimate" if data.has_replicates else float(meta["detection"]))
    return {"family": family, "detection": detection, "truth": truth, "data": data}


def run_one(name: str, *, chains: int, draws: int, tune: int, cores: int, seed: int,
            init: str | None = None, target_accept: float | None = None) -> dict:
    """Fit one demo data set and collect the figures for the table.

    Args:
        name: data set name.
        chains, draws, tune, cores, seed: sampling settings.
        init: PyMC initialisation (None: tallyfit's default, dense mass matrix).
        target_accept: NUTS target acceptance (with ``init``; None: tallyfit's default).

    Returns:
        dict of figures (see the module docstring).
    """
    import arviz as az

    from tallyfit.infer import fit as fitmod
    from tallyfit.infer.model import build_count_model
    from tallyfit.infer.sampling import sample_model

    s = demo_settings(name)
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        if init is None:
            r = fitmod.fit_counts(s["data"], s["family"], chains=chains, draws=draws, tune=tune,
                                  seed=seed, detection=s["detection"], cores=cores,
                                  progressbar=False)
            idata, var_names, sampling = r.idata, r.model.var_names, r.timing["sampling"]
            passed, cap_ok = r.passed, r.cap_check["ok"]
        else:
            cm = build_count_model(s["data"], s["family"], detection=s["detection"])
            t1 = time.perf_counter()
            idata = sample_model(cm, chains=chains, draws=draws, tune=tune, seed=seed,
                                        progressbar=False, cores=cores, init=init,
                                        target_accept=target_accept or 0.8)
            sampling = time.perf_counter() - t1
            var_names = cm.var_names
            passed, cap_ok = diagnose(idata, var_names).passed, None
    wall = time.perf_counter() - t0
    ess_b = az.ess(idata, var_names=var_names, method="bulk")
    ess_t = az.ess(idata, var_names=var_names, method="tail")
    min_b = min(float(np.min(ess_b[v].values)) for v in var_names if v in ess_b)
    min_t = min(float(np.min(ess_t[v].values)) for v in var_names if v in ess_t)
    steps = int(idata.sample_stats["n_steps"].sum())
    est_total = steps + int(idata.sample_stats.attrs.get("warmup_n_steps", 0))
    return {"name": name, "family": s["family"].name, "detection": s["detection"],
            "wall": wall, "sampling": sampling, "steps": steps, "steps_total_est": est_total,
            "ess_bulk_min": min_b, "ess_tail_min": min_t, "ess_bulk_per_s": min_b / sampling,
            "ess_tail_per_s": min_t / sampling,
            "s_per_grad": sampling * min(cores, chains) / max(est_total, 1),
            "divergences": int(idata.sample_stats["diverging"].sum()),
            "passed": passed, "cap_ok": cap_ok, "idata": idata}


def main(argv: list[str] | None = None) -> int:
    """Run the benchmark and print its table.

    Args:
        argv: command-line arguments (default sys.argv[1:]).

    Returns:
        0.
    """
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sets", nargs="+", default=["heron_fen", "copper_tarn", "five_dunes"])
    ap.add_argument("--chains", type=int, default=4)
    ap.add_argument("--draws", type=int, default=1000)
    ap.add_argument("--tune", type=int, default=1000)
    ap.add_argument("--cores", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--no-baseline", action="store_true")
    ap.add_argument("--save", type=Path, default=None,
                    help="folder to write each fit's InferenceData to (NAME.nc), to inspect "
                         "divergences or slow chains afterwards")
    args = ap.parse_args(argv)
    rows = []
    for name in args.sets:
        print(f"fitting {name} ...", flush=True)
        rows.append(run_one(name, chains=args.chains, draws=args.draws, tune=args.tune,
                            cores=args.cores, seed=args.seed))
        idata = rows[-1].pop("idata")
        if args.save is not None:
            args.save.mkdir(parents=True, exist_ok=True)
            idata.to_netcdf(args.save / f"{name}.nc")
    base = None
    if not args.no_baseline:
        print(f"baseline: {args.sets[0]} with PyMC's default jitter+adapt_diag ...", flush=True)
        base = run_one(args.sets[0], chains=args.chains, draws=args.draws, tune=args.tune,
                       cores=args.cores, seed=args.seed, init="jitter+adapt_diag",
                       target_accept=0.8)
        base.pop("idata")
    print(f"\n{args.chains} chains x {args.draws} draws (+{args.tune} warm-up), "
          f"{args.cores} cores")
    head = (f"{'data set':<13}{'family':<10}{'detect':>9}{'wall s':>8}{'NUTS s':>8}"
            f"{'grads':>8}{'grads*':>8}{'ms/grad':>8}{'ESSb':>7}{'ESSt':>7}{'ESSb/s':>8}"
            f"{'ESSt/s':>8}{'div':>5}{'pass':>6}{'cap':>5}")
    print(head)
    for r in rows + ([dict(base, name=base["name"] + "*")] if base else []):
        det = "-" if r["detection"] is None else str(r["detection"])[:8]
        print(f"{r['name']:<13}{r['family']:<10}{det:>9}{r['wall']:8.1f}{r['sampling']:8.1f}"
              f"{r['steps']:8d}{int(r['steps_total_est']):8d}{1e3 * r['s_per_grad']:8.2f}"
              f"{r['ess_bulk_min']:7.0f}{r['ess_tail_min']:7.0f}{r['ess_bulk_per_s']:8.2f}"
              f"{r['ess_tail_per_s']:8.2f}{r['divergences']:5d}{str(r['passed']):>6}"
              f"{'-' if r['cap_ok'] is None else str(r['cap_ok']):>5}")
    print("grads = leapfrog steps (likelihood + gradient evaluations) over kept draws "
          "(sample_stats n_steps); grads* = including warm-up; ms/grad = NUTS time x cores / "
          "grads*; ESSb/ESSt = smallest bulk/tail ESS over parameters")
    if base:
        first = rows[0]
        print(f"* baseline (PyMC default diagonal mass matrix) on {base['name']}: "
              f"ESS bulk/s ratio ours/baseline = {first['ess_bulk_per_s'] / base['ess_bulk_per_s']:.2f}, "
              f"wall ratio baseline/ours = {base['sampling'] / first['sampling']:.2f}")
    heron = [r for r in rows if r["name"] == "heron_fen"]
    if heron and args.chains == 4 and args.draws == 1000:
        h = heron[0]
        verdict = "meets" if h["wall"] < 120 else "misses"
        print(f"target: heron_fen 4 x 1000 draws under 120 s on 2 cores — {h['wall']:.0f} s, "
              f"{verdict} it")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
