"""Faults while running (issue 14, item 2): two runs into one folder, SIGKILL at several
points, a full disk, a folder that cannot be written, damaged netCDF files.

Each case meets a real fault where the machine allows it: a second process holding the
lock, a child process killed by SIGKILL, a small tmpfs that fills up, a read-only mount.
Mounting needs root; where it is refused the test skips and says so, and the same error
raised by a patched system call (os.write, os.open) is tested beside it. The run folder
is the small genuine one of ``tests/runs.py`` (its draws are invented, never check values);
the writer, reader, audit and command line are the project's own.
"""
from __future__ import annotations

import errno
import hashlib
import multiprocessing
import os
import shutil
import signal
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import pytest

import runs
from tallyfit.cli import main
from tallyfit.pipeline import PipelineOutcome
from tallyfit.reports import build_report
from tallyfit.runfolder import store, writer
from tallyfit.runfolder.audit import audit_run
from tallyfit.runfolder.reader import RunFolderError
from tallyfit.runfolder.schema import RUN_FILES
from tallyfit.runfolder.store import FolderInUseError, claim_folder, lock_path, staged_folder
from tallyfit.runfolder.writer import write_run

FORK = multiprocessing.get_context("fork")  # the child shares the parent's record without pickling it


@pytest.fixture(scope="module")
def record():
    """The RunRecord of a well-mixed small run (4 chains × 150 draws) from tests/runs.py, unwritten."""
    with pytest.MonkeyPatch.context() as mp:
        mp.setattr(runs, "write_run", lambda folder, rec, report=None: rec)
        return runs.make_run_folder(None, chains=4, draws=150, seed=12, divergent=0)


@pytest.fixture(scope="module")
def good_run(record, tmp_path_factory) -> Path:
    """That run written completely (report included) by the one writer."""
    return write_run(tmp_path_factory.mktemp("good") / "run", record, report=build_report)


def _digest(folder: Path) -> dict[str, str]:
    """SHA-256 of every file under ``folder``, by relative path."""
    return {str(p.relative_to(folder)): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def _assert_complete(folder: Path) -> None:
    """Every file of a run folder is there and the audit passes."""
    assert all((folder / name).is_file() for name in RUN_FILES)
    res = audit_run(folder)
    assert res.passed, [(c.name, c.detail) for c in res.failed + res.not_made]


def _beside(folder: Path) -> list[str]:
    """Everything in the folder's parent, hidden names included."""
    return sorted(os.listdir(folder.parent))


def _fake_pipeline(record):
    """A stand-in for the fit whose result is ``record``: the command line's error handling
    and the real writer, without minutes of sampling."""
    def run(counts, settings, out, **_: object) -> PipelineOutcome:
        return PipelineOutcome(write_run(out, record, report=build_report), True, [], {})
    return run


@contextmanager
def _tmpfs(where: Path, size_kib: int, *, read_only: bool = False) -> Iterator[Path]:
    """A small tmpfs at ``where`` (skips the test when this machine does not permit mounting)."""
    where.mkdir()
    if shutil.which("mount") is None:
        pytest.skip("no mount command here; the simulated error beside this test covers the case")
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_kib}k", "tmpfs", str(where)],
                          capture_output=True, text=True)
    if done.returncode != 0:
        pytest.skip(f"mounting a small tmpfs is not permitted here ({done.stderr.strip()}); the simulated "
                    "error beside this test covers the case")
    try:
        if read_only:
            subprocess.run(["mount", "-o", "remount,ro", str(where)], check=True, capture_output=True)
        yield where
    finally:
        if subprocess.run(["umount", str(where)], capture_output=True).returncode != 0:
            subprocess.run(["umount", "-l", str(where)], capture_output=True)


# ---- two runs into one folder ---------------------------------------------------------------


def _hold_then_write(target: Path, record, ready, go) -> None:
    with claim_folder(target):
        ready.set()
        if not go.wait(120):
            os._exit(4)
        write_run(target, record, report=build_report)


