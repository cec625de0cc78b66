"""Sampler coordinates: the unconstrained space NUTS moves in, where a family declares one.

:class:`SamplingCoordinates` is the interface the model builder uses;
:class:`RegulatedCoordinates` are the logistic family's, :class:`ImmigrationCoordinates`
the linear family's when it has immigration.
"""
from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Mapping
from typing import Any

from tallyfit.infer.errors import InputError

from tallyfit.infer.families.backend import Backend

__all__ = ["SamplingCoordinates", "RegulatedCoordinates", "ImmigrationCoordinates"]


class SamplingCoordinates(ABC):
    """Unconstrained coordinates the sampler moves in instead of some named parameters.

    NUTS sees each named parameter on its own log (or logit) scale by default. Where
    the data pin down combinations of parameters along a curved ridge, a family can
    declare coordinates that straighten it (a bijection y ↦ θ of the unconstrained
    space onto the parameters' support). The model builder then creates the
    coordinates as flat variables, records the named parameters as deterministic
    functions of them, and adds the parameters' own prior density with the Jacobian:

        log p(y) = Σ_k log p_k(θ_k(y)) + log |det ∂θ/∂y|,

    so the posterior of the named parameters, and their priors, are those of the
    family; only the sampler's geometry changes.

    Subclasses set ``names`` (the coordinates, in order), ``replaces`` (the named
    parameters they determine) and ``description``, and implement
    :meth:`to_parameters` and :meth:`from_parameters`.
    """

    names: tuple[str, ...] = ()
    replaces: tuple[str, ...] = ()
    description: str = ""

    @abstractmethod
    def to_parameters(self, xp: Backend, y: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
        """The named parameters at coordinates ``y`` and log |det ∂θ/∂y|.

        Args:
            xp: the backend (:mod:`.backend`: NUMPY or tensor_backend()).
            y: {coordinate name: value}.

        Returns:
            ({parameter name: value} for every name in ``replaces``, log-Jacobian).
        """

    @abstractmethod
    def from_parameters(self, p: Mapping[str, float]) -> dict[str, float]:
        """Coordinates of a parameter point (the inverse map; used for the initial point).

        Args:
            p: {parameter name: value} inside the family's support.

        Returns:
            {coordinate name: float}.
        """

    def initial_point(self, p: Mapping[str, float]) -> dict[str, float]:
        """Coordinates of a starting point for the sampler at (or, if ``p`` is outside
        the support, near) the parameter point ``p`` (normally the prior medians).

        Args:
            p: {parameter name: value} for every name in ``replaces``.

        Returns:
            {coordinate name: float}.
        """
        return self.from_parameters(p)


class RegulatedCoordinates(SamplingCoordinates):
    """Coordinates for λ_n = b·n + ι and μ_n = n·(d + s·n), s = (b − d)/K > 0 (logistic).

    With c the median count (DataScale.count_scale), the data determine well the
    births at the typical size, B = b·c + ι, and whether the typical size is near the
    equilibrium — the balance β = s·c / (B/c − d) of crowding deaths per head at c
    against births per head there net of the baseline death (β = 1 exactly when births
    equal deaths at c: B = c·(d + s·c)). They say little about how B splits into local
    births and immigrants, or how per-capita death splits into the baseline d and
    crowding. In b, d, K, ι those weak directions are curved (b falls as ι rises at
    fixed B; at a fixed balance K shrinks with b − d, and log s bends down as d grows).
    The coordinates

        y_B = log B,  y_φ = logit(ι/B)  (with immigration),
        y_r = logit(d/b),  y_β = log β,

    make them nearly straight: b = B·(1 − φ)/c, ι = B·φ, d = b·r,
    s = β·(B/c − d)/c, K = (b − d)/s. Every point of y is valid (B/c − d ≥ b − d > 0)
    and the map is triangular with ∂ log K/∂y_β = −1, so

        log |det ∂(b, ι, d, K)/∂y| = log b + log ι + log d + log(1 − r) + log K

    (without immigration drop log ι; then B = b·c and β = c/K). The coordinates
    cover exactly b > d (a regulated population).

    Args:
        count_scale: c, the median count.
        immigration: whether ι is a parameter.
    """

    description = ("sampled as log B, logit φ, logit(d/b), log β with B = b·c + ι the births "
                   "at the median count c, φ = ι/B the immigrants' share and "
                   "β = c·(b − d)/K ÷ (B/c − d) the balance of births and deaths at c")

    def __init__(self, count_scale: float, immigration: bool) -> None:
        self.count_scale = float(count_scale)
        self.immigration = bool(immigration)
        self.names = (("log_births_at_median", "logit_immigrant_share") if immigration
                      else ("log_births_at_median",)) + ("logit_death_share",
                                                         "log_balance_at_median")
        self.replaces = ("birth_rate", "death_rate", "carrying_capacity") + (
            ("immigration",) if immigration else ())

    def to_parameters(self, xp: Backend, y: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
        """b, d, K (and ι) at coordinates ``y``, and the log-Jacobian of the class docstring.

        Args:
            xp: the backend (:mod:`.backend`).
            y: {coordinate name: value} for every name in ``names``.

        Returns:
            ({parameter name: value}, log |det ∂θ/∂y|).
        """
        c = self.count_scale
        births = xp.exp(y["log_births_at_median"])
        out: dict[str, Any] = {}
        if self.immigration:
            out["birth_rate"] = births * xp.sigmoid(-y["logit_immigrant_share"]) / c
            out["immigration"] = births * xp.sigmoid(y["logit_immigrant_share"])
        else:
            out["birth_rate"] = births / c
        r = xp.sigmoid(y["logit_death_share"])
        out["death_rate"] = out["birth_rate"] * r
        slope = xp.exp(y["log_balance_at_median"]) * (births / c - out["death_rate"]) / c
        out["carrying_capacity"] = out["birth_rate"] * (1.0 - r) / slope
        log_jac = (xp.log(out["birth_rate"]) + xp.log(out["death_rate"]) + xp.log1p(-r)
                   + xp.log(out["carrying_capacity"]))
        if self.immigration:
            log_jac = log_jac + xp.log(out["immigration"])
        return out, log_jac

    def from_parameters(self, p: Mapping[str, float]) -> dict[str, float]:
        """The coordinates of b, d, K (and ι).

        Args:
            p: {parameter name: value} for every name in ``replaces``.

        Returns:
            {coordinate name: float}.

        Raises:
            InputError: the point is outside b > d > 0, K > 0 (and ι > 0 with immigration).
        """
        b, d, k = float(p["birth_rate"]), float(p["death_rate"]), float(p["carrying_capacity"])
        iota = float(p["immigration"]) if self.immigration else 0.0
        if not (0.0 < d < b and k > 0.0 and (iota > 0.0 or not self.immigration)):
            raise InputError(f"b = {b:g}, d = {d:g}, K = {k:g} is outside b > d > 0, K > 0",
                             source="coordinates")
        c = self.count_scale
        births = b * c + iota
        out = {"log_births_at_median": math.log(births)}
        if self.immigration:
            out["logit_immigrant_share"] = math.log(iota / (b * c))
        out["logit_death_share"] = math.log(d / (b - d))
        out["log_balance_at_median"] = math.log((b - d) / k * c / (births / c - d))
        return out

    def initial_point(self, p: Mapping[str, float]) -> dict[str, float]:
        """As :meth:`from_parameters`, with d lowered to b/2 when it is not below b.

        Args:
            p: {parameter name: value} for every name in ``replaces``.

        Returns:
            {coordinate name: float}.

        Raises:
            InputError: b, K (or ι) not > 0.
        """
        q = dict(p)
        if not float(q["death_rate"]) < float(q["birth_rate"]):
            q["death_rate"] = 0.5 * float(q["birth_rate"])
        return self.from_parameters(q)


class ImmigrationCoordinates(SamplingCoordinates):
    """Coordinates for λ_n = b·g(n)·n + ι: the births at the median count and the immigrants' share.

    The counts determine well the births at the typical size c, B = b·g(c)·c + ι, and
    say little about how B splits into local births and immigrants: in (log b, log ι)
    that weak direction is curved (b falls as ι rises at fixed B), which a dense mass
    matrix cannot straighten and which gave divergent transitions on easy data. The
    coordinates

        y_B = log B,  y_φ = logit(ι/B),  so  b = B·(1 − φ)/(g(c)·c),  ι = B·φ,

    make it straight. Linear family: g = 1. Allee family (``threshold=True``):
    g(n) = n/(A + n) and A is sampled as y_A = log A with them. Every other parameter
    keeps its own scale. The Jacobian is block-triangular (A depends on y_A only) with
    the (b, ι) block [[b, −b·φ], [ι, ι·(1 − φ)]], so

        log |det ∂θ/∂y| = log b + log ι  (+ log A with the threshold).

    Args:
        count_scale: c, the median count.
        threshold: the family has an Allee threshold A ("allee_threshold").
    """

    description = ("b and ι sampled as log B and logit φ, with B the births at the median count c "
                   "and φ = ι/B the immigrants' share")

    def __init__(self, count_scale: float, threshold: bool = False) -> None:
        self.count_scale = float(count_scale)
        self.threshold = bool(threshold)
        self.names = ("log_births_at_median", "logit_immigrant_share") + (
            ("log_allee_threshold",) if threshold else ())
        self.replaces = ("birth_rate", "immigration") + (("allee_threshold",) if threshold else ())

    def to_parameters(self, xp: Backend, y: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
        """b and ι (and A) at coordinates ``y``, and the log-Jacobian of the class docstring.

        Args:
            xp: the backend (:mod:`.backend`).
            y: {coordinate name: value} for every name in ``names``.

        Returns:
            ({parameter name: value}, log |det ∂θ/∂y|).
        """
        c = self.count_scale
        births = xp.exp(y["log_births_at_median"])
        out: dict[str, Any] = {}
        per_head = c  # b·g(c)·c = b·per_head
        if self.threshold:
            out["allee_threshold"] = xp.exp(y["log_allee_threshold"])
            per_head = c * c / (out["allee_threshold"] + c)
        out["birth_rate"] = births * xp.sigmoid(-y["logit_immigrant_share"]) / per_head
        out["immigration"] = births * xp.sigmoid(y["logit_immigrant_share"])
        log_jac = xp.log(out["birth_rate"]) + xp.log(out["immigration"])
        if self.threshold:
            log_jac = log_jac + y["log_allee_threshold"]
        return out, log_jac

    def from_parameters(self, p: Mapping[str, float]) -> dict[str, float]:
        """The coordinates of b and ι (and A).

        Args:
            p: {parameter name: value} for every name in ``replaces``.

        Returns:
            {coordinate name: float}.

        Raises:
            InputError: b, ι (or A) not > 0.
        """
        b, iota = float(p["birth_rate"]), float(p["immigration"])
        a = float(p["allee_threshold"]) if self.threshold else 0.0
        if not (b > 0.0 and iota > 0.0 and (a > 0.0 or not self.threshold)):
            raise InputError(f"b = {b:g}, ι = {iota:g} is outside b > 0, ι > 0", source="coordinates")
        c = self.count_scale
        local = b * c * c / (a + c) if self.threshold else b * c
        out = {"log_births_at_median": math.log(local + iota), "logit_immigrant_share": math.log(iota / local)}
        if self.threshold:
            out["log_allee_threshold"] = math.log(a)
        return out
