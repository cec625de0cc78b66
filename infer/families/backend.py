"""One formula, two backends: the array operations a family's rates are written in.

A family writes its per-capita rates once, in terms of a backend ``xp`` passed in,
and the same code then builds the PyTensor graph of the PyMC model
(:func:`tensor_backend`) and evaluates arrays of posterior draws with numpy
(:data:`NUMPY`). Arithmetic operators work on both as they are; the backends supply
the rest: ``maximum``, ``exp``, ``log``, ``log1p``, ``sigmoid``, ``dot``,
``pad_front`` and ``cumsum``.

On the numpy side scalar parameters arrive as (n_draws, 1) and vector ones as
(n_draws, length), so ``pad_front`` and ``cumsum`` act on the last axis; on the
PyTensor side every value is one point (scalars and 1-D vectors).
"""
from __future__ import annotations

from functools import cache
from typing import Any

import numpy as np

__all__ = ["NumpyBackend", "TensorBackend", "Backend", "NUMPY", "tensor_backend"]


class NumpyBackend:
    """The numpy backend (arrays of draws, operations along the last axis)."""

    maximum = staticmethod(np.maximum)
    exp = staticmethod(np.exp)
    log = staticmethod(np.log)
    log1p = staticmethod(np.log1p)

    @staticmethod
    def sigmoid(x: Any) -> np.ndarray:
        """The logistic function 1/(1 + e^{−x}), written with tanh so it never overflows."""
        return 0.5 * (1.0 + np.tanh(0.5 * np.asarray(x, dtype=float)))

    @staticmethod
    def dot(x: Any, w: np.ndarray) -> np.ndarray:
        """x @ w (rows of draws times a weight matrix)."""
        return np.asarray(x) @ w

    @staticmethod
    def pad_front(x: Any, k: int) -> np.ndarray:
        """``x`` with ``k`` zeros put before its last axis's values."""
        x = np.asarray(x, dtype=float)
        return np.concatenate([np.zeros(x.shape[:-1] + (k,)), x], axis=-1)

    @staticmethod
    def cumsum(x: Any) -> np.ndarray:
        """Cumulative sum along the last axis."""
        return np.cumsum(x, axis=-1)


class TensorBackend:
    """The PyTensor backend (one point: scalar and 1-D tensors)."""

    def __init__(self) -> None:
        import pytensor.tensor as pt

        self.pt = pt
        self.maximum = pt.maximum
        self.exp = pt.exp
        self.log = pt.log
        self.log1p = pt.log1p
        self.sigmoid = pt.sigmoid

    def dot(self, x: Any, w: np.ndarray) -> Any:
        """x · w (a vector times a weight matrix)."""
        return self.pt.dot(x, w)

    def pad_front(self, x: Any, k: int) -> Any:
        """The 1-D tensor ``x`` with ``k`` zeros put before it."""
        return self.pt.concatenate([self.pt.zeros((k,), dtype=x.dtype), x])

    def cumsum(self, x: Any) -> Any:
        """Cumulative sum of the 1-D tensor ``x``."""
        return self.pt.cumsum(x)


#: Either backend (what a family's formulas receive as ``xp``).
Backend = NumpyBackend | TensorBackend

#: The numpy backend.
NUMPY = NumpyBackend()


@cache
def tensor_backend() -> TensorBackend:
    """The PyTensor backend (PyTensor is imported on first use).

    Returns:
        the TensorBackend (one shared instance).

    Raises:
        ImportError: PyTensor is not installed.
    """
    return TensorBackend()
