"""Rate families: how a few parameters become birth rates λ_n and death rates μ_n.

Every family describes per-capita rates and composes them the same way (DESIGN §1):

    λ_n = n · b(n) + ι,        μ_n = n · d(n),        ι ≥ 0 (immigration, optional)

so μ_0 = 0 always and λ_0 = ι (0 is absorbing without immigration). A family class
declares only its own math — its parameters, their default priors, and b(n), d(n) —
in one method (``_per_capita``) written once for both numpy and PyTensor. The one
shared PyMC builder (:func:`infer.model.build_model`) creates the parameters from
the prior specifications, calls :meth:`RateFamily.pytensor_rates`, and fits.
:meth:`RateFamily.numpy_rates` evaluates the same formula for arrays of posterior
draws at any sizes — including sizes beyond the model's cap, where the formula simply
continues, so the push-forward can decide from the tail whether a stationary law
exists. A family may also declare the coordinates the sampler should move in
(:class:`SamplingCoordinates`; the logistic family does) and a support narrower than
its parameters' own (:meth:`RateFamily.admissible`; logistic: b > d).

Priors
------
A prior specification is a dict such as ``{"dist": "lognormal", "mu": -1.0,
"sigma": 1.5}`` (the form of a run's TOML ``[priors]`` table). Distributions:

=============  ======================  ========================
dist           keys                    support
=============  ======================  ========================
lognormal      mu, sigma               positive
halfnormal     sigma                   positive (≥ 0)
gamma          alpha, beta (rate)      positive
exponential    lam (rate)              positive
uniform        lower, upper            within [lower, upper]
normal         mu, sigma               real
beta           alpha, beta             (0, 1)
=============  ======================  ========================

Default priors are weakly informative on the log scale and are scaled to the data's
own units by a :class:`DataScale`: τ = the median interval between consecutive
surveys, c = the median count (divided by the detection probability when it is
fixed). Rates are centred at a few tenths per census interval (per-capita birth
lognormal(log(0.4/τ), 1.5), death lognormal(log(0.3/τ), 1.5): 90% prior range a
factor of about 12 either side), the carrying capacity at the median count
(lognormal(log c, 1), a factor of about 5 either side) and immigration at one
arrival per census interval (lognormal(log(1/τ), 1.5)). The resolved numbers are
recorded in the run's settings and printed by :meth:`RateFamily.describe`.
"""
from __future__ import annotations

import math
from abc import ABC, abstractmethod
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from typing import Any, ClassVar

import numpy as np

from tallyfit.infer.errors import InputError

__all__ = [
    "DataScale",
    "ParameterSpec",
    "SamplingCoordinates",
    "RegulatedCoordinates",
    "RateFamily",
    "Linear",
    "Logistic",
    "Allee",
    "PerSize",
    "FAMILIES",
    "get_family",
    "check_prior",
    "scipy_prior",
    "PRIOR_DISTRIBUTIONS",
    "MODEL_PARAMETERS",
]

#: Keys each prior distribution needs (besides "dist").
PRIOR_DISTRIBUTIONS: dict[str, tuple[str, ...]] = {
    "lognormal": ("mu", "sigma"),
    "halfnormal": ("sigma",),
    "gamma": ("alpha", "beta"),
    "exponential": ("lam",),
    "uniform": ("lower", "upper"),
    "normal": ("mu", "sigma"),
    "beta": ("alpha", "beta"),
}
#: Parameters of the model builder rather than a family (detection probability, the
#: scale of site offsets under partial pooling); their priors are resolved in infer.model.
MODEL_PARAMETERS: tuple[str, ...] = ("detection", "site_scale")
_POSITIVE_DISTS = frozenset({"lognormal", "halfnormal", "gamma", "exponential", "uniform"})
_REAL_DISTS = frozenset({"normal", "uniform"})
_UNIT_DISTS = frozenset({"beta", "uniform"})


