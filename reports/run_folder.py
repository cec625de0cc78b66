"""Reading a run folder: the files a report is built from, opened read-only.

A run folder (DESIGN §3) holds ``posterior.nc`` (ArviZ InferenceData), ``derived.nc``
(the push-forward Dataset), ``summary.json``, ``run.toml`` and ``counts.csv``. The
report needs the first two; the others are read when present, and anything missing or
unreadable is recorded in :attr:`RunFolder.notes` so that the report can say so
instead of failing or staying silent.
"""
from __future__ import annotations

import hashlib
import json
import math
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
import xarray as xr

__all__ = ["RunFolderError", "RunFolder", "load_run", "sha256_of"]

#: Site name used when counts.csv has no site column (as infer.data does).
DEFAULT_SITE = "site"


class RunFolderError(ValueError):
    """A run folder cannot be reported on: not a folder, or a required file is missing or unreadable.

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
        derived: the Dataset of derived.nc (loaded into memory; the file is closed).
        summary: summary.json as a dict ({} when missing).
        run: run.toml as a dict ({} when missing).
        counts: counts.csv as a DataFrame with columns time, count, site (filled with
            the single site's name when absent) and survey when present; None when missing.
        notes: one sentence per missing or unreadable optional file.
    """

    path: Path
    idata: Any
    derived: xr.Dataset
    summary: dict[str, Any] = field(default_factory=dict)
    run: dict[str, Any] = field(default_factory=dict)
    counts: pd.DataFrame | None = None
    notes: list[str] = field(default_factory=list)

    @property
    def sites(self) -> list[str]:
        """Site names, in the order of derived.nc's ``site`` coordinate."""
        return [str(s) for s in self.derived["site"].values]

    @property
    def scenarios(self) -> list[str]:
        """Scenario names, baseline first (derived.nc's ``scenario`` coordinate)."""
        return [str(s) for s in self.derived["scenario"].values]

    @property
    def baseline(self) -> str:
        """The name of the baseline scenario (the first one)."""
        return self.scenarios[0]

    @property
    def cap(self) -> int:
        """The size cap N of the fitted chains (the largest size in derived.nc)."""
        return int(self.derived["size"].values.max())


def sha256_of(path: str | Path) -> str:
    """SHA-256 hex digest of a file's bytes.

    Args:
        path: the file.

    Returns:
        64 hexadecimal characters.

    Raises:
        OSError: the file cannot be read.
    """
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _read_counts(path: Path, sites: list[str]) -> pd.DataFrame:
    df = pd.read_csv(path, dtype={"site": str, "survey": str}, skipinitialspace=True)
    df.columns = [str(c).strip().lower() for c in df.columns]
    missing = [c for c in ("time", "count") if c not in df.columns]
    if missing:
        raise ValueError(f"no column {', '.join(missing)} (columns: {', '.join(df.columns)})")
    if "site" not in df.columns:
        df["site"] = sites[0] if len(sites) == 1 else DEFAULT_SITE
    df["site"] = df["site"].astype(str).str.strip()
    df["time"] = pd.to_numeric(df["time"], errors="raise").astype(float)
    df["count"] = pd.to_numeric(df["count"], errors="coerce").astype(float)
    return df


def load_run(run_dir: str | Path) -> RunFolder:
    """Open a run folder read-only.

    Args:
        run_dir: the run folder.

    Returns:
        RunFolder with everything that could be read; optional files (summary.json,
        run.toml, counts.csv) that are missing or unreadable are listed in ``notes``.

    Raises:
        RunFolderError: ``run_dir`` is not a folder, or posterior.nc or derived.nc is
            missing or cannot be read, or derived.nc lacks the dims a report needs.
    """
    import arviz as az

    folder = Path(run_dir)
    if not folder.is_dir():
        raise RunFolderError(folder, "is not a folder")
    for name in ("posterior.nc", "derived.nc"):
        if not (folder / name).is_file():
            raise RunFolderError(folder / name, "is missing; a report needs both posterior.nc and derived.nc")
    try:
        idata = az.from_netcdf(folder / "posterior.nc")
    except Exception as exc:  # any reader error means the file is damaged
        raise RunFolderError(folder / "posterior.nc", f"cannot be read ({type(exc).__name__}: {exc})") from exc
    if "posterior" not in idata.groups():
        raise RunFolderError(folder / "posterior.nc", "has no posterior group")
    try:
        with xr.open_dataset(folder / "derived.nc") as ds:
            derived = ds.load()
    except Exception as exc:
        raise RunFolderError(folder / "derived.nc", f"cannot be read ({type(exc).__name__}: {exc})") from exc
    need = {"scenario", "chain", "draw", "size", "site", "threshold", "horizon"}
    lacking = sorted(need - set(derived.dims))
    if lacking:
        raise RunFolderError(folder / "derived.nc", f"lacks the dims {', '.join(lacking)}")
    for name in ("scenario", "site"):  # netCDF may hand strings back as bytes
        derived = derived.assign_coords({name: [v.decode() if isinstance(v, bytes) else str(v)
                                                for v in derived[name].values]})

    out = RunFolder(path=folder, idata=idata, derived=derived)
    try:
        out.summary = json.loads((folder / "summary.json").read_text(encoding="utf-8"))
        if not isinstance(out.summary, dict):
            out.notes.append("summary.json does not hold a JSON object; its contents are not shown")
            out.summary = {}
    except FileNotFoundError:
        out.notes.append("summary.json is missing: recorded diagnostics, warnings and settings are not shown")
    except (OSError, ValueError) as exc:
        out.notes.append(f"summary.json cannot be read ({exc}); its contents are not shown")
    try:
        out.run = tomllib.loads((folder / "run.toml").read_text(encoding="utf-8"))
    except FileNotFoundError:
        out.notes.append("run.toml is missing: software versions, seed and file hashes cannot be shown")
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError) as exc:
        out.notes.append(f"run.toml cannot be read ({exc})")
    try:
        out.counts = _read_counts(folder / "counts.csv", out.sites)
    except FileNotFoundError:
        out.notes.append("counts.csv is missing: the data cannot be shown")
    except (OSError, ValueError) as exc:
        out.notes.append(f"counts.csv cannot be read ({exc}); the data cannot be shown")
    return out


def finite_or_none(value: Any) -> float | None:
    """A float when ``value`` is a finite number, else None (for tolerant reading of JSON).

    Args:
        value: anything.

    Returns:
        float or None.
    """
    try:
        v = float(value)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None
