"""File primitives of the run folder: crash-safe writes, the staged folder, hashes, JSON values.

Everything is written into a hidden temporary folder beside the target and renamed into
place only when complete, so an interrupted run never leaves a half-written folder; a
previous run at the same place is replaced only at that final rename. Single files are
written under a temporary name and renamed (:func:`write_atomic`).
"""
from __future__ import annotations

import hashlib
import math
import os
import shutil
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np

__all__ = ["sha256_file", "write_atomic", "staged_folder", "json_value", "toml_value"]


def sha256_file(path: str | os.PathLike[str]) -> str:
    """SHA-256 hex digest of a file's bytes (``hashlib.file_digest``).

    Args:
        path: the file.

    Returns:
        64 hexadecimal characters.

    Raises:
        OSError: the file cannot be read.
    """
    with open(path, "rb") as fh:
        return hashlib.file_digest(fh, "sha256").hexdigest()


def write_atomic(path: str | os.PathLike[str], data: bytes | str) -> Path:
    """Write a file under a temporary name in the same folder and rename it into place.

    Args:
        path: destination.
        data: bytes, or text (written as UTF-8).

    Returns:
        the path written.

    Raises:
        OSError: the folder is missing or not writable, or the disk is full (the
            temporary file is removed; an existing file at ``path`` is untouched).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    raw = data if isinstance(data, bytes) else data.encode("utf-8")
    try:
        with open(tmp, "wb") as fh:
            fh.write(raw)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def _clear_stale(target: Path) -> None:
    """Remove partial folders left by runs that were killed outright (their process is gone)."""
    for stale in target.parent.glob(f".{target.name}.partial-*"):
        try:
            os.kill(int(stale.name.rsplit("-", 1)[1]), 0)
        except (ValueError, ProcessLookupError):
            shutil.rmtree(stale, ignore_errors=True)
        except PermissionError:  # another user's live process
            pass


@contextmanager
def staged_folder(target: str | os.PathLike[str]) -> Iterator[Path]:
    """Yield a temporary folder that becomes ``target`` only if the block completes.

    On any exception (including KeyboardInterrupt) the temporary folder is removed and
    the exception re-raised; an existing ``target`` is left untouched.

    Args:
        target: the folder to create or replace.

    Yields:
        the temporary folder (beside ``target``).

    Raises:
        OSError: the parent folder cannot be created or written.
    """
    target = Path(target).resolve()
    target.parent.mkdir(parents=True, exist_ok=True)
    _clear_stale(target)
    tmp = target.parent / f".{target.name}.partial-{os.getpid()}"
    if tmp.exists():
        shutil.rmtree(tmp)
    tmp.mkdir()
    try:
        yield tmp
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    old = None
    if target.exists():
        old = target.parent / f".{target.name}.old-{os.getpid()}"
        os.replace(target, old)
    os.replace(tmp, target)
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


def json_value(obj: Any) -> Any:
    """Plain JSON data from numpy and Python values (non-finite floats become None).

    Args:
        obj: mappings, sequences, numpy scalars and arrays, numbers, strings, None.

    Returns:
        the same structure with only dict, list, str, int, float, bool and None.
    """
    if isinstance(obj, Mapping):
        return {str(k): json_value(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return json_value(obj.tolist())
    if isinstance(obj, (list, tuple)):
        return [json_value(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if obj is None or isinstance(obj, str):
        return obj
    raise TypeError(f"cannot store a {type(obj).__name__} in JSON: {obj!r}")


def toml_value(obj: Any) -> Any:
    """TOML-ready data: like :func:`json_value`, with None left out (TOML has no null).

    Args:
        obj: as for :func:`json_value`.

    Returns:
        the same structure without None entries.
    """
    obj = json_value(obj)
    if isinstance(obj, dict):
        return {k: toml_value(v) for k, v in obj.items() if v is not None}
    if isinstance(obj, list):
        return [toml_value(v) for v in obj if v is not None]
    return obj
