"""Writing a complete run folder from what a run produced (the one writer; see the schema).

:func:`write_run` takes a :class:`RunRecord` and writes every file of
:data:`~tallyfit.runfolder.schema.RUN_FILES` into a staged folder that is renamed into
place only when all of it (the report included) is written, so a crash, a kill or a full
disk never leaves a folder that looks complete. posterior.nc and derived.nc are built in
memory and written like every other file (HDF5 itself never meets a full disk, which it
does not survive cleanly), with an HDF5 Fletcher-32 checksum on every numeric variable so
that a damaged file is refused when read instead of giving wrong numbers.
"""
from __future__ import annotations

import json
from collections.abc import Callable, Iterator, Mapping, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd
import tomli_w
import xarray as xr

from tallyfit.infer.criterion_e import CATEGORIES
from tallyfit.infer.criterion_e import SOURCE as CRITERION_E_SOURCE
from tallyfit.infer.diagnostics import LIMIT_SOURCES, Convergence

from . import schema as S
from .store import json_value, sha256_file, staged_folder, toml_value, write_atomic

__all__ = ["RunRecord", "write_run", "summary_document", "summary_rows", "encode_derived", "package_versions",
           "netcdf_bytes", "inference_netcdf_bytes", "PACKAGES"]

#: Packages whose versions run.toml records.
PACKAGES = ("tallyfit", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz", "numba", "matplotlib")


@dataclass
class RunRecord:
    """Everything a run folder is written from.

    Attributes:
        counts_bytes: counts.csv, the input exactly as read.
        idata: the ArviZ InferenceData of the fit.
        derived: the push-forward Dataset (``tallyfit.infer.pushforward.push_forward``).
        derived_summary: its summary (``tallyfit.infer.pushforward.summarise``).
        convergence: the fit's diagnostics (``tallyfit.infer.diagnostics.diagnose``).
        cap_check: the fit's cap check (ok, message and measurements).
        criterion_e_horizons: {"CR", "EN", "VU": years}.
        generation_time: years per generation, or None.
        scenarios: one dict per scenario, baseline first (``Scenario.as_dict()``).
        tol: the solvers' tolerance.
        cap: the size cap N.
        data: source, sites, n_counts, sha256, time_unit, time_units, time_unit_reason.
        family: name, formula, description.
        settings: the resolved run settings (plain data).
        starts: {site: start size of the forecasts}.
        seed: the run's seed.
        warnings: sentences the user must read.
        environment: good and bad years and covariates: varying_years, covariates
            (births, deaths, future) and the fit's quadrature check (None without).
    """

    counts_bytes: bytes
    idata: Any
    derived: xr.Dataset
    derived_summary: Mapping[str, Any]
    convergence: Convergence
    cap_check: Mapping[str, Any]
    criterion_e_horizons: Mapping[str, float]
    generation_time: float | None
    scenarios: Sequence[Mapping[str, Any]]
    tol: float
    cap: int
    data: Mapping[str, Any]
    family: Mapping[str, Any]
    settings: Mapping[str, Any]
    starts: Mapping[str, int]
    seed: int
    warnings: list[str] = field(default_factory=list)
    environment: Mapping[str, Any] = field(default_factory=lambda: {"varying_years": "none", "covariates": {},
                                                                   "quadrature_check": None})


def package_versions() -> dict[str, str]:
    """Installed versions of the packages a run depends on ("not installed" when absent)."""
    out = {}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


def _diagnostics_record(c: Convergence) -> dict[str, Any]:
    limits = {k: {"limit": getattr(c.limits, k), "source": LIMIT_SOURCES[k]} for k in LIMIT_SOURCES}
    return {"passed": c.passed, "failed": list(c.failed), "limits": limits, "divergences": list(c.divergences),
            "bfmi": list(c.bfmi)}


def summary_document(record: RunRecord) -> dict[str, Any]:
    """summary.json of a run (SUMMARY_SECTIONS), as plain JSON data.

    Args:
        record: the run.

    Returns:
        dict with every section of :data:`~tallyfit.runfolder.schema.SUMMARY_SECTIONS`.
    """
    table = record.convergence.table
    parameters = {str(label): {k: row[k] for k in S.PARAMETER_COLUMNS} for label, row in table.iterrows()}
    doc = {"schema_version": S.SCHEMA_VERSION, "caution": S.CAUTION, "data": dict(record.data),
           "family": dict(record.family), "settings": dict(record.settings), "cap": int(record.cap),
           "starts": {str(k): int(v) for k, v in record.starts.items()}, "parameters": parameters,
           "derived": dict(record.derived_summary), "diagnostics": _diagnostics_record(record.convergence),
           "cap_check": dict(record.cap_check), "environment": dict(record.environment),
           "warnings": list(record.warnings)}
    assert set(doc) == set(S.SUMMARY_SECTIONS), "summary_document and the schema disagree"
    return json_value(doc)


def summary_rows(summary: Mapping[str, Any]) -> pd.DataFrame:
    """summary.csv: one row per parameter and per derived quantity (SUMMARY_CSV_COLUMNS).

    Args:
        summary: the summary.json document.

    Returns:
        DataFrame with the schema's columns (blank where a column does not apply).
    """
    rows: list[dict[str, Any]] = []
    for name, entry in summary["parameters"].items():
        rows.append({"kind": "parameter", "scenario": "", "quantity": name, **entry})
    derived = summary["derived"]
    for sc, entry in derived.items():
        if not isinstance(entry, Mapping):
            continue  # credible_level

        def add(quantity: str, st: Mapping[str, Any] | float | None) -> None:
            if isinstance(st, Mapping):
                rows.append({"kind": "derived", "scenario": sc, "quantity": quantity,
                             **{k: st.get(k) for k in ("mean", "q_lo", "q50", "q_hi")}})
            else:
                rows.append({"kind": "derived", "scenario": sc, "quantity": quantity, "mean": st})

        add("stationary_exists_probability", entry["stationary_exists_probability"])
        add("stationary_mean", entry["stationary_mean"])
        add("quasi_stationary_mean", entry["quasi_stationary_mean"])
        add("quasi_decay_rate", entry["quasi_decay_rate"])
        for site, st in entry["log10_mean_time_to_extinction"].items():
            add(f"log10_mean_time_to_extinction[{site}]", st)
        for thr, per_h in entry["extinction_probability_all_sites"].items():
            for h, st in per_h.items():
                add(f"extinction_probability[{thr}, horizon={h}]", st)
        for cat, p in entry["iucn_category_probability"].items():
            add(f"iucn_category_probability[{cat}]", p)
    return pd.DataFrame(rows, columns=list(S.SUMMARY_CSV_COLUMNS))


def encode_derived(derived: xr.Dataset, record: RunRecord) -> xr.Dataset:
    """derived.nc as the schema lays it out: the structured attributes added.

    Args:
        derived: the push-forward Dataset.
        record: the run (horizons, generation time, scenarios, tolerance, cap).

    Returns:
        a shallow copy with the schema's attributes.

    Raises:
        SchemaError: a variable of DERIVED_VARIABLES is missing or has other dims.
    """
    for name, dims in S.DERIVED_VARIABLES.items():
        if name not in derived:
            raise S.SchemaError("derived.nc", name, "variable missing")
        if tuple(derived[name].dims) != dims:
            raise S.SchemaError("derived.nc", name, f"dims {derived[name].dims}, expected {dims}")
    out = derived.copy()
    out[S.CATEGORY_VARIABLE].attrs.update(S.category_attrs(CATEGORIES, CRITERION_E_SOURCE))
    out.attrs.update({S.ATTR_HORIZONS: S.encode_json_attr(dict(record.criterion_e_horizons)),
                      S.ATTR_GENERATION_TIME: S.encode_json_attr(record.generation_time),
                      S.ATTR_SCENARIOS: S.encode_json_attr(json_value(list(record.scenarios))),
                      S.ATTR_TOL: float(record.tol), S.ATTR_CAP: int(record.cap)})
    return out


def _checked(ds: xr.Dataset, *, compress: bool) -> dict[str, dict[str, Any]]:
    """netCDF encodings: a Fletcher-32 checksum (and zlib when asked) on every numeric variable."""
    return {str(name): {"fletcher32": True, **({"zlib": True} if compress else {})}
            for name, var in ds.variables.items() if var.dtype.kind in "biufc"}


@contextmanager
def _local_write_lock() -> Iterator[None]:
    """Let xarray take its write lock in this process, not from a Dask cluster.

    xarray asks the active Dask scheduler for a lock named after the file it writes; inside
    a batch worker that is the cluster, which cannot make one for an in-memory file, so
    every write would fail. The data written here are in memory: a local lock is right.
    """
    try:
        import dask
    except ImportError:
        yield
        return
    with dask.config.set(scheduler="threads"):
        yield


def netcdf_bytes(ds: xr.Dataset) -> memoryview:
    """A Dataset as netCDF-4 (h5netcdf) bytes, every numeric variable checksummed.

    Args:
        ds: the Dataset.

    Returns:
        the file's bytes.
    """
    with _local_write_lock():
        return ds.to_netcdf(None, engine="h5netcdf", encoding=_checked(ds, compress=False))


def inference_netcdf_bytes(idata: Any) -> memoryview:
    """An ArviZ InferenceData as the netCDF-4 bytes ``InferenceData.to_netcdf`` writes (one
    group per InferenceData group, zlib-compressed), with Fletcher-32 checksums added.

    Args:
        idata: the InferenceData.

    Returns:
        the file's bytes (read back by ``arviz.from_netcdf``).
    """
    tree = idata.to_datatree()
    encoding = {f"/{g}": _checked(tree[g].to_dataset(), compress=True) for g in idata.groups()}
    with _local_write_lock():
        return tree.to_netcdf(None, engine="h5netcdf", encoding=encoding)


def write_run(out: str | Path, record: RunRecord, *,
              report: Callable[[Path], Any] | None = None, log: Callable[[str], None] | None = None) -> Path:
    """Write a complete run folder (crash-safe: staged, then renamed into place).

    Args:
        out: the run folder to create or replace.
        record: what the run produced.
        report: called with the staged folder once every other file is written (the
            application passes ``tallyfit.reports.build_report``); None writes no report
            (the folder is then not complete: for tests of the other files only).
        log: where to say that a lock left by a killed run was taken over.

    Returns:
        the run folder's path.

    Raises:
        FolderInUseError: another run is writing ``out`` (nothing is touched).
        OSError: the folder cannot be written (full disk, no permission), ``filename``
            naming the file as it would have been in ``out``; nothing is left behind and
            an earlier run at ``out`` is untouched.
        SchemaError: the record does not fit the schema.
    """
    summary = summary_document(record)
    derived = encode_derived(record.derived, record)
    with staged_folder(out, log=log) as tmp:
        write_atomic(tmp / "counts.csv", record.counts_bytes)
        write_atomic(tmp / "posterior.nc", inference_netcdf_bytes(record.idata))
        write_atomic(tmp / "derived.nc", netcdf_bytes(derived))
        write_atomic(tmp / "summary.json", json.dumps(summary, indent=2, allow_nan=False))
        write_atomic(tmp / "summary.csv", summary_rows(summary).to_csv(index=False))
        doc = {"settings": toml_value(record.settings), "run": {"seed": int(record.seed), "cap": int(record.cap)},
               "versions": package_versions(), "hashes": {n: sha256_file(tmp / n) for n in S.HASHED_FILES}}
        write_atomic(tmp / "run.toml", tomli_w.dumps(doc))
        if report is not None:
            report(tmp)
    return Path(out)
