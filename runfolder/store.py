"""File primitives of the run folder: crash-safe writes, the staged folder, the folder lock,
hashes, JSON values.

Everything is written into a hidden temporary folder beside the target and renamed into
place only when complete, so an interrupted run never leaves a half-written folder; a
previous run at the same place is replaced only at that final rename. Single files are
written under a temporary name and renamed (:func:`write_atomic`). One run at a time may
write a folder: :func:`claim_folder` holds a lock file beside it (``fcntl.flock``, which
the kernel releases when the process ends however it ends, so a killed run never blocks
the next one); the lock file records the holder's process id, host and start time for
the message a second run gets.
"""
from __future__ import annotations

import errno
import fcntl
import hashlib
import json
import math
import os
import re
import shutil
import socket
import sys
import threading
import warnings
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import numpy as np

from tallyfit.infer.errors import InputError

__all__ = ["sha256_file", "write_atomic", "staged_folder", "claim_folder", "Claim", "FolderInUseError",
           "describe_holder", "lock_path", "json_value", "toml_value"]


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


def write_atomic(path: str | os.PathLike[str], data: bytes | bytearray | memoryview | str) -> Path:
    """Write a file under a temporary name in the same folder and rename it into place.

    The bytes go out through ``os.write`` (a short write is continued) and ``os.fsync``.

    Args:
        path: destination.
        data: bytes (or any bytes-like buffer, e.g. the memoryview of an in-memory
            netCDF file), or text (written as UTF-8).

    Returns:
        the path written.

    Raises:
        OSError: the folder is missing or not writable, or the disk is full; its
            ``filename`` is ``path`` (the temporary file is removed and an existing file
            at ``path`` is untouched).
    """
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    view = memoryview(data.encode("utf-8") if isinstance(data, str) else data).cast("B")
    try:
        fd = os.open(tmp, os.O_WRONLY | os.O_CREAT | os.O_TRUNC | os.O_CLOEXEC, 0o666)
        try:
            while view:
                view = view[os.write(fd, view):]
            os.fsync(fd)
        finally:
            os.close(fd)
        os.replace(tmp, path)
    except BaseException as exc:
        try:
            tmp.unlink(missing_ok=True)
        except OSError:
            pass
        if isinstance(exc, OSError) and exc.errno is not None and exc.filename in (None, str(tmp), tmp):
            raise OSError(exc.errno, exc.strerror or os.strerror(exc.errno), str(path)) from exc
        raise
    return path


class FolderInUseError(InputError):
    """Another run is writing the same output folder (an input problem: exit 2).

    Attributes:
        folder: the output folder asked for.
        lock: the lock file beside it.
        holder: what the lock file records of the other run (pid, host, started,
            command); empty while that run is still writing it.
    """

    def __init__(self, folder: str | os.PathLike[str], lock: str | os.PathLike[str],
                 holder: Mapping[str, Any]) -> None:
        self.folder = Path(folder)
        self.lock = Path(lock)
        self.holder = dict(holder)
        super().__init__(f"another tallyfit run is writing this output folder ({describe_holder(holder)}); two "
                         "runs into one folder would mix their files, so this one stops before doing anything",
                         source=str(self.folder),
                         hint=f"wait for that run to finish, or choose another --out (its lock file: {self.lock})")


@dataclass(frozen=True)
class Claim:
    """The right to write one output folder, held by :func:`claim_folder`.

    Attributes:
        folder: the output folder.
        lock: the lock file beside it.
        locked: False when the file system offers no locks (the run goes ahead unprotected).
        holder: what this run recorded in the lock file (pid, host, started, command).
        previous: what a run that ended without releasing the lock (killed, or its
            machine went down) had recorded, when this claim took that lock over; else None.
    """

    folder: Path
    lock: Path
    locked: bool
    holder: dict[str, Any]
    previous: dict[str, Any] | None = None


_HELD: dict[Path, list[Any]] = {}  # folder -> [pid, thread id, depth, Claim, fd] of this process's claims
_HELD_GUARD = threading.Lock()


def _forget_claims_in_child() -> None:
    """After fork: a child (a push-forward or sampling worker) must not keep its parent's locks
    alive once the parent is killed, so it closes its copies of the lock files (the
    parent's lock stands: flock is released only when its last descriptor closes)."""
    global _HELD_GUARD
    _HELD_GUARD = threading.Lock()
    for entry in _HELD.values():
        if entry[4] is not None:
            try:
                os.close(entry[4])
            except OSError:
                pass
    _HELD.clear()


os.register_at_fork(after_in_child=_forget_claims_in_child)


def lock_path(target: str | os.PathLike[str]) -> Path:
    """The lock file of an output folder: ``.NAME.lock`` beside it.

    Args:
        target: the output folder.

    Returns:
        the lock file's path.
    """
    target = Path(target).resolve()
    return target.parent / f".{target.name}.lock"