def test_a_second_run_into_the_same_folder_is_refused_and_the_first_finishes(record, tmp_path, capsys):
    target = tmp_path / "run"
    ready, go = FORK.Event(), FORK.Event()
    first = FORK.Process(target=_hold_then_write, args=(target, record, ready, go))
    first.start()
    try:
        assert ready.wait(60)
        with pytest.raises(FolderInUseError) as caught:
            with claim_folder(target):
                pass
        holder = caught.value.holder
        assert holder["pid"] == first.pid and holder["host"] == socket.gethostname() and holder["started"]
        assert str(target) in str(caught.value) and f"process {first.pid}" in str(caught.value)
        # the command line: refused at once (before any fit), exit 2, the other run named
        assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(target)]) == 2
        err = capsys.readouterr().err
        assert f"process {first.pid} on host {socket.gethostname()}" in err and str(target) in err
        assert "Traceback" not in err and not target.exists()
    finally:
        go.set()
        first.join(120)
    assert first.exitcode == 0
    _assert_complete(target)
    assert _beside(target) == ["run"]  # the lock file went with the first run


def _claim_fork_worker_and_die(target: Path, worker_pid) -> None:
    with claim_folder(target):
        worker = FORK.Process(target=time.sleep, args=(120,))  # as a push-forward pool worker is forked
        worker.start()
        worker_pid.send(worker.pid)  # a pipe: sent before this process dies
        _kill()


def test_a_worker_outliving_its_killed_run_does_not_keep_the_lock(tmp_path):
    target = tmp_path / "run"
    receiver, sender = FORK.Pipe(duplex=False)
    run = FORK.Process(target=_claim_fork_worker_and_die, args=(target, sender))
    run.start()
    assert receiver.poll(60)
    orphan = receiver.recv()
    for _ in range(1200):  # not join(): the worker holds the end of the pipe join() waits on
        if run.exitcode is not None:
            break
        time.sleep(0.05)
    try:
        assert run.exitcode == -signal.SIGKILL and _pid_alive(orphan)  # the run is gone, its worker is not
        messages: list[str] = []
        with claim_folder(target, log=messages.append):
            assert any(f"process {run.pid}" in m and "no longer running" in m for m in messages), messages
    finally:
        os.kill(orphan, signal.SIGKILL)


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    return True


def test_claims_nest_in_one_thread_and_refuse_another(tmp_path):
    target = tmp_path / "run"
    seen: list[BaseException] = []
    with claim_folder(target) as outer:
        with claim_folder(target) as inner:  # the pipeline claims, then the writer claims again
            assert inner is outer and lock_path(target).is_file()
        worker = threading.Thread(target=lambda: seen.append(_claim_error(target)))
        worker.start()
        worker.join()
    assert isinstance(seen[0], FolderInUseError) and seen[0].holder["pid"] == os.getpid()
    assert not lock_path(target).exists()


def _claim_error(target: Path) -> BaseException | None:
    try:
        with claim_folder(target):
            return None
    except BaseException as exc:  # noqa: BLE001 - handed back to the test
        return exc


# ---- SIGKILL at several points, then a rerun -------------------------------------------------


def _kill() -> None:
    os.kill(os.getpid(), signal.SIGKILL)


