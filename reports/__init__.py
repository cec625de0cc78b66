"""Figures, tables and the self-contained HTML report, read from a run folder (never samples).

``from tallyfit.reports import build_report`` is the entry point: ``build_report(run_dir)``
writes ``run_dir/report.html`` and ``run_dir/figures/*.png`` and returns the report's path.
The run folder is read only through :mod:`tallyfit.runfolder` (its schema, reader and
audit). The heavier modules (ArviZ, matplotlib) are imported on first use.
"""
from __future__ import annotations

from typing import Any

__all__ = ["build_report", "FIGURE_NAMES"]


def __getattr__(name: str) -> Any:
    # import on first use so that `import tallyfit.reports` stays cheap for the command line's --help
    if name in __all__:
        from . import report

        return getattr(report, name)
    raise AttributeError(f"module 'tallyfit.reports' has no attribute {name!r}")