def describe_holder(holder: Mapping[str, Any]) -> str:
    """A lock file's record in words: "process 123 on host h, started 2026-01-01T10:00:00+00:00 (...)".

    Args:
        holder: the record (pid, host, started, command), possibly empty.

    Returns:
        one phrase.
    """
    if not holder.get("pid"):
        return "its process has not recorded its details yet"
    text = f"process {holder['pid']} on host {holder.get('host', '?')}, started {holder.get('started', '?')}"
    return text + (f", command: {holder['command']}" if holder.get("command") else "")


def _read_holder(fd: int) -> dict[str, Any]:
    try:
        raw = os.pread(fd, 65536, 0)
        doc = json.loads(raw.decode("utf-8")) if raw.strip() else {}
        return doc if isinstance(doc, dict) else {}
    except (OSError, UnicodeDecodeError, json.JSONDecodeError):
        return {}


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's live process
        return True
    return True


def _make_parents(folder: Path) -> list[Path]:
    """Create ``folder`` and missing ancestors; return the ones created, deepest first."""
    missing = []
    here = folder
    while not here.exists() and here != here.parent:
        missing.append(here)
        here = here.parent
    folder.mkdir(parents=True, exist_ok=True)
    return missing


def _remove_empty(folders: list[Path]) -> None:
    for folder in folders:  # deepest first; a folder that holds anything stays
        try:
            folder.rmdir()
        except OSError:
            return


def _acquire(target: Path, log: Callable[[str], None] | None) -> tuple[int | None, Claim]:
    """Take the lock file of ``target`` (``fcntl.flock``, never waiting); see :func:`claim_folder`."""
    lock = lock_path(target)
    holder = {"pid": os.getpid(), "host": socket.gethostname(),
              "started": datetime.now(timezone.utc).isoformat(timespec="seconds"),
              "command": " ".join(Path(sys.argv[0]).name.split() + sys.argv[1:])[:300] if sys.argv else ""}
    while True:
        try:
            fd = os.open(lock, os.O_RDWR | os.O_CREAT | os.O_CLOEXEC, 0o644)
        except OSError as exc:  # the folder is not writable: name the folder, not our lock file
            raise OSError(exc.errno, exc.strerror, str(target.parent)) from exc
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            other = _read_holder(fd)
            os.close(fd)
            raise FolderInUseError(target, lock, other) from None
        except OSError as exc:  # a file system without locks (ENOLCK, EOPNOTSUPP): go ahead, say so
            os.close(fd)
            (log or _warn)(f"cannot lock {lock} ({exc.strerror}): this file system offers no file locks, so a "
                           "second run into the same folder would not be stopped")
            return None, Claim(target, lock, False, holder)
        try:  # the previous holder may have removed the file between our open and our lock
            current = os.path.samestat(os.fstat(fd), os.stat(lock))
        except FileNotFoundError:
            current = False
        if current:
            break
        os.close(fd)
    previous = _read_holder(fd) or None
    try:
        os.ftruncate(fd, 0)
        os.pwrite(fd, json.dumps(holder).encode("utf-8"), 0)
        os.fsync(fd)
    except OSError as exc:  # e.g. a full disk: give the lock back before saying so
        _release(fd, lock)
        raise OSError(exc.errno, exc.strerror, str(lock)) from exc
    if previous:
        gone = (previous.get("host") == holder["host"] and isinstance(previous.get("pid"), int)
                and not _pid_alive(previous["pid"]))
        (log or _warn)(f"taking over the lock of {target}: it was left by {describe_holder(previous)}, which "
                       + ("is no longer running" if gone else "no longer holds it") + " (killed or crashed); "
                       "its partial files are removed")
    return fd, Claim(target, lock, True, holder, previous)


def _warn(message: str) -> None:
    warnings.warn(message, RuntimeWarning, stacklevel=4)


def _release(fd: int, lock: Path) -> None:
    try:
        if os.path.samestat(os.fstat(fd), os.stat(lock)):
            os.unlink(lock)  # still holding it, so nobody else can be using this file
    except OSError:
        pass
    os.close(fd)


