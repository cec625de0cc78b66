"""Batch under load and faults: many small sites on Dask, one worker killed mid-batch.

Two set-ups, each fitting every site of an invented counts file made by a Gillespie
simulator written here (not tallyfit's):

* ``local``: ``run_batch`` starts its own LocalCluster (2 worker processes);
* ``external``: a ``dask scheduler`` and two ``dask worker`` processes started as separate
  programs, and ``run_batch`` given the scheduler's address.

In each, once a quarter of the sites are finished one worker process is killed with
SIGKILL (its nanny starts a new one). The bench then checks that every site ends with a
complete run folder or a recorded failure with its reason — none lost, none listed twice
— and reruns the batch, which must fit only what is missing. A third set-up, ``driver-kill``,
runs ``tallyfit batch`` as its own program and SIGKILLs it with its workers halfway; the
rerun must fit exactly the sites that had no complete folder. It prints a table: sites per
minute, peak resident memory per worker process, and the counts; and writes it to
bench/results/batch_faults.json.

Run:  .venv/bin/python bench/batch_faults_bench.py [--sites 40] [--draws 100] [--setups local external]
"""
from __future__ import annotations

import argparse
import json
import os
import signal
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import psutil

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tallyfit.batch import is_complete, run_batch  # noqa: E402
from tallyfit.inputs.settings import RunSettings  # noqa: E402


def gillespie(b: float, d: float, K: float, start: int, years: int, rng: np.random.Generator) -> list[int]:
    """Exact simulation (Gillespie 1977) of births b·n and deaths n·(d + (b − d)·n/K), at whole years."""
    n, t, out = start, 0.0, [start]
    for year in range(1, years):
        while n > 0:
            up, down = b * n, n * (d + (b - d) * n / K)
            step = rng.exponential(1 / (up + down))
            if t + step > year:
                break
            t += step
            n += 1 if rng.random() < up / (up + down) else -1
        t = float(year)
        out.append(n)
    return out


def make_sites(path: Path, n_sites: int, seed: int = 7) -> None:
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n_sites):
        K = float(rng.uniform(15, 40))
        sizes = gillespie(0.5, 0.2, K, int(K), 12, rng)
        rows += [{"site": f"plot {i + 1:02d}", "time": 2010 + j, "count": c} for j, c in enumerate(sizes)]
    pd.DataFrame(rows).to_csv(path, index=False)


class Watcher(threading.Thread):
    """Polls worker processes' memory and kills one worker once enough sites are finished."""

    def __init__(self, roots: list[psutil.Process], out: Path, n_sites: int, kill_after: int) -> None:
        super().__init__(daemon=True)
        self.roots, self.out, self.n_sites, self.kill_after = roots, out, n_sites, kill_after
        self.peak: dict[int, int] = {}
        self.killed: int | None = None
        self.stop = threading.Event()

    def workers(self) -> list[psutil.Process]:
        procs = []
        for root in self.roots:
            try:
                procs += [p for p in root.children(recursive=True)]
            except psutil.Error:
                pass
        return procs

    def run(self) -> None:
        while not self.stop.is_set():
            procs = self.workers()
            for p in procs:
                try:
                    self.peak[p.pid] = max(self.peak.get(p.pid, 0), p.memory_info().rss)
                except psutil.Error:
                    pass
            if self.killed is None:
                done = sum(is_complete(f) for f in self.out.glob("plot_*")) if self.out.exists() else 0
                if done >= self.kill_after:
                    big = [p for p in procs if self.peak.get(p.pid, 0) > 150 * 2 ** 20]  # workers that fit
                    if big:
                        victim = max(big, key=lambda p: self.peak.get(p.pid, 0))
                        try:
                            os.kill(victim.pid, signal.SIGKILL)
                            self.killed = victim.pid
                        except ProcessLookupError:
                            pass
            time.sleep(0.3)


def check(index: pd.DataFrame, out: Path, sites: list[str]) -> dict[str, int]:
    listed = list(index["site"])
    ok = index[index["status"].isin(["ok", "skipped"])]
    failed = index[index["status"] == "failed"]
    lost = [s for s in sites if s not in listed]
    return {"ok": int(len(ok)), "failed": int(len(failed)),
            "failed_without_reason": int((failed["detail"].fillna("") == "").sum()),
            "lost": len(lost), "duplicated": len(listed) - len(set(listed)),
            "ok_but_incomplete": int(sum(not is_complete(Path(f)) for f in ok["folder"]))}


