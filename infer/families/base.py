"""RateFamily: the base class every rate family derives from.

Every family describes per-capita rates and composes them the same way (DESIGN §1):

    λ_n = n · b(n) + ι,        μ_n = n · d(n),        ι ≥ 0 (immigration, optional)

so μ_0 = 0 always and λ_0 = ι (0 is absorbing without immigration). A family class
declares only its own math — its parameters (:mod:`infer.families.parameters`), their
default priors, and b(n), d(n) — in one method (``_per_capita``) written once for both
backends (:mod:`infer.families.backend`). :class:`RateFamily` adds immigration,
resolves priors, draws from them, and evaluates the rates for the PyMC model
(:meth:`RateFamily.pytensor_rates`) and for arrays of posterior draws at any sizes
(:meth:`RateFamily.numpy_rates`) — including sizes beyond the model's cap, where the
formula simply continues, so the push-forward can decide from the tail whether a
stationary law exists.

Default priors are weakly informative on the log scale and are scaled to the data's
own units by a :class:`~infer.families.scale.DataScale`: τ = the median interval
between consecutive surveys, c = the median count (divided by the detection
probability when it is fixed). Rates are centred at a few tenths per census interval
(per-capita birth lognormal(log(0.4/τ), 1.5), death lognormal(log(0.3/τ), 1.5): 90%
prior range a factor of about 12 either side), the carrying capacity at the median
count (lognormal(log c, 1), a factor of about 5 either side) and immigration at one
arrival per census interval (lognormal(log(1/τ), 1.5)). The resolved numbers are recorded in the run's settings
and printed by :meth:`RateFamily.describe`.
"""
from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Mapping
from typing import Any, ClassVar

import numpy as np

from tallyfit.infer.errors import InputError
from tallyfit.infer.families.backend import NUMPY, Backend, tensor_backend
from tallyfit.infer.families.coordinates import SamplingCoordinates
from tallyfit.infer.families.parameters import ParameterSpec
from tallyfit.infer.families.priors import (MODEL_PARAMETERS, check_prior, describe_prior,
                                            lognormal_prior, scipy_prior)
from tallyfit.infer.families.scale import DataScale

__all__ = ["RateFamily"]