# --------------------------------------------------------------------------- helpers
@dataclass(frozen=True)
class DataScale:
    """The scales of a data set that default priors (and per-size knots) are set from.

    Attributes:
        time_scale: τ, the median interval between consecutive surveyed times (> 0).
        count_scale: c, the median observed count (at least 1), divided by a fixed
            detection probability when there is one.
        size_lo: smallest plausible true size seen (at least 1).
        size_hi: largest plausible true size seen (at least size_lo).
    """

    time_scale: float = 1.0
    count_scale: float = 10.0
    size_lo: float = 1.0
    size_hi: float = 20.0

    def __post_init__(self) -> None:
        for name in ("time_scale", "count_scale", "size_lo", "size_hi"):
            value = getattr(self, name)
            if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
                raise InputError(f"{name} must be a finite number > 0, got {value!r}",
                                 source="DataScale")
        if self.size_hi < self.size_lo:
            raise InputError(f"size_hi ({self.size_hi}) is below size_lo ({self.size_lo})",
                             source="DataScale")


@dataclass(frozen=True)
class ParameterSpec:
    """One free parameter a family asks the model builder to create.

    Attributes:
        name: readable name (also the variable's name in the posterior).
        support: "positive", "real" or "unit" (0..1): which prior distributions fit.
        description: one line for the report.
        length: None for a scalar, else the length of a vector parameter.
        structural: True when the prior is part of the family's definition (e.g. the
            standard-normal innovations of a random walk) and may not be overridden.
    """

    name: str
    support: str
    description: str
    length: int | None = None
    structural: bool = False


def check_prior(name: str, spec: Any, support: str = "positive") -> dict[str, Any]:
    """Check one prior specification and return a clean copy (floats, known keys).

    Args:
        name: the parameter's name (for messages).
        spec: mapping with "dist" and that distribution's keys (PRIOR_DISTRIBUTIONS).
        support: the parameter's support: "positive", "real" or "unit".

    Returns:
        dict with "dist" and float values.

    Raises:
        InputError: not a mapping, unknown distribution, missing, extra or non-finite
            values, non-positive scales, or a distribution whose support does not fit
            the parameter (e.g. a normal prior on a rate).
    """
    where = f"priors.{name}"
    if not isinstance(spec, Mapping):
        raise InputError(f"the prior of {name} must be a table such as "
                         "{dist = \"lognormal\", mu = 0.0, sigma = 1.0}, not "
                         f"{type(spec).__name__}", source=where)
    dist = spec.get("dist")
    if dist not in PRIOR_DISTRIBUTIONS:
        raise InputError(f"unknown prior distribution {dist!r} for {name}",
                         source=where, hint="use one of " + ", ".join(PRIOR_DISTRIBUTIONS))
    keys = PRIOR_DISTRIBUTIONS[dist]
    extra = sorted(set(spec) - set(keys) - {"dist"})
    missing = [k for k in keys if k not in spec]
    if missing or extra:
        raise InputError(f"a {dist} prior needs exactly the keys {', '.join(keys)}"
                         + (f"; missing {', '.join(missing)}" if missing else "")
                         + (f"; unknown {', '.join(extra)}" if extra else ""), source=where)
    out: dict[str, Any] = {"dist": dist}
    for k in keys:
        try:
            v = float(spec[k])
        except (TypeError, ValueError):
            raise InputError(f"{k} must be a number, got {spec[k]!r}", source=where) from None
        if not math.isfinite(v):
            raise InputError(f"{k} must be finite, got {v!r}", source=where)
        out[k] = v
    for k in ("sigma", "alpha", "beta", "lam"):
        if k in out and out[k] <= 0:
            raise InputError(f"{k} must be > 0, got {out[k]!r}", source=where)
    if dist == "uniform" and not out["lower"] < out["upper"]:
        raise InputError(f"uniform prior needs lower < upper, got {out['lower']}, {out['upper']}",
                         source=where)
    allowed = {"positive": _POSITIVE_DISTS, "real": _REAL_DISTS, "unit": _UNIT_DISTS}[support]
    if dist not in allowed:
        raise InputError(f"{name} is {support}-valued; a {dist} prior does not fit",
                         source=where, hint="use one of " + ", ".join(sorted(allowed)))
    if dist == "uniform":
        if support == "positive" and out["lower"] < 0:
            raise InputError(f"{name} is positive; a uniform prior must have lower >= 0",
                             source=where)
        if support == "unit" and (out["lower"] < 0 or out["upper"] > 1):
            raise InputError(f"{name} lies in 0..1; a uniform prior must stay inside it",
                             source=where)
    return out