def run_setup(setup: str, counts: Path, settings: RunSettings, work: Path, n_sites: int) -> dict:
    out = work / f"batch_{setup}"
    procs: list[subprocess.Popen] = []
    scheduler = None
    roots = [psutil.Process()]
    if setup == "external":
        sched_file = work / "scheduler.json"
        env = {**os.environ, "PYTHONPATH": str(ROOT)}
        procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_scheduler", "--scheduler-file",
                                       str(sched_file), "--no-dashboard"], env=env, stdout=subprocess.DEVNULL,
                                      stderr=subprocess.DEVNULL))
        while not sched_file.exists():
            time.sleep(0.2)
        time.sleep(0.5)
        for _ in range(2):
            procs.append(subprocess.Popen([sys.executable, "-m", "distributed.cli.dask_worker", "--scheduler-file",
                                           str(sched_file), "--nworkers", "1", "--nthreads", "1",
                                           "--no-dashboard"], env=env, stdout=subprocess.DEVNULL,
                                          stderr=subprocess.DEVNULL))
        scheduler = json.loads(sched_file.read_text())["address"]
        roots = [psutil.Process(p.pid) for p in procs[1:]]
        time.sleep(3)
    sites = sorted(pd.read_csv(counts)["site"].unique())
    watcher = Watcher(roots, out, n_sites, kill_after=max(1, n_sites // 4))
    watcher.start()
    t0 = time.perf_counter()
    try:
        index = run_batch(counts, settings, out, scheduler=scheduler, n_workers=2, log=lambda s: None)
        wall = time.perf_counter() - t0
        watcher.stop.set()
        watcher.join()
        first = check(index, out, sites)
        t1 = time.perf_counter()
        rerun = run_batch(counts, settings, out, scheduler=scheduler, n_workers=2, log=lambda s: None)
        rerun_wall = time.perf_counter() - t1
        second = check(rerun, out, sites)
        refitted = int((rerun["status"] != "skipped").sum())
    finally:
        for p in procs[::-1]:
            p.terminate()
        for p in procs:
            try:
                p.wait(timeout=10)
            except subprocess.TimeoutExpired:
                p.kill()
    # worker processes: the ones that grew past the size of an idle Python (they imported tallyfit and fitted)
    peaks = sorted((v for v in watcher.peak.values() if v > 150 * 2 ** 20), reverse=True)
    return {"setup": setup, "sites": n_sites, "wall_s": round(wall, 1),
            "sites_per_minute": round(60 * n_sites / wall, 2), "worker_killed": watcher.killed is not None,
            **{f"first_{k}": v for k, v in first.items()}, "rerun_refitted": refitted,
            "rerun_wall_s": round(rerun_wall, 1), **{f"rerun_{k}": v for k, v in second.items()},
            "peak_rss_per_worker_mb": [round(v / 2 ** 20) for v in peaks]}


def run_driver_kill(counts: Path, settings: RunSettings, work: Path, n_sites: int, draws: int) -> dict:
    """``tallyfit batch`` as its own program, SIGKILLed (with its workers) halfway; then a rerun."""
    out = work / "batch_driver_kill"
    cmd = [sys.executable, "-m", "tallyfit.cli", "--quiet", "batch", str(counts), "--out", str(out), "--chains", "2",
           "--draws", str(draws), "--tune", str(draws), "--seed", "3", "--workers", "2"]
    proc = subprocess.Popen(cmd, env={**os.environ, "PYTHONPATH": str(ROOT)}, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    while proc.poll() is None and sum(is_complete(f) for f in out.glob("plot_*")) < n_sites // 2:
        time.sleep(0.3)
    os.killpg(proc.pid, signal.SIGKILL)
    proc.wait()
    time.sleep(1)
    complete = sum(is_complete(f) for f in out.glob("plot_*"))
    t0 = time.perf_counter()
    index = run_batch(counts, settings, out, n_workers=2, log=lambda s: None)
    wall = time.perf_counter() - t0
    sites = sorted(pd.read_csv(counts)["site"].unique())
    after = check(index, out, sites)
    return {"setup": "driver-kill", "sites": n_sites, "complete_when_killed": complete,
            "rerun_refitted": int((index["status"] != "skipped").sum()), "rerun_wall_s": round(wall, 1),
            **{f"rerun_{k}": v for k, v in after.items()}}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--sites", type=int, default=40)
    ap.add_argument("--draws", type=int, default=100)
    ap.add_argument("--setups", nargs="+", default=["local", "external", "driver-kill"],
                    choices=["local", "external", "driver-kill"])
    args = ap.parse_args()
    settings = RunSettings(rates="logistic", chains=2, draws=args.draws, tune=args.draws, seed=3,
                           horizons=(10.0, 50.0))
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        work = Path(tmp)
        counts = work / "plots.csv"
        make_sites(counts, args.sites)
        for setup in args.setups:
            rows.append(run_driver_kill(counts, settings, work, args.sites, args.draws) if setup == "driver-kill"
                        else run_setup(setup, counts, settings, work, args.sites))
            print(json.dumps(rows[-1]), flush=True)
    table = pd.DataFrame(rows)
    with pd.option_context("display.width", 200, "display.max_columns", 30):
        print(table.T.to_string(header=False))
    lost = int(table.get("first_lost", pd.Series(dtype=int)).fillna(0).sum() + table["rerun_lost"].sum())
    print(f"faults survived: {int(table.get('worker_killed', pd.Series(dtype=bool)).fillna(False).sum())} worker "
          f"kill(s) and {int((table['setup'] == 'driver-kill').sum())} batch kill(s); sites lost: {lost} (must be 0); "
          f"listed twice: {int(table.get('first_duplicated', pd.Series(dtype=int)).fillna(0).sum())}")
    results = ROOT / "bench" / "results"
    results.mkdir(exist_ok=True)
    (results / "batch_faults.json").write_text(json.dumps(rows, indent=2))


if __name__ == "__main__":
    main()
