"""tallyfit: birth and death rates, extinction risk and size distributions from head counts.

The public entry points (DESIGN §3), imported on first use so that ``import tallyfit``
stays cheap for the command line's ``--help``::

    from tallyfit import BirthDeathChain, StepChain, EnvironmentalChain, load_counts, log_likelihood, log_likelihood_grad

The layers live in subpackages: ``tallyfit.chain`` (mathematics), ``tallyfit.infer``
(statistics), ``tallyfit.inputs`` (counts files and settings), ``tallyfit.runfolder``
(the run folder's schema, writer, reader and audit), ``tallyfit.reports`` (the report)
and this package itself (pipeline, batch, command line).
"""
from __future__ import annotations

from typing import Any

__all__ = ["BirthDeathChain", "StepChain", "EnvironmentalChain", "load_counts", "CountData", "log_likelihood",
           "log_likelihood_grad", "pointwise_log_likelihood", "InputError"]

_LAZY = {
    "BirthDeathChain": "tallyfit.chain", "StepChain": "tallyfit.chain", "EnvironmentalChain": "tallyfit.chain",
    "load_counts": "tallyfit.inputs.counts_csv", "CountData": "tallyfit.infer.counts",
    "log_likelihood": "tallyfit.infer.likelihood", "log_likelihood_grad": "tallyfit.infer.likelihood",
    "pointwise_log_likelihood": "tallyfit.infer.likelihood",
    "InputError": "tallyfit.infer.errors",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'tallyfit' has no attribute {name!r}")
