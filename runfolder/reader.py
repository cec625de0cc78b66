"""Reading a run folder through the schema: every reader (audit, report) uses this.

:func:`open_run` opens posterior.nc and derived.nc (both required) and the optional
files; an optional file that is missing, unreadable or not laid out as the schema says
is recorded in :attr:`RunFolder.notes` (naming the file and the key), so the report can
say so instead of failing or guessing.
"""
from __future__ import annotations

import json
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
import xarray as xr

from . import schema as S

__all__ = ["RunFolderError", "RunFolder", "open_run", "read_run_toml"]


class RunFolderError(ValueError):
    """A run folder cannot be read: not a folder, or posterior.nc / derived.nc missing or damaged.

    Attributes:
        path: the folder or file concerned.
        reason: what is wrong, in words.
    """

    def __init__(self, path: str | Path, reason: str) -> None:
        self.path = Path(path)
        self.reason = reason
        super().__init__(f"{self.path}: {reason}")


@dataclass
class RunFolder:
    """The contents of a run folder, as read.

    Attributes:
        path: the folder.
        idata: the InferenceData of posterior.nc.
        derived: the Dataset of derived.nc (in memory; the file is closed).
        summary: summary.json (checked against SUMMARY_SECTIONS), or None.
        run: run.toml (checked against RUN_TOML_SECTIONS), or None.
        counts: counts.csv read by the strict counts reader as a tidy table (columns
            site, time, [survey], count with <NA> for a blank count), or None.
        notes: one sentence per optional file that is missing, unreadable or off-schema.
    """

    path: Path
    idata: Any
    derived: xr.Dataset
    summary: dict[str, Any] | None = None
    run: dict[str, Any] | None = None
    counts: pd.DataFrame | None = None
    notes: list[str] = field(default_factory=list)

    # ---- derived.nc -----------------------------------------------------------------
    @property
    def sites(self) -> list[str]:
        """Site names, in derived.nc's order."""
        return [str(s) for s in self.derived["site"].values]

    @property
    def scenarios(self) -> list[str]:
        """Scenario names, baseline first."""
        return [str(s) for s in self.derived["scenario"].values]

    @property
    def baseline(self) -> str:
        """The baseline scenario's name (the first)."""
        return self.scenarios[0]

    @property
    def cap(self) -> int:
        """The size cap N."""
        return int(self.derived.attrs[S.ATTR_CAP])

    @property
    def tol(self) -> float:
        """The solvers' tolerance."""
        return float(self.derived.attrs[S.ATTR_TOL])

    @property
    def categories(self) -> list[str]:
        """Criterion E category names in code order."""
        return S.categories_from_attrs(self.derived[S.CATEGORY_VARIABLE].attrs, "derived.nc")

    @property
    def criterion_e_horizons(self) -> dict[str, float]:
        """{"CR", "EN", "VU": years}."""
        return {str(k): float(v) for k, v in S.decode_json_attr(self.derived.attrs, S.ATTR_HORIZONS,
                                                                "derived.nc").items()}

    @property
    def generation_time(self) -> float | None:
        """Years per generation, or None when the run had none."""
        g = S.decode_json_attr(self.derived.attrs, S.ATTR_GENERATION_TIME, "derived.nc")
        return None if g is None else float(g)

    @property
    def scenario_settings(self) -> list[dict[str, Any]]:
        """One dict per scenario (name, the rate changes, description), baseline first."""
        return list(S.decode_json_attr(self.derived.attrs, S.ATTR_SCENARIOS, "derived.nc"))

    # ---- posterior.nc ---------------------------------------------------------------
    @property
    def family_text(self) -> str:
        """The family's formula and priors as text ("" when not recorded)."""
        return str(self.idata.posterior.attrs.get(S.ATTR_FAMILY_TEXT, "")).strip()

    # ---- summary.json and run.toml --------------------------------------------------
    def summary_section(self, name: str) -> Any:
        """One section of summary.json, or None when summary.json could not be read.

        Raises:
            KeyError: ``name`` is not a section of the schema (a programming error).
        """
        if name not in S.SUMMARY_SECTIONS:
            raise KeyError(f"{name!r} is not a summary.json section")
        return None if self.summary is None else self.summary[name]

    @property
    def credible_level(self) -> float:
        """The run's credible level (0.9 when summary.json is missing)."""
        derived = self.summary_section("derived")
        return 0.9 if derived is None else float(derived["credible_level"])

    @property
    def seed(self) -> int | None:
        """The run's seed, from run.toml (None when it is missing)."""
        return None if self.run is None else int(self.run["run"]["seed"])


def _read_summary(folder: Path, out: RunFolder) -> None:
    try:
        doc = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
        S.require_keys(doc, tuple(S.SUMMARY_SECTIONS), "summary.json")
        if doc["schema_version"] != S.SCHEMA_VERSION:
            raise S.SchemaError("summary.json", "schema_version",
                                f"{doc['schema_version']!r}, this reader knows {S.SCHEMA_VERSION}")
        S.require_keys(doc["diagnostics"], ("passed", "failed", "limits", "divergences", "bfmi"),
                       "summary.json", "diagnostics")
        S.require_keys(doc["derived"], ("credible_level",), "summary.json", "derived")
        out.summary = dict(doc)
    except FileNotFoundError:
        out.notes.append("summary.json is missing: recorded diagnostics, warnings and settings are not shown")
    except (OSError, UnicodeDecodeError, json.JSONDecodeError, S.SchemaError) as exc:
        out.notes.append(f"summary.json cannot be used ({exc}); its contents are not shown")


