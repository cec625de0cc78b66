"""The per-size family: a birth and a death rate for every size class, smoothed across sizes."""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np

from tallyfit.infer.errors import InputError
from tallyfit.infer.families.backend import Backend
from tallyfit.infer.families.base import RateFamily
from tallyfit.infer.families.parameters import BIRTH_PER_INTERVAL, DEATH_PER_INTERVAL, ParameterSpec
from tallyfit.infer.families.scale import DataScale

__all__ = ["PerSize"]


class PerSize(RateFamily):
    """A birth and a death rate for every size class, smoothed across sizes.

    log b(n) and log d(n) are piecewise linear in n between J knots s_0 < … < s_{J−1}
    spread evenly over the observed sizes, and constant beyond the first and last knot
    (so beyond any cap the per-capita rates stay at their last values and the tail
    ratio λ_n/μ_{n+1} → b(s_{J−1})/d(s_{J−1}) decides whether a stationary law exists).
    The knot values x_j (for birth; likewise for death) follow a second-order random
    walk, written non-centred for sampling:

        x_0 = level,  x_1 = level + slope,
        x_j − 2·x_{j−1} + x_{j−2} = σ·z_j,  z_j ~ Normal(0, 1)  (j = 2..J−1),

    with smoothness scale σ ~ half-normal. Parameters (birth; death alike with
    ``death`` in the name): ``log_birth_level`` ~ normal(log(0.4/τ), 1.5),
    ``log_birth_slope`` ~ normal(0, 0.5) (change of log b per knot step),
    ``birth_smoothness`` σ ~ halfnormal(0.3), ``birth_innovations`` z (standard
    normal, structural); derived ``log_birth_knots`` (x_0..x_{J−1}), which
    :meth:`numpy_rates` reads. Optional ``immigration`` ι ~ lognormal(log(1/τ), 1.5).

    Args:
        knots: number of knots J (≥ 3, default 6) placed evenly from the smallest to
            the largest observed size when the family is adapted to data, or the knot
            sizes themselves (ascending, ≥ 3 of them, evenly spaced or not; the random
            walk is on the knot index).
        immigration: include ι.

    Raises:
        InputError: fewer than 3 knots, or knot sizes not strictly ascending and ≥ 0.
    """

    name = "per-size"
    formula = ("log b(n), log d(n) piecewise linear between knots s_0..s_{J-1}, flat outside;\n"
               "knot values: second-order random walk, x_j - 2x_{j-1} + x_{j-2} = σ·z_j")
    pooled_parameter = "log_birth_knots"

    def __init__(self, knots: int | Sequence[float] = 6, *, immigration: bool = False) -> None:
        super().__init__(immigration=immigration)
        if isinstance(knots, (int, np.integer)) and not isinstance(knots, bool):
            if knots < 3:
                raise InputError(f"per-size needs at least 3 knots, got {knots}",
                                 source="family per-size", hint="use knots >= 3")
            self.n_knots = int(knots)
            self.knot_sizes: tuple[float, ...] | None = None
        else:
            try:
                ks = np.asarray(knots, dtype=float).reshape(-1)
            except (TypeError, ValueError):
                raise InputError(f"knots must be a number of knots or a list of sizes, got {knots!r}",
                                 source="family per-size") from None
            if ks.size < 3 or np.any(~np.isfinite(ks)) or np.any(ks < 0) or np.any(np.diff(ks) <= 0):
                raise InputError(f"knot sizes must be >= 3 ascending sizes >= 0, got {ks.tolist()}",
                                 source="family per-size")
            self.n_knots = int(ks.size)
            self.knot_sizes = tuple(float(k) for k in ks)

    @property
    def options(self) -> dict[str, Any]:
        """Construction options: knots (count or sizes) and immigration."""
        return {"knots": list(self.knot_sizes) if self.knot_sizes is not None else self.n_knots,
                "immigration": self.immigration}

    def adapt(self, scale: DataScale) -> "PerSize":
        """Place the knots evenly from scale.size_lo to scale.size_hi (if not given).

        Args:
            scale: the data's scales.

        Returns:
            a PerSize with knot sizes set (self if they were given).
        """
        if self.knot_sizes is not None:
            return self
        lo, hi = float(scale.size_lo), float(scale.size_hi)
        if hi - lo < self.n_knots - 1:  # keep knots at least one size apart
            hi = lo + self.n_knots - 1
        return PerSize(list(np.linspace(lo, hi, self.n_knots)), immigration=self.immigration)

    def _knots(self) -> np.ndarray:
        if self.knot_sizes is None:
            raise InputError("per-size knots are not placed yet; call family.adapt(scale) "
                             "or give knot sizes", source="family per-size")
        return np.asarray(self.knot_sizes, dtype=float)

    def _own_parameters(self) -> list[ParameterSpec]:
        J = self.n_knots
        out = []
        for what in ("birth", "death"):
            out += [ParameterSpec(f"log_{what}_level", "real",
                                  f"log per-capita {what} rate at the first knot"),
                    ParameterSpec(f"log_{what}_slope", "real",
                                  f"change of log {what} rate from the first to the second knot"),
                    ParameterSpec(f"{what}_smoothness", "positive",
                                  f"σ, scale of second differences of log {what} rate"),
                    ParameterSpec(f"{what}_innovations", "real",
                                  "standard-normal random-walk innovations", length=J - 2,
                                  structural=True)]
        return out

    @property
    def parameters(self) -> tuple[str, ...]:
        """Names numpy_rates reads: log_birth_knots, log_death_knots (and immigration)."""
        return ("log_birth_knots", "log_death_knots") + (("immigration",) if self.immigration else ())

    def _own_derived_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec(f"log_{what}_knots", "real",
                              f"log per-capita {what} rate at each knot", length=self.n_knots)
                for what in ("birth", "death")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        out: dict[str, dict[str, Any]] = {}
        for what, c in (("birth", BIRTH_PER_INTERVAL), ("death", DEATH_PER_INTERVAL)):
            out[f"log_{what}_level"] = {"dist": "normal", "mu": math.log(c / scale.time_scale),
                                        "sigma": 1.5}
            out[f"log_{what}_slope"] = {"dist": "normal", "mu": 0.0, "sigma": 0.5}
            out[f"{what}_smoothness"] = {"dist": "halfnormal", "sigma": 0.3}
            out[f"{what}_innovations"] = {"dist": "normal", "mu": 0.0, "sigma": 1.0}
        return out

    def _derived(self, xp: Backend, p: Mapping[str, Any]) -> dict[str, Any]:
        out = {}
        J = self.n_knots
        steps = np.arange(J, dtype=float)
        for what in ("birth", "death"):
            names = (f"log_{what}_level", f"log_{what}_slope", f"{what}_smoothness",
                     f"{what}_innovations")
            if not all(k in p for k in names):
                continue
            level, slope, sigma, z = (p[k] for k in names)
            walk = xp.pad_front(xp.cumsum(xp.cumsum(z)), 2)
            out[f"log_{what}_knots"] = level + slope * steps + sigma * walk
        return out

    def interpolation_weights(self, sizes: np.ndarray) -> np.ndarray:
        """Matrix W (len(sizes), J) with log b(n) = W @ x: linear between knots, flat outside.

        Args:
            sizes: 1-D sizes.

        Returns:
            float array; each row sums to 1.
        """
        k = self._knots()
        n = np.clip(np.asarray(sizes, dtype=float).reshape(-1), k[0], k[-1])
        j = np.clip(np.searchsorted(k, n, side="right") - 1, 0, k.size - 2)
        t = (n - k[j]) / (k[j + 1] - k[j])
        w = np.zeros((n.size, k.size))
        rows = np.arange(n.size)
        w[rows, j] = 1.0 - t
        w[rows, j + 1] += t
        return w

    def _per_capita(self, xp: Backend, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        w = self.interpolation_weights(sizes).T  # (J, n_sizes)
        return (xp.exp(xp.dot(p["log_birth_knots"], w)),
                xp.exp(xp.dot(p["log_death_knots"], w)))
