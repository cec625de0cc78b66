"""Many sites, one fit each, on Dask: ``tallyfit batch COUNTS.csv --by site --out DIR``.

Each site becomes its own run folder under DIR (written crash-safely by the pipeline);
DIR/index.csv lists every site with its status and key results. A failed site is
recorded and the others go on; a rerun skips sites whose run folder is complete.
"""
from __future__ import annotations

import os
import re
import traceback
from collections.abc import Mapping
from pathlib import Path
from typing import Any, Callable

import pandas as pd

from tallyfit.inputs.settings import RunSettings
from tallyfit.infer.counts import CountData
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.infer.errors import InputError
from tallyfit.runfolder.schema import RUN_FILES
from tallyfit.runfolder.store import write_atomic

INDEX_COLUMNS = ["site", "folder", "status", "detail", "diagnostics_passed", "stationary_exists_probability",
                 "p_extinct_100", "iucn_most_probable"]


def site_folder_name(site: str) -> str:
    """A file-system-safe folder name for a site (letters, digits, '-' and '_' kept)."""
    slug = re.sub(r"[^A-Za-z0-9_-]+", "_", str(site)).strip("_") or "site"
    return slug


def is_complete(folder: Path) -> bool:
    """True when every file of a finished run is in ``folder``."""
    return folder.is_dir() and all((folder / name).is_file() for name in RUN_FILES)


def fit_task(name: str, counts: pd.DataFrame | str, settings: RunSettings, folder: str) -> dict[str, Any]:
    """Fit one counts table into one run folder, in a worker; never raises (a failure is a status).

    Args:
        name: what the row is about (a site, or a model of ``tallyfit weigh``).
        counts: the counts as a table, or the path of a counts CSV.
        settings: run settings.
        folder: the run folder to write.

    Returns:
        a row: name, folder, status ("ok" or "failed"), detail, diagnostics_passed and
        the headline numbers.
    """
    from tallyfit.pipeline import run_pipeline

    row: dict[str, Any] = {"site": name, "folder": folder}
    try:
        data = load_counts(counts) if isinstance(counts, pd.DataFrame) else counts
        outcome = run_pipeline(data, settings, folder, progress=False, log=lambda s: None, cores=1, workers=1)
        base = outcome.headline
        ext = base.get("extinction", {})
        iucn = base.get("iucn", {})
        row.update(status="ok", detail="; ".join(outcome.warnings), diagnostics_passed=outcome.passed,
                   stationary_exists_probability=base.get("stationary_exists_probability"),
                   p_extinct_100=ext.get("100"),
                   iucn_most_probable=max(iucn, key=iucn.get) if iucn else None)
    except InputError as exc:
        row.update(status="failed", detail=f"bad input: {exc}")
    except OSError as exc:
        row.update(status="failed", detail=f"cannot write the run folder: {exc}")
    except Exception as exc:  # one fit's trouble must not stop the others; a fault in tallyfit itself
        row.update(status="failed", detail=f"internal error (please report): {type(exc).__name__}: {exc} | "
                   + traceback.format_exc(limit=3).replace("\n", " "))
    return row


def run_fits(tasks: Mapping[str, tuple[pd.DataFrame | str, RunSettings, str]], *, scheduler: str | None = None,
             n_workers: int | None = None, on_result: Callable[[str, dict[str, Any]], None]) -> None:
    """Run :func:`fit_task` for every task on a Dask cluster, one process per fit.

    Args:
        tasks: {name: (counts, settings, folder)}.
        scheduler: address of a running Dask scheduler; default a LocalCluster.
        n_workers: workers of the LocalCluster (default: the machine's cores, at most one
            per task).
        on_result: called with (name, row) as each fit ends, in the order they end; a
            worker that died gives a "failed" row naming why.
    """
    from dask.distributed import Client, LocalCluster, as_completed

    if not tasks:
        return
    cluster = None
    if scheduler is None:
        workers = n_workers or min(len(tasks), os.cpu_count() or 1)
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, dashboard_address=None)
        client = Client(cluster)
    else:
        client = Client(scheduler)
    try:
        futures = {client.submit(fit_task, name, *task, key=f"tallyfit-fit-{i}", pure=False): name
                   for i, (name, task) in enumerate(tasks.items())}
        for fut in as_completed(futures):
            name = futures[fut]
            try:
                row = fut.result()
            except Exception as exc:  # a worker that died
                row = {"site": name, "folder": tasks[name][2], "status": "failed",
                       "detail": f"worker failed: {type(exc).__name__}: {exc}"}
            on_result(name, row)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()


def run_batch(counts: str | Path, settings: RunSettings, out: str | Path, *, by: str = "site",
              scheduler: str | None = None, n_workers: int | None = None,
              log: Callable[[str], None] = print) -> pd.DataFrame:
    """Fit every site of a counts file separately on a Dask cluster.

    Args:
        counts: counts CSV with a site column.
        settings: run settings used for every site.
        out: folder for the per-site run folders and index.csv.
        by: name of the site column.
        scheduler: address of an existing Dask scheduler; default a LocalCluster.
        n_workers: workers of the LocalCluster (default: the machine's cores).
        log: progress messages.

    Returns:
        the index table (also written to out/index.csv).

    Raises:
        InputError: the counts file is malformed or has no such column (nothing is fitted).
    """
    data: CountData = load_counts(counts, site_column=by)
    out = Path(out)
    out.mkdir(parents=True, exist_ok=True)
    table = data.table
    folders: dict[str, Path] = {}
    for site in data.sites:
        name = site_folder_name(site)
        while name in {f.name for f in folders.values()}:
            name += "_"
        folders[site] = out / name
    rows: dict[str, dict[str, Any]] = {}
    todo = []
    for site in data.sites:
        if is_complete(folders[site]):
            rows[site] = {"site": site, "folder": str(folders[site]), "status": "skipped",
                          "detail": "already finished (delete the folder to refit)"}
        else:
            todo.append(site)
    log(f"{len(data.sites)} site(s): {len(todo)} to fit, {len(data.sites) - len(todo)} already finished")

    def write_index() -> pd.DataFrame:
        index = pd.DataFrame([rows[s] for s in data.sites if s in rows], columns=INDEX_COLUMNS)
        write_atomic(out / "index.csv", index.to_csv(index=False))
        return index

    def done(site: str, row: dict[str, Any]) -> None:
        rows[site] = row
        log(f"site {site}: {row['status']}")
        write_index()

    run_fits({site: (table[table["site"] == site].reset_index(drop=True), settings, str(folders[site]))
              for site in todo}, scheduler=scheduler, n_workers=n_workers, on_result=done)
    return write_index()
