"""PyTensor Ops for the count likelihood: the value Op and its gradient Op.

Both Ops share one evaluator, which caches the last evaluation: the value and all
gradients are computed together, so the gradient Op at the same point costs nothing.
"""
from __future__ import annotations

from typing import Any

import numpy as np
import pytensor.tensor as pt
from pytensor.graph.basic import Apply
from pytensor.graph.op import Op

from tallyfit.chain.errors import RateError

from .evaluate import PreparedCounts, check_detection
from .result import LikelihoodResult

__all__ = ["CountLikelihoodOp", "CountLikelihoodGradOp"]


class _Evaluator:
    """Shared between the value Op and its gradient Op; caches the last evaluation.

    Inputs are (birth, death) followed by ``extras``: "detection" (a scalar, when p is
    estimated), or "sigma", "birth_effects", "death_effects" (scalar and two vectors,
    under environmental variation).
    """

    def __init__(self, data: Any, detection: Any, tol: float, environment: dict[str, Any] | None) -> None:
        times, counts = (data if isinstance(data, tuple) and len(data) == 2 and not hasattr(data, "series")
                         else (data, None))
        self.estimate = isinstance(detection, str)
        if self.estimate and detection != "estimate":
            raise RateError(f"detection must be None, a probability or 'estimate', got "
                            f"{detection!r}", name="detection")
        if environment is not None and detection is not None:
            raise RateError("environmental variation is modelled for exact counts only, not with a detection "
                            "model", name="environment")
        self.prepared = PreparedCounts(times, counts, detection, environment=environment)
        self.fixed_p = None if (detection is None or self.estimate) else check_detection(detection)
        self.extras: tuple[str, ...] = (("detection",) if self.estimate else ()) + (
            ("sigma", "birth_effects", "death_effects") if environment is not None else ())
        self.tol = float(tol)
        self._key: bytes | None = None
        self._res: LikelihoodResult | None = None

    def __call__(self, birth: np.ndarray, death: np.ndarray, *extra: Any) -> LikelihoodResult:
        key = b"".join(np.asarray(v, dtype=np.float64).tobytes() for v in (birth, death, *extra))
        if key != self._key or self._res is None:
            if "sigma" in self.extras:
                self._res = self.prepared.evaluate_environment(birth, death, float(extra[0]), extra[1], extra[2],
                                                               self.tol, True)
            else:
                pv = float(extra[0]) if self.estimate else self.fixed_p
                self._res = self.prepared.evaluate(birth, death, pv, self.tol, True)
            self._key = key
        return self._res

    def gradients(self, r: LikelihoodResult) -> list[np.ndarray]:
        """The gradient outputs, in input order."""
        out = [np.asarray(r.d_birth, dtype=np.float64), np.asarray(r.d_death, dtype=np.float64)]
        for name in self.extras:
            value = {"detection": r.d_detection, "sigma": r.d_sigma, "birth_effects": r.d_birth_effects,
                     "death_effects": r.d_death_effects}[name]
            out.append(np.asarray(value, dtype=np.float64))
        return out

    def output_types(self) -> list[Any]:
        """PyTensor types of the gradient outputs."""
        kinds = {"detection": pt.dscalar, "sigma": pt.dscalar, "birth_effects": pt.dvector,
                 "death_effects": pt.dvector}
        return [pt.dvector(), pt.dvector()] + [kinds[n]() for n in self.extras]


class CountLikelihoodGradOp(Op):
    """Gradients of :class:`CountLikelihoodOp`: one output per input.

    Args:
        evaluator: the value Op's evaluator (the evaluation both Ops read).
    """

    def __init__(self, evaluator: _Evaluator) -> None:
        self._ev = evaluator

    def make_node(self, *inputs: Any) -> Apply:
        """Build the Apply node: the value Op's inputs in, their gradients out."""
        ins = [pt.as_tensor_variable(x) for x in inputs]
        return Apply(self, ins, self._ev.output_types())

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Evaluate (or reuse the cached evaluation) and write the gradients."""
        for out, value in zip(outputs, self._ev.gradients(self._ev(*inputs))):
            out[0] = value


class CountLikelihoodOp(Op):
    """PyTensor Op: (birth, death[, extras]) -> scalar log-likelihood of fixed count data.

    Args:
        data: a data object with ``.series``, a (times, counts) pair, or a list of
            (times, counts) pairs.
        detection: None (exact counts), a fixed probability in (0, 1), or "estimate"
            (then p is a third, scalar input and gets a gradient).
        tol: truncation tolerance passed to the likelihood.
        environment: None, or the environment specification of
            :class:`~tallyfit.infer.likelihood.evaluate.PreparedCounts`; then the inputs are
            (birth, death, sigma, birth_effects, death_effects).

    Raises:
        CountValueError, ReplicateMismatchError, RateError: at construction for
        bad data, detection or environment; the evaluation errors of
        :func:`evaluate_likelihood` when run.
    """

    def __init__(self, data: Any, *, detection: float | str | None = None, tol: float = 1e-10,
                 environment: dict[str, Any] | None = None) -> None:
        self._ev = _Evaluator(data, detection, tol, environment)
        self.grad_op = CountLikelihoodGradOp(self._ev)

    @property
    def extras(self) -> tuple[str, ...]:
        """Names of the inputs after (birth, death)."""
        return self._ev.extras

    def make_node(self, *inputs: Any) -> Apply:
        """Build the Apply node: inputs (birth, death, *extras) as float64, output a scalar.

        Raises:
            TypeError: wrong number of inputs.
        """
        want = 2 + len(self._ev.extras)
        if len(inputs) != want:
            raise TypeError(f"CountLikelihoodOp takes {want} inputs (birth, death"
                            f"{''.join(', ' + n for n in self._ev.extras)}), got {len(inputs)}")
        ins = [pt.as_tensor_variable(x).astype("float64") for x in inputs]
        return Apply(self, ins, [pt.dscalar()])

    def perform(self, node: Apply, inputs: list, outputs: list) -> None:
        """Evaluate the log-likelihood (value and gradients are computed and cached together)."""
        outputs[0][0] = np.asarray(self._ev(*inputs).ll, dtype=np.float64)

    def grad(self, inputs: list, output_grads: list) -> list:
        """Symbolic gradient: the companion Op's outputs times the output gradient."""
        gz = output_grads[0]
        grads = self.grad_op(*inputs)
        return [gz * g for g in grads]

    def last_result(self) -> LikelihoodResult | None:
        """The cached result of the last evaluation (ll, gradients, error bound), or None."""
        return self._ev._res
