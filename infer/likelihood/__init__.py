"""Log-likelihood of head counts under a birth–death chain, with gradients, for NUTS.

Exact counts (:mod:`.exact`): Π_sites Π_i P_{n_i, n_{i+1}}(t_{i+1} − t_i), each site
conditioned on its first count; a missing count (NaN) means the survey was not made and
the transition spans the gap. With a detection model (:mod:`.hidden`) the true size is
hidden and each replicate count is Binomial(N_true, p); the forward algorithm runs over
the plausible hidden sizes. Transition probabilities come from chain.uniformization on
windows of sizes widened until what they leave out is within the tolerance, reported as
``error_bound``; gradients are exact derivatives of the computed value.

Modules: :mod:`.series` (the accepted data forms), :mod:`.result` (LikelihoodResult),
:mod:`.windows` (window sizing both evaluators share), :mod:`.exact`, :mod:`.hidden`,
:mod:`.evaluate` (the public functions, PreparedCounts),
:mod:`.op` (the PyTensor Ops) and :mod:`.guarded` (the Op the PyMC model uses, which
refuses points it cannot evaluate). The Ops are imported on first use, so that importing
this package does not load PyTensor.
"""
from __future__ import annotations

from typing import Any

from .evaluate import (PreparedCounts, evaluate_likelihood, log_likelihood, log_likelihood_grad,
                       pointwise_log_likelihood)
from .result import LikelihoodResult
from .series import CountSeries, as_series

__all__ = [
    "LikelihoodResult",
    "PreparedCounts",
    "CountSeries",
    "as_series",
    "evaluate_likelihood",
    "log_likelihood",
    "log_likelihood_grad",
    "pointwise_log_likelihood",
    "CountLikelihoodOp",
    "CountLikelihoodGradOp",
    "GuardedLikelihoodOp",
    "REFUSED_ERRORS",
    "MAX_STEPS",
]

# names whose modules import PyTensor: loaded on first use
_LAZY = {
    "CountLikelihoodOp": "op",
    "CountLikelihoodGradOp": "op",
    "GuardedLikelihoodOp": "guarded",
    "REFUSED_ERRORS": "guarded",
    "MAX_STEPS": "sweeps",
}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        return getattr(importlib.import_module(f"{__name__}.{_LAZY[name]}"), name)
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
