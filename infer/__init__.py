"""Statistics: count data, rate families, the likelihood, the PyMC model, sampling,
diagnostics, the posterior predictive, push-forward, criterion E and scenarios. No files
and no command line (those are tallyfit.inputs, tallyfit.runfolder and tallyfit itself).

``from tallyfit.infer import CountData, log_likelihood, log_likelihood_grad`` is the stable
entry point (DESIGN §3; a counts file is read by ``tallyfit.load_counts``); the heavier
parts are imported on first use.
"""
from __future__ import annotations

from typing import Any

__all__ = ["CountData", "log_likelihood", "log_likelihood_grad", "pointwise_log_likelihood", "InputError"]

_LAZY = {
    "CountData": "tallyfit.infer.counts",
    "log_likelihood": "tallyfit.infer.likelihood", "log_likelihood_grad": "tallyfit.infer.likelihood",
    "pointwise_log_likelihood": "tallyfit.infer.likelihood",
    "InputError": "tallyfit.infer.errors",
}


def __getattr__(name: str) -> Any:
    # import on first use so that `import tallyfit.infer` stays cheap for the command line's --help
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'tallyfit.infer' has no attribute {name!r}")