def _kill_halfway(module, name: str) -> None:
    """Make ``module.write_atomic`` write half of the file ``name`` and then SIGKILL the process."""
    real = module.write_atomic

    def half(path, data):
        if Path(path).name == name:
            raw = data.encode() if isinstance(data, str) else bytes(data)
            Path(path).write_bytes(raw[: len(raw) // 2])
            _kill()
        return real(path, data)
    module.write_atomic = half


def _die_at(point: str, target: Path, record) -> None:
    """Write ``record`` to ``target`` and SIGKILL this process at ``point`` (in a forked child)."""
    if point == "while fitting (folder claimed, nothing staged)":
        with claim_folder(target):
            _kill()
    elif point == "before any file":
        writer.write_atomic = lambda path, data: _kill()
    elif point == "halfway through derived.nc (posterior.nc written)":
        _kill_halfway(writer, "derived.nc")
    elif point == "halfway through report.html (figures written)":
        import tallyfit.reports.report as report_module

        _kill_halfway(report_module, "report.html")
    elif point == "between the two final renames":
        real = os.replace

        def replace(src, dst):
            if Path(src).name.startswith(f".{target.name}.partial-"):
                _kill()  # the earlier run is already renamed aside, the new one not yet in place
            return real(src, dst)
        store.os.replace = replace
    write_run(target, record, report=build_report)
    os._exit(3)  # not reached when the kill point was passed


KILL_POINTS = [("while fitting (folder claimed, nothing staged)", False), ("before any file", False),
               ("halfway through derived.nc (posterior.nc written)", True),
               ("halfway through report.html (figures written)", True), ("between the two final renames", True)]


@pytest.mark.parametrize(("point", "earlier_run"), KILL_POINTS, ids=[p for p, _ in KILL_POINTS])
def test_sigkill_leaves_nothing_that_looks_complete_and_a_rerun_succeeds(point, earlier_run, record, good_run,
                                                                        tmp_path):
    target = tmp_path / "run"
    if earlier_run:
        shutil.copytree(good_run, target)
    before = _digest(target) if earlier_run else None
    child = FORK.Process(target=_die_at, args=(point, target, record))
    child.start()
    child.join(120)
    assert child.exitcode == -signal.SIGKILL
    assert lock_path(target).is_file()  # the dead run's lock is left behind (flock itself is gone)
    messages: list[str] = []
    if point == "between the two final renames":
        assert not target.exists()  # the earlier run is hidden aside: nothing at the target at all
        with pytest.raises(RuntimeError):  # a rerun that fails at once still puts the earlier run back
            with staged_folder(target, log=messages.append):
                raise RuntimeError("a failing rerun")
    # nothing partial at the target: either nothing, or the earlier complete run unchanged
    assert (_digest(target) == before) if earlier_run else not target.exists()
    write_run(target, record, report=build_report, log=messages.append)
    assert any("taking over the lock" in m and f"process {child.pid}" in m and "no longer running" in m
               for m in messages), messages
    _assert_complete(target)
    assert _beside(target) == ["run"]  # staging folder, replaced run and lock file all cleared


# ---- a full disk -----------------------------------------------------------------------------


def _folder_kib(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file()) // 1024 + 1


def test_a_real_full_disk_leaves_nothing_and_is_named(record, good_run, tmp_path, monkeypatch, capsys):
    with _tmpfs(tmp_path / "small", _folder_kib(good_run) // 4) as disk:  # a quarter of what a run needs
        target = disk / "run"
        with pytest.raises(OSError) as caught:
            write_run(target, record, report=build_report)
        assert caught.value.errno == errno.ENOSPC
        assert Path(caught.value.filename).parent == target and Path(caught.value.filename).name in RUN_FILES
        assert os.listdir(disk) == []  # no staging folder, no temporary file, no lock
        monkeypatch.setattr("tallyfit.pipeline.run_pipeline", _fake_pipeline(record))
        assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(target)]) == 2
        err = capsys.readouterr().err
        assert "no space left on device" in err and caught.value.filename in err and "Traceback" not in err
        assert os.listdir(disk) == []


def test_a_full_disk_leaves_the_earlier_run_untouched(record, good_run, tmp_path):
    with _tmpfs(tmp_path / "room_for_one", _folder_kib(good_run) * 3 // 2) as disk:  # one run fits, two do not
        target = write_run(disk / "run", record, report=build_report)
        before = _digest(target)
        with pytest.raises(OSError) as caught:
            write_run(target, record, report=build_report)
        assert caught.value.errno == errno.ENOSPC and Path(caught.value.filename).parent == target
        assert _digest(target) == before and os.listdir(disk) == ["run"]
        _assert_complete(target)


def test_a_simulated_full_disk_names_the_file(record, tmp_path, monkeypatch, capsys):
    """os.write raising ENOSPC for summary.json (after both netCDF files are written)."""
    real_write = os.write

    def write(fd: int, data) -> int:
        name = os.readlink(f"/proc/self/fd/{fd}")
        if name.startswith(str(tmp_path)) and "summary.json" in name:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real_write(fd, data)

    monkeypatch.setattr(os, "write", write)
    monkeypatch.setattr("tallyfit.pipeline.run_pipeline", _fake_pipeline(record))
    target = tmp_path / "out" / "run"
    assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(target)]) == 2
    err = capsys.readouterr().err
    assert f"{target / 'summary.json'}: the disk is full (no space left on device)" in err
    assert "nothing partial was left behind" in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()  # the folder it created for the run is gone again


