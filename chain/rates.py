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

from .errors import RateError

RateSpec = Union[np.ndarray, Callable[[np.ndarray], np.ndarray]]

#: Largest size an unbounded chain is evaluated at when deciding convergence.
MAX_UNBOUNDED_SIZE = 2**22


def _check_values(values: np.ndarray, name: str, offset: int = 0) -> None:
    bad = ~np.isfinite(values) | (values < 0)
    if bad.any():
        n = int(np.flatnonzero(bad)[0])  # the first offending size, whatever the fault
        v = values[n]
        what = "must be finite" if not np.isfinite(v) else f"is negative ({v!r}); rates must be >= 0"
        raise RateError(f"{name} rate at size {n + offset} is {v!r}; rates must be finite" if not np.isfinite(v)
                        else f"{name} rate at size {n + offset} {what}",
                        name=name, size=n + offset, value=float(v))


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
        up_a = np.asarray(up, dtype=float)
        down_a = np.asarray(down, dtype=float)
        if up_a.ndim != 1 or down_a.ndim != 1:
            raise RateError(f"{up_name} and {down_name} must be 1-D arrays over sizes 0..N")
        if up_a.shape != down_a.shape:
            raise RateError(f"{up_name} has {up_a.size} sizes but {down_name} has {down_a.size}; "
                            "give both over the same sizes 0..N")
        if up_a.size < 2:
            raise RateError(f"a chain needs at least sizes 0 and 1; got {up_a.size} size(s)")
        _check_values(up_a, up_name)
        _check_values(down_a, down_name)
        if down_a[0] != 0:
            raise RateError(f"{down_name} rate at size 0 is {down_a[0]!r}; it must be 0 (no loss from an empty population)",
                            name=down_name, size=0, value=float(down_a[0]))
        up_a = up_a.copy()
        up_a[-1] = 0.0  # the cap reflects: no step up from N
        up_a.setflags(write=False)
        down_a = down_a.copy()
        down_a.setflags(write=False)
        return cls(up_a, down_a, up_name, down_name, up_a.size - 1)

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
        if out[1][0] != 0:
            raise RateError(f"{self.down_name} rate at size 0 is {out[1][0]!r}; it must be 0",
                            name=self.down_name, size=0, value=float(out[1][0]))
        return out[0], out[1]

    def at(self, sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Rates at an array of sizes (up rate 0 at the cap)."""
        sizes = np.asarray(sizes)
        if self.finite:
            return np.asarray(self.up_spec)[sizes], np.asarray(self.down_spec)[sizes]
        return (np.broadcast_to(np.asarray(self.up_spec(sizes), dtype=float), sizes.shape),
                np.broadcast_to(np.asarray(self.down_spec(sizes), dtype=float), sizes.shape))
