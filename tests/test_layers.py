"""The layer rules of DEVELOPERS.md, checked on the source (imports point down only).

chain (mathematics) < infer (statistics) < inputs, runfolder (files) < reports < tallyfit
(the application). Each rule is read from the import statements with the standard
library's ``ast``; nothing is imported. The run folder's schema uses the standard library
only, the mathematics only numpy, scipy and numba, and no module grows past the size a
newcomer can read (numba kernels excepted).
"""
from __future__ import annotations

import ast
import sys
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
#: source folder -> its import name
PACKAGES = {"chain": "tallyfit.chain", "infer": "tallyfit.infer", "inputs": "tallyfit.inputs",
            "runfolder": "tallyfit.runfolder", "reports": "tallyfit.reports", "tallyfit": "tallyfit"}
#: layer -> the other layers it may import
ALLOWED = {
    "tallyfit.chain": set(),
    "tallyfit.infer": {"tallyfit.chain"},
    "tallyfit.inputs": {"tallyfit.infer", "tallyfit.chain"},
    "tallyfit.runfolder": {"tallyfit.infer", "tallyfit.inputs", "tallyfit.chain"},
    "tallyfit.reports": {"tallyfit.runfolder"},
    "tallyfit": {"tallyfit.chain", "tallyfit.infer", "tallyfit.inputs", "tallyfit.runfolder", "tallyfit.reports"},
}
#: third-party packages the mathematics may use (psutil: how much memory is free)
CHAIN_THIRD_PARTY = {"numpy", "scipy", "numba", "psutil"}
#: modules allowed past the size limit: compiled (numba) kernels
LONG_MODULES = {"chain/uniformization.py"}
MAX_LINES = 500
BARE = {"chain", "infer", "inputs", "runfolder", "reports"}


def _modules(folder: str) -> list[Path]:
    return sorted(p for p in (ROOT / folder).rglob("*.py") if "__pycache__" not in p.parts)


def _module_name(path: Path) -> str:
    rel = path.relative_to(ROOT)
    parts = [PACKAGES[rel.parts[0]], *rel.parts[1:-1]]
    if rel.name != "__init__.py":
        parts.append(rel.stem)
    return ".".join(parts)


def _imports(path: Path) -> list[str]:
    """Absolute names of every module imported by ``path`` (relative imports resolved)."""
    tree = ast.parse(path.read_text(encoding="utf-8"), filename=str(path))
    out = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            out += [a.name for a in node.names]
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                own = _module_name(path)
                package = own if path.name == "__init__.py" else own.rsplit(".", 1)[0]
                base = package.split(".")
                base = base[: len(base) - (node.level - 1)]
                name = ".".join(base + ([node.module] if node.module else []))
            else:
                name = node.module or ""
            out.append(name)
    return out


def _layer(name: str) -> str | None:
    if not name.startswith("tallyfit"):
        return None
    for layer in sorted(ALLOWED, key=len, reverse=True):
        if name == layer or name.startswith(layer + "."):
            return layer
    return None


SOURCES = [p for folder in PACKAGES for p in _modules(folder)]


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: str(p.relative_to(ROOT)))
def test_imports_point_down(path: Path) -> None:
    own = _layer(_module_name(path))
    for name in _imports(path):
        layer = _layer(name)
        if layer is None or layer == own:
            continue
        assert layer in ALLOWED[own], f"{path.relative_to(ROOT)} ({own}) imports {name} ({layer})"


@pytest.mark.parametrize("path", SOURCES, ids=lambda p: str(p.relative_to(ROOT)))
def test_module_size(path: Path) -> None:
    rel = str(path.relative_to(ROOT))
    if rel not in LONG_MODULES:
        n = len(path.read_text(encoding="utf-8").splitlines())
        assert n <= MAX_LINES, f"{rel} has {n} lines: split it into modules of one concept each"


def test_mathematics_uses_only_numpy_scipy_numba() -> None:
    stdlib = set(sys.stdlib_module_names)
    for path in _modules("chain"):
        for name in _imports(path):
            top = name.split(".")[0]
            assert top in stdlib or top in CHAIN_THIRD_PARTY or name.startswith("tallyfit.chain"), \
                f"{path.relative_to(ROOT)} imports {name}"


def test_schema_uses_only_the_standard_library() -> None:
    stdlib = set(sys.stdlib_module_names)
    for name in _imports(ROOT / "runfolder" / "schema.py"):
        assert name.split(".")[0] in stdlib, f"runfolder/schema.py imports {name}"


def test_no_generic_top_level_names() -> None:
    # the installed package claims only "tallyfit"; nothing may import the folders by their bare names
    for path in SOURCES + _modules("tests") + _modules("bench") + _modules("example_counts"):
        for name in _imports(path):
            assert name.split(".")[0] not in BARE, f"{path.relative_to(ROOT)} imports {name}"


def test_every_package_folder_is_installed() -> None:
    config = tomllib.loads((ROOT / "pyproject.toml").read_text(encoding="utf-8"))["tool"]["setuptools"]
    listed = set(config["packages"])
    for folder, name in PACKAGES.items():
        assert config["package-dir"][name] == folder
        for init in (ROOT / folder).rglob("__init__.py"):
            sub = init.parent.relative_to(ROOT / folder).parts
            assert ".".join((name, *sub)) in listed, f"{init.parent.relative_to(ROOT)} is not in pyproject packages"
