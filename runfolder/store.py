"""The run folder: writing it crash-safely, and auditing it later.

Everything is written into a hidden temporary folder beside the target and renamed into
place only when complete, so an interrupted run never leaves a half-written folder. A
previous run at the same place is replaced only at that final rename.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import tomllib
from contextlib import contextmanager
from dataclasses import dataclass, field
from importlib import metadata
from pathlib import Path
from typing import Any, Iterator, Mapping

import tomli_w

CAUTION = ("Results are model-based: they depend on the counts supplied and on the assumptions "
           "shown (rate family, priors, observation model, size cap). Listing, harvest and "
           "management decisions should follow the relevant authority's guidelines (for Red List "
           "assessments, the IUCN Red List Categories and Criteria and its guidelines) and "
           "qualified review.")

#: Files every complete run folder holds.
RUN_FILES = ("posterior.nc", "derived.nc", "summary.csv", "summary.json", "report.html", "counts.csv", "run.toml")
PACKAGES = ("tallyfit", "numpy", "scipy", "pandas", "xarray", "pymc", "pytensor", "arviz", "numba", "matplotlib")


def sha256_file(path: str | Path) -> str:
    """SHA-256 hex digest of a file's bytes."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def package_versions() -> dict[str, str]:
    """Installed versions of the packages a run depends on."""
    out = {}
    for name in PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


@contextmanager
def staged_folder(target: str | Path) -> Iterator[Path]:
    """Yield a temporary folder that becomes ``target`` only if the block completes.

    On any exception (including KeyboardInterrupt) the temporary folder is removed and the
    exception re-raised; an existing ``target`` is left untouched.
    """
    target = Path(target).resolve()
    target.parent.mkdir(parents=True, exist_ok=True)
    for stale in target.parent.glob(f".{target.name}.partial-*"):
        # left by a run that was killed outright (no chance to clean up): remove if its process is gone
        try:
            pid = int(stale.name.rsplit("-", 1)[1])
            os.kill(pid, 0)
        except (ValueError, ProcessLookupError):
            shutil.rmtree(stale, ignore_errors=True)
        except PermissionError:
            pass
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


def write_atomic(path: str | Path, data: bytes | str) -> None:
    """Write a file under a temporary name and rename it into place."""
    path = Path(path)
    tmp = path.with_name(f".{path.name}.tmp-{os.getpid()}")
    mode = "wb" if isinstance(data, bytes) else "w"
    with open(tmp, mode, **({} if isinstance(data, bytes) else {"encoding": "utf-8"})) as fh:
        fh.write(data)
    os.replace(tmp, path)


def _toml_safe(value: Any) -> Any:
    if isinstance(value, Mapping):
        return {str(k): _toml_safe(v) for k, v in value.items() if v is not None}
    if isinstance(value, (list, tuple)):
        return [_toml_safe(v) for v in value if v is not None]
    if hasattr(value, "item"):
        return value.item()
    return value


def write_run_toml(folder: Path, settings: Mapping[str, Any], extra: Mapping[str, Any] | None = None) -> None:
    """run.toml: resolved settings, package versions, and SHA-256 of counts.csv and posterior.nc."""
    doc = {
        "settings": _toml_safe(settings),
        "versions": package_versions(),
        "hashes": {name: sha256_file(folder / name) for name in ("counts.csv", "posterior.nc")},
    }
    if extra:
        doc.update(_toml_safe(extra))
    write_atomic(folder / "run.toml", tomli_w.dumps(doc))


@dataclass
class AuditResult:
    """Outcome of re-checking a run folder.

    Attributes:
        passed: True when every check holds.
        problems: one sentence per failed check.
        checks: every check made, as (name, passed, detail).
    """

    passed: bool = True
    problems: list[str] = field(default_factory=list)
    checks: list[tuple[str, bool, str]] = field(default_factory=list)

    def add(self, name: str, ok: bool, detail: str) -> None:
        self.checks.append((name, ok, detail))
        if not ok:
            self.passed = False
            self.problems.append(f"{name}: {detail}")


def audit_run(folder: str | Path) -> AuditResult:
    """Re-check a run folder: files present, hashes as recorded in run.toml, and the
    convergence diagnostics recomputed from posterior.nc (ArviZ) against the thresholds.

    Args:
        folder: the run folder.

    Returns:
        AuditResult (never raises for a damaged run; every problem is a failed check).
    """
    folder = Path(folder)
    res = AuditResult()
    if not folder.is_dir():
        res.add("run folder", False, f"{folder} is not a folder")
        return res
    for name in RUN_FILES:
        res.add(f"file {name}", (folder / name).is_file(), "present" if (folder / name).is_file() else "missing")
    try:
        doc = tomllib.loads((folder / "run.toml").read_text(encoding="utf-8"))
    except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        res.add("run.toml", False, f"unreadable ({exc})")
        return res
    hashes = doc.get("hashes", {})
    for name in ("counts.csv", "posterior.nc"):
        want = hashes.get(name)
        if want is None:
            res.add(f"hash {name}", False, "no hash recorded in run.toml")
        elif not (folder / name).is_file():
            res.add(f"hash {name}", False, "file missing")
        else:
            got = sha256_file(folder / name)
            res.add(f"hash {name}", got == want,
                    "matches run.toml" if got == want else f"SHA-256 {got[:12]}… differs from recorded {want[:12]}…")
    if (folder / "posterior.nc").is_file():
        try:
            import arviz as az

            from tallyfit.infer.fit import diagnose

            idata = az.from_netcdf(folder / "posterior.nc")
            diag = diagnose(idata, [str(v) for v in idata.posterior.data_vars])
            for label, entry in diag["parameters"].items():
                for key in ("r_hat", "ess_bulk", "ess_tail"):
                    e = entry[key]
                    res.add(f"{key} of {label}", bool(e["passed"]),
                            f"{e['value']:.4g} (threshold {e['threshold']:g}, recomputed from posterior.nc)")
            for key in ("divergences", "bfmi"):
                e = diag[key]
                shown = e.get("min", e.get("value"))
                res.add(key, bool(e["passed"]), f"{shown} (threshold {e['threshold']})")
            recorded = json.loads((folder / "summary.json").read_text(encoding="utf-8")).get("diagnostics", {})
            if "passed" in recorded:
                res.add("diagnostics recorded", bool(recorded["passed"]) == bool(diag["passed"]),
                        "summary.json agrees with the recomputed diagnostics"
                        if bool(recorded["passed"]) == bool(diag["passed"]) else
                        "summary.json's diagnostics.passed disagrees with the recomputed value")
        except Exception as exc:  # a damaged file is a failed check, not a crash
            res.add("posterior.nc", False, f"could not be read or diagnosed ({type(exc).__name__}: {exc})")
    return res
