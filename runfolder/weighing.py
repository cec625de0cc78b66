"""Writing and reading a weighing folder (``tallyfit weigh``) through the schema.

The models' run folders under ``models/`` are written one by one as each fit finishes
(so a rerun fits only what is missing). The comparison files (WEIGHING_FILES) are built
in a hidden staging folder beside them and moved in at the end, weighing.json last and
after the old one is removed: weighing.json records the SHA-256 of the other files, so a
folder whose weighing.json is missing, or whose files do not match it, is refused by
:func:`open_weighing` as unfinished instead of being read half old, half new.
"""
from __future__ import annotations

import json
import os
import shutil
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd
import xarray as xr

from . import schema as S
from .reader import RunFolderError, _check_hdf5, _damaged
from .store import claim_folder, json_value, sha256_file, write_atomic
from .writer import netcdf_bytes

__all__ = ["WeighingRecord", "WeighingFolder", "write_weighing", "open_weighing", "weighing_document"]


@dataclass
class WeighingRecord:
    """What a weighing produced.

    Attributes:
        table: one row per model asked for, columns WEIGHTS_COLUMNS.
        weighed: the weighed push-forward draws (per-draw variables, ``model`` along draw).
        sections: the weighing.json sections other than schema_version, caution and hashes.
    """

    table: pd.DataFrame
    weighed: xr.Dataset
    sections: dict[str, Any] = field(default_factory=dict)


@dataclass
class WeighingFolder:
    """A finished weighing folder, as read.

    Attributes:
        path: the folder.
        table: weights.csv.
        weighed: weighed.nc (in memory).
        document: weighing.json.
    """

    path: Path
    table: pd.DataFrame
    weighed: xr.Dataset
    document: dict[str, Any]

    def section(self, name: str) -> Any:
        """One section of weighing.json.

        Raises:
            KeyError: ``name`` is not a section of the schema (a programming error).
        """
        if name not in S.WEIGHING_SECTIONS:
            raise KeyError(f"{name!r} is not a weighing.json section")
        return self.document[name]


def weighing_document(record: WeighingRecord, hashes: dict[str, str]) -> dict[str, Any]:
    """weighing.json's content, checked against WEIGHING_SECTIONS.

    Raises:
        SchemaError: a section is missing or unknown.
    """
    doc = {"schema_version": S.SCHEMA_VERSION, "caution": S.CAUTION, **record.sections, "hashes": hashes}
    S.require_keys(doc, list(S.WEIGHING_SECTIONS), "weighing.json")
    unknown = set(doc) - set(S.WEIGHING_SECTIONS)
    if unknown:
        raise S.SchemaError("weighing.json", ", ".join(sorted(unknown)), "not a section of the schema")
    return json_value(doc)


def write_weighing(out: str | Path, record: WeighingRecord, *,
                   report: Callable[[Path], Any] | None = None) -> Path:
    """Write the comparison files of a weighing folder (the models' folders are already there).

    Args:
        out: the weighing folder.
        record: what the weighing produced.
        report: called with the staging folder once weights.csv, weighed.nc and
            weighing.json are in it (the application passes the comparison report builder).

    Returns:
        the weighing folder.

    Raises:
        FolderInUseError: another process is writing the comparison files of ``out``.
        OSError: a file cannot be written (nothing in ``out`` is left half-replaced: at
            worst weighing.json is missing, and the folder reads as unfinished).
        SchemaError: the table or the sections do not fit the schema.
    """
    out = Path(out)
    missing = [c for c in S.WEIGHTS_COLUMNS if c not in record.table.columns]
    if missing:
        raise S.SchemaError("weights.csv", ", ".join(missing), "columns missing")
    stage = out / f".weighing.partial-{os.getpid()}"
    with claim_folder(out / ".weighing"):
        shutil.rmtree(stage, ignore_errors=True)
        stage.mkdir(parents=True)
        try:
            write_atomic(stage / "weights.csv", record.table[list(S.WEIGHTS_COLUMNS)].to_csv(index=False))
            write_atomic(stage / "weighed.nc", netcdf_bytes(record.weighed))
            hashes = {n: sha256_file(stage / n) for n in S.WEIGHING_HASHED}
            write_atomic(stage / "weighing.json",
                         json.dumps(weighing_document(record, hashes), indent=2, allow_nan=False))
            if report is not None:
                report(stage)
            (out / "weighing.json").unlink(missing_ok=True)  # from here until the end: unfinished
            for name in [S.FIGURES_DIR] + [n for n in S.WEIGHING_FILES if n != "weighing.json"]:
                if (stage / name).is_dir():
                    shutil.rmtree(out / name, ignore_errors=True)
                if (stage / name).exists():
                    os.replace(stage / name, out / name)
            os.replace(stage / "weighing.json", out / "weighing.json")
        finally:
            shutil.rmtree(stage, ignore_errors=True)
    return out


def open_weighing(folder: str | Path) -> WeighingFolder:
    """Open a finished weighing folder read-only.

    Args:
        folder: the weighing folder (or its staging folder while the report is built).

    Returns:
        WeighingFolder.

    Raises:
        RunFolderError: not a folder, unfinished (no weighing.json, or files that do not
            match the SHA-256 it records), or a file that is damaged or off-schema.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise RunFolderError(folder, "is not a folder")
    doc_path = folder / "weighing.json"
    if not doc_path.is_file():
        raise RunFolderError(doc_path, "is missing: the weighing did not finish; run the same weigh command "
                                       "again (finished models are not refitted)")
    try:
        doc = json.loads(doc_path.read_text(encoding="utf-8"))
        S.require_keys(doc, list(S.WEIGHING_SECTIONS), "weighing.json")
    except (OSError, ValueError) as exc:
        raise RunFolderError(doc_path, f"cannot be read ({exc}); run the weigh command again") from None
    for name, digest in doc["hashes"].items():
        if not (folder / name).is_file() or sha256_file(folder / name) != digest:
            raise RunFolderError(folder / name, "is missing or does not match weighing.json (SHA-256): the folder "
                                                "was changed or not finished; run the weigh command again")
    try:
        table = pd.read_csv(folder / "weights.csv")
    except (OSError, ValueError) as exc:
        raise RunFolderError(folder / "weights.csv", f"cannot be read ({exc})") from None
    if list(table.columns) != list(S.WEIGHTS_COLUMNS):
        raise RunFolderError(folder / "weights.csv", f"columns are not {', '.join(S.WEIGHTS_COLUMNS)}")
    try:
        _check_hdf5(folder / "weighed.nc")
        with xr.open_dataset(folder / "weighed.nc", engine="h5netcdf") as ds:
            weighed = ds.load()
    except Exception as exc:  # the netCDF readers raise many types for a damaged file
        raise RunFolderError(folder / "weighed.nc", _damaged(exc)) from None
    for name in ("scenario", S.WEIGHED_MODEL_COORD):
        if name not in weighed.coords:
            raise RunFolderError(folder / "weighed.nc", f"coordinate {name} missing")
        weighed = weighed.assign_coords({name: (weighed[name].dims, [v.decode() if isinstance(v, bytes) else str(v)
                                                                     for v in weighed[name].values])})
    return WeighingFolder(path=folder, table=table, weighed=weighed, document=doc)