@contextmanager
def claim_folder(target: str | os.PathLike[str], *, log: Callable[[str], None] | None = None) -> Iterator[Claim]:
    """Hold the right to write ``target`` for the length of the block; a second run is refused at once.

    The lock is ``fcntl.flock`` on ``.NAME.lock`` beside the folder, recording this run's
    pid, host, start time and command. The kernel releases it when the process ends, even
    by SIGKILL, so a lock left behind never blocks a rerun: the rerun takes it over and
    says so (through ``log``). Claims nest: the same thread may claim a folder it holds
    (the pipeline claims before fitting, the writer again when it writes). Missing parent
    folders are created, and removed again if they are still empty at the end.

    Args:
        target: the output folder (it need not exist).
        log: where to say that a lock left by a dead run was taken over, or that the
            file system has no locks (default: a RuntimeWarning).

    Yields:
        Claim.

    Raises:
        FolderInUseError: another process (or another thread of this one) holds the
            folder; it names that run's pid, host and start time.
        OSError: the parent folder cannot be created or written (``filename`` is that folder).
    """
    target = Path(target).resolve()
    with _HELD_GUARD:
        held = _HELD.get(target)
        if held is not None and held[0] == os.getpid():
            if held[1] != threading.get_ident():
                raise FolderInUseError(target, held[3].lock, held[3].holder)
            held[2] += 1
    if held is not None and held[0] == os.getpid():
        try:
            yield held[3]
        finally:
            with _HELD_GUARD:
                held[2] -= 1
        return
    created = _make_parents(target.parent)
    try:
        fd, claim = _acquire(target, log)
    except BaseException:
        _remove_empty(created)
        raise
    with _HELD_GUARD:
        _HELD[target] = [os.getpid(), threading.get_ident(), 1, claim, fd]
    try:
        yield claim
    finally:
        with _HELD_GUARD:
            _HELD.pop(target, None)
        if fd is not None:
            _release(fd, claim.lock)
        _remove_empty(created)


def _pid_of(path: Path) -> int | None:
    try:
        return int(path.name.rsplit("-", 1)[1])
    except (IndexError, ValueError):
        return None


def _clear_leftovers(target: Path, locked: bool) -> None:
    """Remove what runs that were killed outright left beside ``target``.

    Holding the folder's lock, every staging (``.partial-*``) and replaced (``.old-*``)
    folder of ``target`` is a leftover; without a lock only those whose process is gone.
    A run killed between its two final renames leaves no ``target`` but the complete
    previous run as ``.old-*``: that one is put back.
    """
    def stale(p: Path) -> bool:
        pid = _pid_of(p)
        return locked or pid is None or not _pid_alive(pid)

    olds = sorted((p for p in target.parent.glob(f".{target.name}.old-*") if stale(p)),
                  key=lambda p: p.stat().st_mtime)
    if olds and not target.exists():
        os.replace(olds.pop(), target)
    for p in olds + [p for p in target.parent.glob(f".{target.name}.partial-*") if stale(p)]:
        shutil.rmtree(p, ignore_errors=True)


def _named_in(exc: OSError, tmp: Path, target: Path) -> OSError:
    """The same error naming the file as it would have been in ``target`` (not in the staging folder)."""
    if exc.errno is None or exc.filename is None:
        return exc
    try:
        parts = list(Path(os.fsdecode(exc.filename)).relative_to(tmp).parts)
    except ValueError:
        return exc
    if parts and (m := re.fullmatch(r"\.(.+)\.tmp-\d+", parts[-1])):
        parts[-1] = m.group(1)
    return OSError(exc.errno, exc.strerror or os.strerror(exc.errno), str(target.joinpath(*parts)))


def _swap(tmp: Path, target: Path) -> None:
    """Rename the finished staging folder to ``target``, replacing an earlier run."""
    old = None
    try:
        if target.exists():
            old = target.parent / f".{target.name}.old-{os.getpid()}"
            os.replace(target, old)
        os.replace(tmp, target)
    except BaseException:
        if old is not None and not target.exists():
            os.replace(old, target)
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    if old is not None:
        shutil.rmtree(old, ignore_errors=True)


@contextmanager
def staged_folder(target: str | os.PathLike[str], *, log: Callable[[str], None] | None = None) -> Iterator[Path]:
    """Yield a temporary folder that becomes ``target`` only if the block completes.

    The folder is claimed first (:func:`claim_folder`), and what killed runs left beside
    it is cleared. On any exception (including KeyboardInterrupt) the temporary folder is
    removed and the exception re-raised, an OSError naming the file as it would have been
    in ``target``; an existing ``target`` is left untouched. After SIGKILL only hidden
    folders are left beside ``target`` (never a partial ``target``), and the next run
    clears them.

    Args:
        target: the folder to create or replace.
        log: as for :func:`claim_folder`.

    Yields:
        the temporary folder (beside ``target``).

    Raises:
        FolderInUseError: another run is writing ``target``.
        OSError: the parent folder cannot be created or written, or the disk is full.
    """
    target = Path(target).resolve()
    with claim_folder(target, log=log) as claim:
        _clear_leftovers(target, claim.locked)
        tmp = target.parent / f".{target.name}.partial-{os.getpid()}"
        if tmp.exists():
            shutil.rmtree(tmp)
        try:
            tmp.mkdir()
        except OSError as exc:
            raise OSError(exc.errno, exc.strerror, str(target.parent)) from exc
        try:
            yield tmp
        except BaseException as exc:
            shutil.rmtree(tmp, ignore_errors=True)
            if isinstance(exc, OSError) and (named := _named_in(exc, tmp, target)) is not exc:
                raise named from exc
            raise
        _swap(tmp, target)


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
