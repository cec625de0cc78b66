"""The count likelihood Op that refuses, instead of failing at, points it cannot evaluate.

Used by the PyMC model: a sampler's far-off trial points get log-likelihood −inf (and zero
gradients), which NUTS rejects.
"""
from __future__ import annotations

from collections.abc import Callable, Sequence
from functools import partial
from typing import Any

import numpy as np
from pytensor.graph.basic import Apply

from tallyfit.chain.errors import RateError
from tallyfit.infer.errors import LikelihoodUnderflowError

from .op import CountLikelihoodGradOp, CountLikelihoodOp
from .sweeps import MAX_STEPS

__all__ = ["GuardedLikelihoodOp", "REFUSED_ERRORS", "MAX_STEPS"]

#: Errors that make the guarded Op refuse a point (log-likelihood −inf) instead of failing.
REFUSED_ERRORS = (RateError, LikelihoodUnderflowError, MemoryError)


def _too_fast(birth: np.ndarray, death: np.ndarray, longest_interval: float) -> bool:
    """Rates so high that one census interval needs more than MAX_STEPS steps (or not finite):
    a quick test on the whole range before any window is placed (sweeps.check_cost checks
    each sweep's own window and rate scales)."""
    top = float(np.max(np.asarray(birth)[:-1] + np.asarray(death)[:-1], initial=0.0))
    top = max(top, float(np.asarray(death)[-1]))
    return not np.isfinite(top) or top * longest_interval > MAX_STEPS


class _Refusals:
    """Shared by the value and gradient Ops: the inputs last refused, so a refused point
    is evaluated (and rejected) once, not once per Op."""

    def __init__(self, longest_interval: float) -> None:
        self.longest_interval = longest_interval
        self.key: bytes | None = None

    @staticmethod
    def _key(inputs: Sequence[Any]) -> bytes:
        return b"".join(np.asarray(x, dtype=np.float64).tobytes() for x in inputs)

    def check(self, inputs: Sequence[Any]) -> None:
        """Raise RateError for a point refused before or too fast to evaluate."""
        if self.key is not None and self._key(inputs) == self.key:
            raise RateError("this point was refused before")
        if _too_fast(inputs[0], inputs[1], self.longest_interval):
            raise RateError("rates too fast for the census intervals")

    def remember(self, inputs: Sequence[Any]) -> None:
        """Record a refused point."""
        self.key = self._key(inputs)

    def attempt(self, inputs: Sequence[Any], perform: Callable[[], None]) -> bool:
        """Run ``perform`` unless the point is refused (before or by the errors it raises).

        Args:
            inputs: the Op's inputs (birth, death[, p]).
            perform: writes the Op's outputs.

        Returns:
            True when ``perform`` ran; False for a refused point (now remembered).

        Raises:
            What ``perform`` raises other than REFUSED_ERRORS.
        """
        try:
            self.check(inputs)
            perform()
        except REFUSED_ERRORS:
            self.remember(inputs)
            return False
        return True


class _GuardedGradOp(CountLikelihoodGradOp):
    """Gradient Op of :class:`GuardedLikelihoodOp`: zeros where the point is refused."""

    def __init__(self, evaluator: Any, refusals: _Refusals) -> None:
        super().__init__(evaluator)
        self.refusals = refusals

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Write the gradients, or zeros for a refused point."""
        if not self.refusals.attempt(inputs, partial(super().perform, node, inputs, outputs)):
            for out, x in zip(outputs, inputs):
                out[0] = np.zeros_like(np.asarray(x, dtype=np.float64))


class GuardedLikelihoodOp(CountLikelihoodOp):
    """The count likelihood Op, giving −inf (zero gradient) at points it cannot evaluate.

    Far-off parameter values tried by the sampler (early in warm-up a trajectory can
    run to death rates of 1e5 per year) give rates that overflow, transitions too
    improbable for double precision, or a uniformization needing millions of steps.
    Such points have negligible posterior mass (turnover that fast makes the observed
    counts essentially impossible), so they are refused: log-likelihood −inf, which
    NUTS rejects, instead of a crash or an evaluation that runs for minutes. Refused
    are: the likelihood's RateError and LikelihoodUnderflowError, MemoryError,
    and rates with max_n(λ_n + μ_n) × (longest census interval) > MAX_STEPS (2e6).
    A refused point is remembered so that the gradient Op does not evaluate it again.
    Errors in the data themselves are raised when the Op is built.

    Args:
        data: CountData or a (times, counts) pair.
        detection: None, a fixed probability, or "estimate" (then p is a third input).
        environment: None, or an environment specification (see :class:`CountLikelihoodOp`).

    Raises:
        CountValueError, ReplicateMismatchError, RateError: at construction, as
        :class:`CountLikelihoodOp`.
    """

    def __init__(self, data: Any, *, detection: float | str | None = None,
                 environment: dict[str, Any] | None = None) -> None:
        super().__init__(data, detection=detection, environment=environment)
        pairs = ([(s.times, s.counts) for s in data.series] if hasattr(data, "series")
                 else [data])
        longest = 0.0
        for times, counts in pairs:
            c = np.asarray(counts, dtype=float).reshape(len(times), -1)
            t = np.asarray(times, dtype=float)[~np.all(np.isnan(c), axis=1)]
            if t.size > 1:
                longest = max(longest, float(np.max(np.diff(t))))
        self.longest_interval = longest
        self.refusals = _Refusals(longest)
        self.grad_op = _GuardedGradOp(self._ev, self.refusals)

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Write the log-likelihood, or −inf for a refused point."""
        if not self.refusals.attempt(inputs, partial(super().perform, node, inputs, outputs)):
            outputs[0][0] = np.asarray(-np.inf)
