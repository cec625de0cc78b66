"""Count data, rate families, the likelihood, the PyMC model, fitting, push-forward,
scenarios and the command line.

``from infer import load_counts, log_likelihood, log_likelihood_grad`` is the stable
entry point (DESIGN §3); the heavier parts are imported on first use.
"""
from __future__ import annotations

from typing import Any

__all__ = ["load_counts", "CountData", "log_likelihood", "log_likelihood_grad",
           "pointwise_log_likelihood", "InputError"]

_LAZY = {
    "load_counts": "tallyfit.infer.data", "CountData": "tallyfit.infer.data",
    "log_likelihood": "tallyfit.infer.likelihood", "log_likelihood_grad": "tallyfit.infer.likelihood",
    "pointwise_log_likelihood": "tallyfit.infer.likelihood",
    "InputError": "tallyfit.infer.errors",
}


def __getattr__(name: str) -> Any:
    # import on first use so that `import infer` stays cheap for the command line's --help
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(_LAZY[name]), name)
    raise AttributeError(f"module 'infer' has no attribute {name!r}")