class RateFamily(ABC):
    """Base class of the rate families (one subclass per family; see the module docstring).

    Subclasses set ``name``, ``formula`` and implement ``_own_parameters``,
    ``_own_default_priors`` and ``_per_capita``; a family whose rates are computed
    from derived quantities (per-size: the knot values) also implements
    ``_own_derived_parameters`` and ``_derived``. The base class adds immigration,
    composes λ_n = n·b(n) + ι and μ_n = n·d(n), resolves priors and evaluates the
    rates for PyTensor and numpy.

    Three views of the parameters: :attr:`free_parameters` (the specs the model
    builder creates), :attr:`derived_parameters` (the names of the derived quantities
    recorded in the posterior) and :attr:`parameters` (the names :meth:`numpy_rates`
    reads). Whether a quantity is a vector comes from its spec's ``length``.

    Args:
        immigration: include an immigration rate ι > 0 (λ_0 = ι, so 0 is not
            absorbing and a stationary law can exist). Without it ι = 0.

    Attributes:
        name: the registry name ("linear", "logistic", "allee", "per-size").
        formula: the family's rates in words and symbols (for the report).
        immigration: whether ι is a parameter.
    """

    name: ClassVar[str] = ""
    formula: ClassVar[str] = ""
    #: The parameter that site offsets scale under partial pooling (see model.build_model).
    pooled_parameter: ClassVar[str] = "birth_rate"

    def __init__(self, *, immigration: bool = False) -> None:
        if not isinstance(immigration, (bool, np.bool_)):
            raise InputError(f"immigration must be true or false, got {immigration!r}",
                             source=f"family {self.name}")
        self.immigration = bool(immigration)

    # ---- declarations --------------------------------------------------------------
    @abstractmethod
    def _own_parameters(self) -> list[ParameterSpec]:
        """The family's own free parameters (immigration is added by the base class)."""

    @abstractmethod
    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        """Default priors of the family's own free parameters, scaled to the data."""

    @abstractmethod
    def _per_capita(self, xp: Backend, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        """Per-capita (b(n), d(n)) for parameter values ``p`` at sizes ``n``.

        ``n`` is the backend's array of sizes (a PyTensor constant, or numpy of shape
        (1, n_sizes)); ``sizes`` the same sizes as a plain 1-D numpy array.
        """

    def _own_derived_parameters(self) -> list[ParameterSpec]:
        """Specs of the quantities :meth:`_derived` computes. Default none."""
        return []

    def _derived(self, xp: Backend, p: Mapping[str, Any]) -> dict[str, Any]:
        """Derived quantities the rates need (recorded as Deterministics). Default none."""
        return {}

    @property
    def free_parameters(self) -> list[ParameterSpec]:
        """The parameters the model builder creates, with their support and shape.

        Returns:
            list of ParameterSpec (the family's own, then immigration if included).
        """
        specs = list(self._own_parameters())
        if self.immigration:
            specs.append(ParameterSpec("immigration", "positive",
                                       "ι, arrivals per unit time (λ_0 = ι)"))
        return specs

    @property
    def parameters(self) -> tuple[str, ...]:
        """Readable names of the quantities the rates are computed from (numpy_rates reads these).

        For the parametric families these are the free parameters; for per-size they
        are the derived knot values (and immigration).
        """
        return tuple(s.name for s in self.free_parameters)

    @property
    def derived_parameters(self) -> tuple[str, ...]:
        """Names of derived quantities recorded in the posterior (empty for most families)."""
        return tuple(s.name for s in self._own_derived_parameters())

    def site_parameters(self, params: Mapping[str, Any], offset: Any) -> dict[str, Any]:
        """The parameters of one site under partial pooling of site-level growth.

        The pooled parameter (``pooled_parameter``: birth_rate, or for per-size the log
        birth knots) is shifted on the log scale by the site's offset u:
        b_site = b·exp(u) (per-size: log b(s_j) + u). Every other parameter is shared.

        Args:
            params: {name: value}; PyTensor tensors (offset a scalar tensor), or numpy
                draws (scalars (n_draws,), vectors (n_draws, length); offset (n_draws,)).
            offset: the site's offset u.

        Returns:
            a new dict with the pooled parameter replaced.
        """
        out = dict(params)
        name = self.pooled_parameter
        value = out[name]
        if isinstance(offset, (np.ndarray, float, int)):
            u = np.asarray(offset, dtype=float)
            v = np.asarray(value, dtype=float)
            if name.startswith("log_"):
                out[name] = v + (u.reshape(-1, 1) if v.ndim == 2 else u)
            else:
                out[name] = v * np.exp(u)
        else:
            import pytensor.tensor as pt

            out[name] = value + offset if name.startswith("log_") else value * pt.exp(offset)
        return out

    @property
    def options(self) -> dict[str, Any]:
        """The family's construction options (recorded in the run settings)."""
        return {"immigration": self.immigration}

    def adapt(self, scale: DataScale) -> "RateFamily":
        """A copy of the family fitted to a data set's scale (per-size places its knots).

        Args:
            scale: the data's scales.

        Returns:
            the family itself for families that need nothing from the data.
        """
        return self

    # ---- priors --------------------------------------------------------------------
    def default_priors(self, scale: DataScale | None = None) -> dict[str, dict[str, Any]]:
        """Default priors of every overridable free parameter, scaled to the data.

        Args:
            scale: the data's scales (default DataScale(): τ = 1, c = 10).

        Returns:
            {parameter name: prior specification}.
        """
        scale = DataScale() if scale is None else scale
        out = dict(self._own_default_priors(scale))
        if self.immigration:
            out["immigration"] = lognormal_prior(1.0 / scale.time_scale)
        return out

    def resolve_priors(self, overrides: Mapping[str, Any] | None = None,
                       scale: DataScale | None = None) -> dict[str, dict[str, Any]]:
        """Default priors with a run's overrides applied, every one checked.

        Args:
            overrides: {parameter name: prior specification}, e.g. a TOML [priors] table.
                Entries for parameters of other parts of the model (e.g. ``detection``,
                ``site_scale``, see MODEL_PARAMETERS) are left for the model builder.
            scale: the data's scales for the defaults.

        Returns:
            {name: checked specification} for this family's parameters.

        Raises:
            InputError: an override for a parameter this family does not have (and the
                model does not know), for a structural parameter, or a bad specification.
        """
        priors = self.default_priors(scale)
        specs = {s.name: s for s in self.free_parameters}
        for name, spec in (overrides or {}).items():
            if name in MODEL_PARAMETERS:
                continue
            if name not in specs:
                raise InputError(f"the {self.name} family has no parameter {name!r}",
                                 source=f"priors.{name}",
                                 hint="parameters with priors: "
                                      + ", ".join(n for n in priors))
            if specs[name].structural:
                raise InputError(f"the prior of {name} is part of the {self.name} family's "
                                 "definition and cannot be changed", source=f"priors.{name}")
            priors[name] = spec
        return {n: check_prior(n, s, specs[n].support) for n, s in priors.items()}

    def admissible(self, p: Mapping[str, Any]) -> np.ndarray:
        """Which parameter points lie in the family's support beyond each parameter's own.

        Args:
            p: {name: array of draws} of the free parameters.

        Returns:
            bool array over the draws (all true unless the family restricts a
            combination, e.g. logistic b > d).
        """
        n = max((np.asarray(v).shape[0] for v in p.values() if np.ndim(v)), default=1)
        return np.ones(n, dtype=bool)

    def sampling_coordinates(self, scale: DataScale) -> SamplingCoordinates | None:
        """Coordinates the sampler should use instead of the named parameters, if any.

        Args:
            scale: the data's scales.

        Returns:
            a SamplingCoordinates, or None to sample each parameter on its own scale.
        """
        return None

    def draw_prior(self, priors: Mapping[str, Mapping[str, Any]], n: int,
                   rng: np.random.Generator) -> dict[str, np.ndarray]:
        """Independent draws from the family's prior (with derived quantities).

        Each free parameter is drawn from its prior (:func:`scipy_prior`); points
        outside the family's support (:meth:`admissible`) are drawn again, so the
        draws follow the prior restricted to the support.

        Args:
            priors: resolved priors of every free parameter.
            n: number of draws (≥ 1).
            rng: random generator.

        Returns:
            {name: array (n,) or (n, length)} for the free and derived parameters.

        Raises:
            InputError: fewer than one draw in a thousand is admissible (priors that
                barely meet the support).
        """
        specs = self.free_parameters
        kept: dict[str, list[np.ndarray]] = {s.name: [] for s in specs}
        have, tried = 0, 0
        while have < n:
            m = max(n - have, 16)
            batch = {s.name: np.asarray(scipy_prior(priors[s.name]).rvs(
                size=(m, s.length) if s.length else m, random_state=rng), dtype=float)
                for s in specs}
            ok = self.admissible(batch)
            for k, v in batch.items():
                kept[k].append(v[ok])
            have += int(ok.sum())
            tried += m
            if tried >= 1000 and have < tried / 1000:
                raise InputError(f"fewer than one prior draw in a thousand meets the {self.name} "
                                 "family's support", source="priors",
                                 hint="centre the priors where the family applies")
        out = {k: np.concatenate(v)[:n] for k, v in kept.items()}
        # the formulas broadcast scalars as (n, 1) against vectors (n, length)
        derived = self._derived(NUMPY, {k: v if v.ndim == 2 else v[:, None]
                                           for k, v in out.items()})
        out.update({k: np.asarray(v) for k, v in derived.items()})
        return out

    # ---- rates ---------------------------------------------------------------------
    def _compose(self, xp: Backend, p: Mapping[str, Any], n: Any,
                 sizes: np.ndarray) -> tuple[Any, Any]:
        b, d = self._per_capita(xp, p, n, sizes)
        birth = n * b
        if self.immigration:
            birth = birth + p["immigration"]
        return birth, n * d

    def pytensor_derived(self, params: Mapping[str, Any]) -> dict[str, Any]:
        """Derived quantities (PyTensor) from the free parameters, for the model builder.

        Args:
            params: {name: tensor} of the free parameters.

        Returns:
            {name: tensor} of derived quantities (empty for most families).
        """
        return self._derived(tensor_backend(), params)

    def pytensor_rates(self, params: Mapping[str, Any], sizes: np.ndarray) -> tuple[Any, Any]:
        """Birth and death rate tensors over ``sizes`` for the PyMC model.

        Args:
            params: {name: scalar tensor} with every name in :attr:`parameters`
                (for per-size also accepted: the free parameters, from which the knot
                values are derived).
            sizes: 1-D integer array of sizes (normally 0..N).

        Returns:
            (birth, death): 1-D tensors over ``sizes`` (float64).

        Raises:
            InputError: a needed parameter is missing.
        """
        import pytensor.tensor as pt

        xp = tensor_backend()
        p = self._with_derived(xp, params)
        sizes = np.asarray(sizes, dtype=float).reshape(-1)
        n = pt.as_tensor_variable(sizes)
        return self._compose(xp, p, n, sizes)

    def numpy_rates(self, draws: Mapping[str, Any], sizes: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Birth and death rates for many parameter draws at any sizes (the formula continues past any cap).

        Args:
            draws: {name: array}; scalar parameters as shape (n_draws,) (or a plain
                number for one draw), vector parameters as (n_draws, length). Extra
                keys are ignored; xarray DataArrays are accepted (flattened over
                leading dimensions beyond the draws by the caller).
            sizes: 1-D array of sizes ≥ 0 (any length; not limited by a cap).

        Returns:
            (birth, death): float arrays (n_draws, len(sizes)).

        Raises:
            InputError: a needed parameter is missing or the draws have different lengths.
        """
        vec = {s.name for s in (*self.free_parameters, *self._own_derived_parameters())
               if s.length is not None}
        known = set(self.parameters) | {s.name for s in self.free_parameters}
        p: dict[str, Any] = {}
        n_draws = 1
        for k, v in draws.items():
            if k not in known:
                continue
            a = np.asarray(v, dtype=float)
            a = np.atleast_2d(a) if k in vec else np.atleast_1d(a).reshape(-1)[:, None]
            if a.shape[0] != 1:
                if n_draws not in (1, a.shape[0]):
                    raise InputError(f"draws of {k!r} have {a.shape[0]} values, others {n_draws}",
                                     source="draws")
                n_draws = a.shape[0]
            p[k] = a
        p = self._with_derived(NUMPY, p)
        sizes = np.asarray(sizes, dtype=float).reshape(-1)
        if np.any(sizes < 0) or np.any(~np.isfinite(sizes)):
            raise InputError("sizes must be finite and >= 0", source="sizes")
        with np.errstate(divide="ignore", invalid="ignore"):
            birth, death = self._compose(NUMPY, p, sizes[None, :], sizes)
        shape = (n_draws, sizes.size)
        return (np.array(np.broadcast_to(birth, shape), dtype=float),
                np.array(np.broadcast_to(death, shape), dtype=float))

    def _with_derived(self, xp: Backend, params: Mapping[str, Any]) -> dict[str, Any]:
        """``params`` with the derived quantities they lack; every needed one checked present."""
        p = dict(params)
        p.update({k: v for k, v in self._derived(xp, p).items() if k not in p})
        missing = [k for k in self.parameters if k not in p]
        if missing:
            raise InputError(f"the {self.name} family needs values for {', '.join(missing)}",
                             source="parameters")
        return p

    # ---- text ----------------------------------------------------------------------
    def describe(self, priors: Mapping[str, Mapping[str, Any]] | None = None) -> str:
        """Plain text for the report: the family, its formula, parameters and priors.

        Args:
            priors: resolved priors (default: :meth:`default_priors` with the default scale).

        Returns:
            a multi-line string.
        """
        priors = self.default_priors() if priors is None else priors
        lines = [f"Rate family: {self.name}", "",
                 "  λ_n = n·b(n)" + (" + ι" if self.immigration else "")
                 + ",  μ_n = n·d(n)", *("  " + ln for ln in self.formula.strip().splitlines()), "",
                 "Parameters and priors:"]
        for s in self.free_parameters:
            shape = f" (vector of {s.length})" if s.length else ""
            prior = describe_prior(priors[s.name]) if s.name in priors else "—"
            lines.append(f"  {s.name}{shape}: {s.description}; prior {prior}")
        coords = self.sampling_coordinates(DataScale())
        if coords is not None:
            lines += ["", f"Sampler coordinates: {coords.description}."]
        return "\n".join(lines)

    def __repr__(self) -> str:
        opts = ", ".join(f"{k}={v!r}" for k, v in self.options.items())
        return f"{type(self).__name__}({opts})"

    def __eq__(self, other: object) -> bool:
        return type(self) is type(other) and self.options == other.options  # type: ignore[attr-defined]

    def __hash__(self) -> int:
        return hash((type(self).__name__, repr(self.options)))

