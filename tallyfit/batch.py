"""Many sites, one fit each, on Dask: ``tallyfit batch COUNTS.csv --by site --out DIR``.

Each site becomes its own run folder under DIR (written crash-safely by the pipeline);
DIR/index.csv lists every site with its status and key results. A failed site is
recorded and the others go on; a rerun skips sites whose run folder is complete.
"""
from __future__ import annotations

import re
import traceback
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


def _run_site(site: str, table: pd.DataFrame, settings: RunSettings, folder: str) -> dict[str, Any]:
    """Fit one site in a worker; never raises (a failure is returned as a status)."""
    from tallyfit.pipeline import run_pipeline

    row: dict[str, Any] = {"site": site, "folder": folder}
    try:
        data = load_counts(table)
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
    except Exception as exc:  # one site's trouble must not stop the others; a fault in tallyfit itself
        row.update(status="failed", detail=f"internal error (please report): {type(exc).__name__}: {exc} | "
                   + traceback.format_exc(limit=3).replace("\n", " "))
    return row


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
    from dask.distributed import Client, LocalCluster, as_completed

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

    if todo:
        cluster = None
        if scheduler is None:
            cluster = LocalCluster(n_workers=n_workers, threads_per_worker=1, processes=True,
                                   dashboard_address=None)
            client = Client(cluster)
        else:
            client = Client(scheduler)
        try:
            futures = {client.submit(_run_site, site, table[table["site"] == site].reset_index(drop=True),
                                     settings, str(folders[site]), key=f"tallyfit-site-{i}", pure=False): site
                       for i, site in enumerate(todo)}
            for fut in as_completed(futures):
                site = futures[fut]
                try:
                    rows[site] = fut.result()
                except Exception as exc:  # a worker that died
                    rows[site] = {"site": site, "folder": str(folders[site]), "status": "failed",
                                  "detail": f"worker failed: {type(exc).__name__}: {exc}"}
                log(f"site {site}: {rows[site]['status']}")
                write_index()
        finally:
            client.close()
            if cluster is not None:
                cluster.close()
    return write_index()