def scipy_prior(spec: Mapping[str, Any]):
    """The scipy.stats frozen distribution of a prior specification.

    Used to draw parameters for simulation-based calibration and, in tests, as an
    implementation of the prior density independent of PyMC.

    Args:
        spec: a checked prior specification (see :func:`check_prior`).

    Returns:
        a frozen scipy.stats distribution with the same density.

    Raises:
        InputError: unknown distribution.
    """
    from scipy import stats

    d = spec.get("dist")
    if d == "lognormal":
        return stats.lognorm(s=spec["sigma"], scale=math.exp(spec["mu"]))
    if d == "halfnormal":
        return stats.halfnorm(scale=spec["sigma"])
    if d == "gamma":
        return stats.gamma(a=spec["alpha"], scale=1.0 / spec["beta"])
    if d == "exponential":
        return stats.expon(scale=1.0 / spec["lam"])
    if d == "uniform":
        return stats.uniform(loc=spec["lower"], scale=spec["upper"] - spec["lower"])
    if d == "normal":
        return stats.norm(loc=spec["mu"], scale=spec["sigma"])
    if d == "beta":
        return stats.beta(spec["alpha"], spec["beta"])
    raise InputError(f"unknown prior distribution {d!r}", source="priors")


def _describe_prior(spec: Mapping[str, Any]) -> str:
    keys = PRIOR_DISTRIBUTIONS[spec["dist"]]
    args = ", ".join(f"{k}={spec[k]:.4g}" for k in keys)
    text = f"{spec['dist']}({args})"
    if spec["dist"] == "lognormal":
        lo, hi = (math.exp(spec["mu"] + z * spec["sigma"]) for z in (-1.6448536, 1.6448536))
        text += f" [90% prior range {lo:.3g}..{hi:.3g}]"
    return text


class _Numpy:
    """The numpy side of the one-formula-two-backends helpers."""

    maximum = staticmethod(np.maximum)
    exp = staticmethod(np.exp)
    log = staticmethod(np.log)
    log1p = staticmethod(np.log1p)

    @staticmethod
    def sigmoid(x):
        return 0.5 * (1.0 + np.tanh(0.5 * np.asarray(x, dtype=float)))

    @staticmethod
    def dot(x, w):
        return np.asarray(x) @ w

    @staticmethod
    def pad_front(x, k: int):
        x = np.asarray(x, dtype=float)
        return np.concatenate([np.zeros(x.shape[:-1] + (k,)), x], axis=-1)

    @staticmethod
    def cumsum(x):
        return np.cumsum(x, axis=-1)


class _Tensor:
    """The PyTensor side of the one-formula-two-backends helpers."""

    def __init__(self) -> None:
        import pytensor.tensor as pt

        self.pt = pt
        self.maximum = pt.maximum
        self.exp = pt.exp
        self.log = pt.log
        self.log1p = pt.log1p
        self.sigmoid = pt.sigmoid

    def dot(self, x, w):
        return self.pt.dot(x, w)

    def pad_front(self, x, k: int):
        return self.pt.concatenate([self.pt.zeros((k,), dtype=x.dtype), x])

    def cumsum(self, x):
        return self.pt.cumsum(x)