def read_run_toml(folder: Path, notes: list[str] | None = None) -> dict[str, Any] | None:
    """run.toml checked against the schema, or None (with the reason added to ``notes``).

    Args:
        folder: the run folder.
        notes: where to record why run.toml cannot be used.

    Returns:
        the document, or None.
    """
    notes = [] if notes is None else notes
    try:
        doc = tomllib.loads((folder / "run.toml").read_text(encoding="utf-8"))
        S.require_keys(doc, S.RUN_TOML_SECTIONS, "run.toml")
        S.require_keys(doc["run"], ("seed", "cap"), "run.toml", "run")
        return doc
    except FileNotFoundError:
        notes.append("run.toml is missing: software versions, seed and file hashes cannot be shown")
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError, S.SchemaError) as exc:
        notes.append(f"run.toml cannot be used ({exc})")
    return None


def _read_counts(folder: Path, out: RunFolder) -> None:
    from tallyfit.infer.errors import InputError
    from tallyfit.inputs.counts_csv import load_counts

    try:
        out.counts = load_counts(folder / "counts.csv").to_frame()
    except InputError as exc:
        # the strict reader names a missing file, a damaged line, a changed header
        out.notes.append(f"counts.csv cannot be read ({exc}); the data cannot be shown")


def _check_hdf5(path: Path) -> None:
    """Open every group, variable and attribute of a netCDF-4 file with h5py (HDF5 checks its
    metadata checksums), so damage is met here and not inside the netCDF reader, which
    would print an error of its own while cleaning up a half-opened file."""
    import h5py

    def visit(_: str, obj: Any) -> None:
        for _value in obj.attrs.values():
            pass

    with h5py.File(path, "r") as fh:
        visit("/", fh)
        fh.visititems(visit)


def _damaged(exc: BaseException) -> str:
    """Why a netCDF file cannot be read, in words, with the reader's own message."""
    if isinstance(exc, PermissionError):
        return f"cannot be read: permission denied ({exc.strerror})"
    return (f"cannot be read: the file is damaged (cut short, overwritten or not netCDF), so nothing in it is "
            f"used; rerun the fit to write it again ({type(exc).__name__}: {exc})")


def open_run(run_dir: str | Path) -> RunFolder:
    """Open a run folder read-only.

    Args:
        run_dir: the run folder.

    Returns:
        RunFolder; optional files that are missing or unusable are listed in ``notes``.

    Raises:
        RunFolderError: ``run_dir`` is not a folder; posterior.nc or derived.nc is missing,
            unreadable or not laid out as the schema says.
    """
    import arviz as az

    folder = Path(run_dir)
    if not folder.is_dir():
        raise RunFolderError(folder, "is not a folder")
    for name in ("posterior.nc", "derived.nc"):
        if not (folder / name).is_file():
            raise RunFolderError(folder / name, "is missing; a run folder needs both posterior.nc and derived.nc")
    try:  # read every value now, so a damaged chunk (checksum, zlib) is found here, not halfway through
        _check_hdf5(folder / "posterior.nc")
        with az.rc_context({"data.load": "eager"}):
            idata = az.from_netcdf(folder / "posterior.nc")
    except Exception as exc:  # the netCDF readers raise many types for a damaged file
        raise RunFolderError(folder / "posterior.nc", _damaged(exc)) from None
    if "posterior" not in idata.groups():
        raise RunFolderError(folder / "posterior.nc", "has no posterior group")
    try:
        _check_hdf5(folder / "derived.nc")
        with xr.open_dataset(folder / "derived.nc", engine="h5netcdf") as ds:
            derived = ds.load()
    except Exception as exc:
        raise RunFolderError(folder / "derived.nc", _damaged(exc)) from None
    for name, dims in S.DERIVED_VARIABLES.items():
        if name not in derived or tuple(derived[name].dims) != dims:
            raise RunFolderError(folder / "derived.nc", f"variable {name} missing or not over {', '.join(dims)}")
    for name in (S.ATTR_HORIZONS, S.ATTR_GENERATION_TIME, S.ATTR_SCENARIOS, S.ATTR_TOL, S.ATTR_CAP):
        if name not in derived.attrs:
            raise RunFolderError(folder / "derived.nc", f"attribute {name} missing")
    try:
        S.categories_from_attrs(derived[S.CATEGORY_VARIABLE].attrs, "derived.nc")
    except S.SchemaError as exc:
        raise RunFolderError(folder / "derived.nc", exc.reason) from None
    for name in ("scenario", "site"):  # netCDF may hand strings back as bytes
        derived = derived.assign_coords({name: [v.decode() if isinstance(v, bytes) else str(v)
                                                for v in derived[name].values]})
    out = RunFolder(path=folder, idata=idata, derived=derived)
    _read_summary(folder, out)
    out.run = read_run_toml(folder, out.notes)
    _read_counts(folder, out)
    return out

