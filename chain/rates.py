"""Checking and holding the up/down rates of a birth–death chain.

A chain is either finite (arrays over sizes 0..N; the cap N reflects, so the up rate
at N is ignored) or unbounded (callables giving the rates at any array of sizes).
The same holder serves continuous-time rates (λ_n, μ_n) and step probabilities
(p_n, q_n); only the names in messages differ.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable, Union

import numpy as np
from numpy.typing import ArrayLike

from .errors import RateError

RateSpec = Union[np.ndarray, Callable[[np.ndarray], np.ndarray]]

#: Largest size an unbounded chain is evaluated at when deciding convergence.
MAX_UNBOUNDED_SIZE = 2**22


def _check_values(values: np.ndarray, name: str) -> None:
    bad = ~np.isfinite(values) | (values < 0)
    if bad.any():
        n = int(np.flatnonzero(bad)[0])  # the first offending size, whatever the fault
        v = values[n]
        if np.isfinite(v):
            message = f"{name} rate at size {n} is negative ({v!r}); rates must be >= 0"
        else:
            message = f"{name} rate at size {n} is {v!r}; rates must be finite"
        raise RateError(message, name=name, size=n, value=float(v))


def _check_no_loss_at_zero(down: np.ndarray, down_name: str) -> None:
    if down[0] != 0:
        raise RateError(f"{down_name} rate at size 0 is {down[0]!r}; it must be 0 (no loss from an "
                        "empty population)", name=down_name, size=0, value=float(down[0]))


def check_rate_arrays(up: ArrayLike, down: ArrayLike, *, up_name: str = "birth",
                      down_name: str = "death", min_sizes: int = 2) -> tuple[np.ndarray, np.ndarray, int]:
    """Check up and down rates given as arrays over sizes 0..N (the one rate validator).

    Args:
        up, down: array-likes over sizes 0..N (λ_n, μ_n or p_n, q_n).
        up_name, down_name: names used in messages and on the error ("birth"/"death",
            "p"/"q").
        min_sizes: fewest sizes accepted (2 for a chain: sizes 0 and 1).

    Returns:
        (up, down, N): C-contiguous float64 arrays (the inputs themselves when they are
        already such arrays, not copies) and the cap N = len - 1.

    Raises:
        RateError: not 1-D, different lengths, fewer than ``min_sizes`` sizes, a negative,
            NaN or infinite value (``name``, ``size`` and ``value`` name the first one),
            or a non-zero down rate at size 0.
    """
    up_a = np.asarray(up, dtype=np.float64)
    down_a = np.asarray(down, dtype=np.float64)
    if up_a.ndim != 1 or down_a.ndim != 1:
        raise RateError(f"{up_name} and {down_name} must be 1-D arrays over sizes 0..N, got shapes "
                        f"{up_a.shape} and {down_a.shape}", name=up_name)
    if up_a.shape != down_a.shape:
        raise RateError(f"{up_name} has {up_a.size} sizes but {down_name} has {down_a.size}; "
                        "give both over the same sizes 0..N", name=up_name)
    if up_a.size < min_sizes:
        raise RateError(f"a chain needs at least sizes 0..{min_sizes - 1}; got "
                        f"{up_a.size} size(s)", name=up_name)
    _check_values(up_a, up_name)
    _check_values(down_a, down_name)
    _check_no_loss_at_zero(down_a, down_name)
    return np.ascontiguousarray(up_a), np.ascontiguousarray(down_a), up_a.size - 1


@dataclass(frozen=True)
class Rates:
    """Validated up and down rates.

    Attributes:
        up_name, down_name: names used in messages ("birth"/"death" or "p"/"q").
        cap: N for a finite chain, None for an unbounded one.
    """

    up_spec: RateSpec
    down_spec: RateSpec
    up_name: str
    down_name: str
    cap: int | None

    @classmethod
    def build(cls, up: RateSpec, down: RateSpec, up_name: str, down_name: str) -> "Rates":
        """Validate rates given as two arrays over 0..N or two callables.

        Raises:
            RateError: mixed kinds, different lengths, fewer than two sizes, negative,
                NaN or infinite values, or a non-zero down rate at size 0.
        """
        if callable(up) != callable(down):
            raise RateError(f"{up_name} and {down_name} must both be arrays or both be callables")
        if callable(up):
            rates = cls(up, down, up_name, down_name, None)
            rates.upto(8)  # evaluate once so obvious mistakes surface now
            return rates
        up_a, down_a, cap = check_rate_arrays(up, down, up_name=up_name, down_name=down_name)
        up_a = up_a.copy()
        up_a[-1] = 0.0  # the cap reflects: no step up from N
        up_a.setflags(write=False)
        down_a = down_a.copy()
        down_a.setflags(write=False)
        return cls(up_a, down_a, up_name, down_name, cap)

    @property
    def finite(self) -> bool:
        """True for a chain capped at N."""
        return self.cap is not None

    def upto(self, m: int) -> tuple[np.ndarray, np.ndarray]:
        """Rates over sizes 0..m (finite chains: m is clipped to N).

        Raises:
            RateError: a callable returned a bad shape or bad values.
        """
        if self.finite:
            m = min(m, self.cap)
            return np.asarray(self.up_spec)[: m + 1], np.asarray(self.down_spec)[: m + 1]
        n = np.arange(m + 1)
        out = []
        for spec, name in ((self.up_spec, self.up_name), (self.down_spec, self.down_name)):
            values = np.asarray(spec(n), dtype=float)
            if values.shape == ():
                values = np.full(m + 1, float(values))
            if values.shape != (m + 1,):
                raise RateError(f"{name} callable returned shape {values.shape} for {m + 1} sizes")
            _check_values(values, name)
            out.append(values)
        _check_no_loss_at_zero(out[1], self.down_name)
        return out[0], out[1]

    def at(self, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rates at an array of sizes (up rate 0 at the cap)."""
        sizes = np.asarray(sizes)
        if self.finite:
            return np.asarray(self.up_spec)[sizes], np.asarray(self.down_spec)[sizes]
        return (np.broadcast_to(np.asarray(self.up_spec(sizes), dtype=float), sizes.shape),
                np.broadcast_to(np.asarray(self.down_spec(sizes), dtype=float), sizes.shape))
