"""Figures, tables and the self-contained HTML report, read from a run folder (never samples).

``from reports import build_report`` is the entry point: ``build_report(run_dir)`` writes
``run_dir/report.html`` and ``run_dir/figures/*.png`` and returns the report's path.
The heavier modules (ArviZ, matplotlib) are imported on first use.
"""
from __future__ import annotations

from typing import Any

__all__ = ["build_report", "load_run", "RunFolder", "RunFolderError", "run_checks", "CheckReport", "Check",
           "Thresholds", "CAUTION", "FIGURE_NAMES"]

_LAZY = {
    "build_report": "tallyfit.reports.report", "FIGURE_NAMES": "tallyfit.reports.report",
    "load_run": "tallyfit.reports.run_folder", "RunFolder": "tallyfit.reports.run_folder", "RunFolderError": "tallyfit.reports.run_folder",
    "run_checks": "tallyfit.reports.checks", "CheckReport": "tallyfit.reports.checks", "Check": "tallyfit.reports.checks",
    "Thresholds": "tallyfit.reports.checks",
    "CAUTION": "tallyfit.reports.narrative",
}


def __getattr__(name: str) -> Any:
    # import on first use so that `import reports` stays cheap for the command line's --help
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'reports' has no attribute {name!r}")