# --------------------------------------------------------------------------- coordinates
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
    def to_parameters(self, xp: Any, y: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
        """The named parameters at coordinates ``y`` and log |det ∂θ/∂y|.

        Args:
            xp: the backend (numpy or PyTensor helpers of this module).
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

    def to_parameters(self, xp: Any, y: Mapping[str, Any]) -> tuple[dict[str, Any], Any]:
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
        """As :meth:`from_parameters`, with d lowered to b/2 when it is not below b."""
        q = dict(p)
        if not float(q["death_rate"]) < float(q["birth_rate"]):
            q["death_rate"] = 0.5 * float(q["birth_rate"])
        return self.from_parameters(q)


# --------------------------------------------------------------------------- base
class RateFamily:
    """Base class of the rate families (one subclass per family; see the module docstring).

    Subclasses set ``name``, ``formula`` and implement ``_own_parameters``,
    ``_own_default_priors`` and ``_per_capita``; the base class adds immigration,
    composes λ_n = n·b(n) + ι and μ_n = n·d(n), resolves priors and evaluates the
    rates for PyTensor and numpy.

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
    def _own_parameters(self) -> list[ParameterSpec]:
        raise NotImplementedError

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        raise NotImplementedError

    def _per_capita(self, xp: Any, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        """Per-capita (b(n), d(n)) for parameter values ``p`` at sizes ``n``.

        ``n`` is the backend's array of sizes (a PyTensor constant, or numpy of shape
        (1, n_sizes)); ``sizes`` the same sizes as a plain 1-D numpy array.
        """
        raise NotImplementedError

    def _derived(self, xp: Any, p: Mapping[str, Any]) -> dict[str, Any]:
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
    def free_parameter_names(self) -> tuple[str, ...]:
        """Names of the free parameters (what the model builder creates)."""
        return tuple(s.name for s in self.free_parameters)

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
        return ()

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
            out["immigration"] = {"dist": "lognormal", "mu": math.log(1.0 / scale.time_scale),
                                  "sigma": 1.5}
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
        derived = self._derived(_Numpy(), {k: v if v.ndim == 2 else v[:, None]
                                           for k, v in out.items()})
        out.update({k: np.asarray(v) for k, v in derived.items()})
        return out

    # ---- rates ---------------------------------------------------------------------
    def _compose(self, xp: Any, p: Mapping[str, Any], n: Any,
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
        return self._derived(_Tensor(), params)

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

        xp = _Tensor()
        p = dict(params)
        p.update({k: v for k, v in self._derived(xp, p).items() if k not in p})
        self._require(p)
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
        xp = _Numpy()
        vec = set(self._vector_parameters()) | {s.name for s in self.free_parameters
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
        p.update({k: v for k, v in self._derived(xp, p).items() if k not in p})
        self._require(p)
        sizes = np.asarray(sizes, dtype=float).reshape(-1)
        if np.any(sizes < 0) or np.any(~np.isfinite(sizes)):
            raise InputError("sizes must be finite and >= 0", source="sizes")
        with np.errstate(divide="ignore", invalid="ignore"):
            birth, death = self._compose(xp, p, sizes[None, :], sizes)
        shape = (n_draws, sizes.size)
        return (np.array(np.broadcast_to(birth, shape), dtype=float),
                np.array(np.broadcast_to(death, shape), dtype=float))

    def _vector_parameters(self) -> tuple[str, ...]:
        return ()

    def _require(self, p: Mapping[str, Any]) -> None:
        missing = [k for k in self.parameters if k not in p]
        if missing:
            raise InputError(f"the {self.name} family needs values for {', '.join(missing)}",
                             source="parameters")

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
            prior = _describe_prior(priors[s.name]) if s.name in priors else "—"
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


def _rate_prior(center: float, sigma: float = 1.5) -> dict[str, Any]:
    return {"dist": "lognormal", "mu": math.log(center), "sigma": sigma}


# --------------------------------------------------------------------------- families
class Linear(RateFamily):
    """Linear birth–death process (optionally with immigration).

    Per-capita rates are constant:

        b(n) = b,   d(n) = d,   so   λ_n = b·n + ι,   μ_n = d·n.

    Parameters: ``birth_rate`` b > 0, ``death_rate`` d > 0, and with
    ``immigration=True`` ``immigration`` ι > 0. Default priors (τ = median census
    interval): b ~ lognormal(log(0.4/τ), 1.5), d ~ lognormal(log(0.3/τ), 1.5),
    ι ~ lognormal(log(1/τ), 1.5).

    Beyond any cap the rates keep growing linearly, so a stationary law exists only
    with immigration and b < d (ratio λ_n/μ_{n+1} → b/d).

    Args:
        immigration: include ι.
    """

    name = "linear"
    formula = "b(n) = b,  d(n) = d   (constant per-capita rates)"

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive", "b, per-capita birth rate"),
                ParameterSpec("death_rate", "positive", "d, per-capita death rate")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return {"birth_rate": _rate_prior(0.4 / scale.time_scale),
                "death_rate": _rate_prior(0.3 / scale.time_scale)}

    def _per_capita(self, xp: Any, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        return p["birth_rate"] + 0.0 * n, p["death_rate"] + 0.0 * n


class Logistic(RateFamily):
    """Logistic birth–death process: per-capita death rises linearly with size.

        b(n) = b,   d(n) = max(0, d + (b − d)·n/K),

    so λ_n = b·n + ι and μ_n = n·(d + (b − d)·n/K): births b·K equal deaths at the
    carrying capacity n = K (without immigration), deaths outrun births above it.
    Parameters: ``birth_rate`` b, ``death_rate`` d (the per-capita death rate of a
    small population), ``carrying_capacity`` K, optional ``immigration`` ι. Default
    priors: b ~ lognormal(log(0.4/τ), 1.5), d ~ lognormal(log(0.3/τ), 1.5),
    K ~ lognormal(log c, 1), ι ~ lognormal(log(1/τ), 1.5) (τ median census interval,
    c median count).

    The family describes a regulated population: its support is b > d (the intrinsic
    growth rate b − d is positive, so per-capita death rises with size and K is a
    stable equilibrium); the priors are those above restricted to b > d. Beyond any
    cap the quadratic deaths continue, so with immigration a stationary law always
    exists. (Evaluated at b < d the formula would describe per-capita death falling
    with size, clipped at zero; the rates functions still accept such values.)

    The sampler works in :class:`RegulatedCoordinates` (births at the median count,
    the immigrants' share, d/b and the balance of births and deaths at the median
    count), which straighten the weakly identified directions; the posterior and
    priors stay on b, d, K, ι.

    Args:
        immigration: include ι.
    """

    name = "logistic"
    formula = ("b(n) = b,  d(n) = max(0, d + (b - d)·n/K)\n"
               "at the carrying capacity n = K births equal deaths: b·K = μ_K\n"
               "support b > d (a regulated population); the priors are restricted to it")

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive", "b, per-capita birth rate"),
                ParameterSpec("death_rate", "positive",
                              "d, per-capita death rate of a small population"),
                ParameterSpec("carrying_capacity", "positive",
                              "K, the size where births balance deaths")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return {"birth_rate": _rate_prior(0.4 / scale.time_scale),
                "death_rate": _rate_prior(0.3 / scale.time_scale),
                "carrying_capacity": _rate_prior(scale.count_scale, 1.0)}

    def _per_capita(self, xp: Any, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        b, d, k = p["birth_rate"], p["death_rate"], p["carrying_capacity"]
        return b + 0.0 * n, xp.maximum(d + (b - d) * n / k, 0.0)

    def admissible(self, p: Mapping[str, Any]) -> np.ndarray:
        """b > d: a regulated population (see the class docstring)."""
        return np.asarray(p["birth_rate"] > p["death_rate"], dtype=bool).reshape(-1)

    def sampling_coordinates(self, scale: DataScale) -> SamplingCoordinates:
        """:class:`RegulatedCoordinates` at the data's median count."""
        return RegulatedCoordinates(scale.count_scale, self.immigration)


class Allee(RateFamily):
    """Logistic deaths with a mate-finding (component) Allee effect on births.

    Per-capita birth is reduced at small sizes by the chance of finding a mate,
    n/(A + n) (the mate-finding form; Dennis 1989, Natural Resource Modeling
    3:481–538, and McCarthy 1997, Ecological Modelling 103:99–102 — from memory):

        b(n) = b·n/(A + n),
        d(n) = max(0, d + c·n),   c = (b·K/(A + K) − d)/K,

    so λ_n = b·n²/(A + n) + ι and μ_n = n·(d + c·n). Births equal deaths at the
    carrying capacity n = K (b(K) = d(K)); since b(n) → 0 as n → 0 while d(n) → d,
    deaths outrun births below a critical size (the strong Allee threshold, the lower
    root of b(n) = d(n)). As A → 0 the family becomes the logistic one.
    Parameters: ``birth_rate`` b (per-capita birth of a large population),
    ``death_rate`` d, ``carrying_capacity`` K, ``allee_threshold`` A (the size at which
    per-capita birth is half of b), optional ``immigration`` ι. Default priors:
    b, d, ι as for the logistic family, K ~ lognormal(log c, 1),
    A ~ lognormal(log(max(1, c/5)), 1).

    If b·K/(A + K) < d, c < 0 and per-capita death is clipped at zero as in the
    logistic family. Beyond any cap the formula continues (quadratic deaths when c > 0).

    Args:
        immigration: include ι.
    """

    name = "allee"
    formula = ("b(n) = b·n/(A + n)   (mate-finding Allee effect)\n"
               "d(n) = max(0, d + c·n),  c = (b·K/(A + K) - d)/K   so b(K) = d(K)")

    def _own_parameters(self) -> list[ParameterSpec]:
        return [ParameterSpec("birth_rate", "positive",
                              "b, per-capita birth rate of a large population"),
                ParameterSpec("death_rate", "positive",
                              "d, per-capita death rate of a small population"),
                ParameterSpec("carrying_capacity", "positive",
                              "K, the size where births balance deaths"),
                ParameterSpec("allee_threshold", "positive",
                              "A, the size at which per-capita birth is half of b")]

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        return {"birth_rate": _rate_prior(0.4 / scale.time_scale),
                "death_rate": _rate_prior(0.3 / scale.time_scale),
                "carrying_capacity": _rate_prior(scale.count_scale, 1.0),
                "allee_threshold": _rate_prior(max(1.0, scale.count_scale / 5.0), 1.0)}

    def _per_capita(self, xp: Any, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        b, d, k, a = (p["birth_rate"], p["death_rate"], p["carrying_capacity"],
                      p["allee_threshold"])
        c = (b * k / (a + k) - d) / k
        return b * n / (a + n), xp.maximum(d + c * n, 0.0)


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

    @property
    def derived_parameters(self) -> tuple[str, ...]:
        """The knot values recorded in the posterior: log_birth_knots, log_death_knots."""
        return ("log_birth_knots", "log_death_knots")

    def _vector_parameters(self) -> tuple[str, ...]:
        return ("log_birth_knots", "log_death_knots", "birth_innovations", "death_innovations")

    def _own_default_priors(self, scale: DataScale) -> dict[str, dict[str, Any]]:
        out: dict[str, dict[str, Any]] = {}
        for what, c in (("birth", 0.4), ("death", 0.3)):
            out[f"log_{what}_level"] = {"dist": "normal", "mu": math.log(c / scale.time_scale),
                                        "sigma": 1.5}
            out[f"log_{what}_slope"] = {"dist": "normal", "mu": 0.0, "sigma": 0.5}
            out[f"{what}_smoothness"] = {"dist": "halfnormal", "sigma": 0.3}
            out[f"{what}_innovations"] = {"dist": "normal", "mu": 0.0, "sigma": 1.0}
        return out

    def _derived(self, xp: Any, p: Mapping[str, Any]) -> dict[str, Any]:
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

    def _per_capita(self, xp: Any, p: Mapping[str, Any], n: Any,
                    sizes: np.ndarray) -> tuple[Any, Any]:
        w = self.interpolation_weights(sizes).T  # (J, n_sizes)
        return (xp.exp(xp.dot(p["log_birth_knots"], w)),
                xp.exp(xp.dot(p["log_death_knots"], w)))


#: The registry of rate families by name.
FAMILIES: dict[str, type[RateFamily]] = {
    "linear": Linear,
    "logistic": Logistic,
    "allee": Allee,
    "per-size": PerSize,
}


def get_family(name: str | RateFamily, **options: Any) -> RateFamily:
    """A rate family by its registry name.

    Args:
        name: "linear", "logistic", "allee" or "per-size" (case-insensitive; "_"
            accepted for "-"), or a RateFamily instance (returned as is when no
            options are given).
        **options: passed to the family (``immigration``; per-size also ``knots``).

    Returns:
        a RateFamily instance.

    Raises:
        InputError: unknown name (the message lists the choices) or options the family
            does not accept.
    """
    if isinstance(name, RateFamily):
        if options:
            return type(name)(**{**name.options, **options})
        return name
    key = str(name).strip().lower().replace("_", "-")
    if key == "persize":
        key = "per-size"
    if key not in FAMILIES:
        raise InputError(f"unknown rate family {name!r}", source="--rates",
                         hint="choose one of " + ", ".join(FAMILIES))
    cls = FAMILIES[key]
    try:
        return cls(**options)
    except TypeError as exc:
        raise InputError(f"the {key} family does not accept these options ({exc})",
                         source="--rates",
                         hint="options: immigration" + (", knots" if cls is PerSize else "")) from None