# ---- a folder that cannot be written ---------------------------------------------------------


def test_an_unwritable_folder_chmod(tmp_path, capsys):
    if os.geteuid() == 0:
        pytest.skip("running as root: chmod does not stop root writing; the read-only mount and the "
                    "simulated PermissionError tests cover this case")
    parent = tmp_path / "closed"
    parent.mkdir()
    parent.chmod(0o500)
    try:
        assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(parent / "run")]) == 2
    finally:
        parent.chmod(0o700)
    err = capsys.readouterr().err
    assert f"{parent}: permission denied" in err and "Traceback" not in err
    assert os.listdir(parent) == []


def test_a_read_only_folder(tmp_path, capsys):
    with _tmpfs(tmp_path / "ro", 1024, read_only=True) as disk:
        assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(disk / "run")]) == 2
        err = capsys.readouterr().err
        assert f"{disk}: the file system is read-only" in err and "Traceback" not in err
        assert os.listdir(disk) == []


def test_a_simulated_permission_error(tmp_path, monkeypatch, capsys):
    """os.open refusing every file in the folder, as it does for a user without write permission."""
    parent = tmp_path / "closed"
    parent.mkdir()
    real_open = os.open

    def refuse(path, flags, *args, **kwargs):
        if str(path).startswith(str(parent)):
            raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))
        return real_open(path, flags, *args, **kwargs)

    monkeypatch.setattr(os, "open", refuse)
    assert main(["--quiet", "fit", str(runs.COUNTS), "--out", str(parent / "run")]) == 2
    err = capsys.readouterr().err
    assert f"{parent}: permission denied" in err and "Traceback" not in err
    assert os.listdir(parent) == []


# ---- damaged posterior.nc and derived.nc -----------------------------------------------------


def _damage(path: Path, how: str) -> None:
    raw = bytearray(path.read_bytes())
    if how == "cut short":
        raw = raw[: len(raw) // 2]
    elif how == "a metadata byte flipped":  # byte 200: the root group's header, behind HDF5's metadata checksum
        raw[200] ^= 0xFF
    else:  # 4 KiB of other bytes in the middle, the header intact
        middle = len(raw) // 2
        raw[middle: middle + 4096] = bytes((i * 37 + 11) % 256 for i in range(4096))
    path.write_bytes(bytes(raw))


DAMAGE = [(name, how) for name in ("posterior.nc", "derived.nc")
          for how in ("cut short", "overwritten", "a metadata byte flipped")]


@pytest.mark.filterwarnings("error::pytest.PytestUnraisableExceptionWarning")  # nothing printed while cleaning up
@pytest.mark.parametrize(("name", "how"), DAMAGE, ids=[f"{n} {h}" for n, h in DAMAGE])
def test_a_damaged_netcdf_file_is_refused_by_audit_and_report(name, how, good_run, tmp_path, capsys):
    run = tmp_path / "run"
    shutil.copytree(good_run, run)
    _damage(run / name, how)
    report_before = (run / "report.html").read_bytes()
    assert main(["--quiet", "audit", str(run)]) == 1  # a failed check, as for a missing file
    err = capsys.readouterr().err
    assert f"{run / name}: cannot be read: the file is damaged" in err and "Traceback" not in err
    with pytest.raises(RunFolderError) as caught:
        build_report(run)
    assert caught.value.path == run / name and "damaged" in caught.value.reason
    assert (run / "report.html").read_bytes() == report_before  # no report built from it


def test_audit_of_a_file_that_cannot_be_read(good_run, tmp_path, monkeypatch, capsys):
    """Reading refused (as for a file without read permission): a failed check naming it, exit 1."""
    run = tmp_path / "run"
    shutil.copytree(good_run, run)

    def refuse(path) -> str:
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES), str(path))

    monkeypatch.setattr("tallyfit.runfolder.audit.sha256_file", refuse)
    assert main(["--quiet", "audit", str(run)]) == 1
    err = capsys.readouterr().err
    assert "hash of counts.csv: counts.csv cannot be read (Permission denied)" in err and "Traceback" not in err
