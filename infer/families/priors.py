"""The prior language: the distributions a prior may use, checked, and built for scipy and PyMC.

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

Each distribution is one :class:`PriorDistribution` in :data:`DISTRIBUTIONS`: its
keys, the parameter supports it fits, its scipy.stats frozen distribution (for drawing
and as an implementation of the density independent of PyMC) and its PyMC class (the
keys are PyMC's own argument names). The parameters of the model builder rather than
of a family (detection probability, the scale of site offsets) are the table
:data:`MODEL_PARAMETER_SPECS`, with their supports and default priors.
"""
from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from tallyfit.infer.errors import InputError

__all__ = [
    "PriorDistribution",
    "DISTRIBUTIONS",
    "PRIOR_DISTRIBUTIONS",
    "SUPPORTS",
    "ModelParameter",
    "MODEL_PARAMETER_SPECS",
    "MODEL_PARAMETERS",
    "MODEL_PRIORS",
    "check_prior",
    "scipy_prior",
    "describe_prior",
    "lognormal_prior",
    "pymc_prior_variable",
    "pymc_prior_logp",
]

#: The supports a parameter may have: positive, real, or within 0..1.
SUPPORTS: tuple[str, ...] = ("positive", "real", "unit")
_POSITIVE, _REAL, _UNIT = (frozenset({s}) for s in SUPPORTS)
#: Keys that are scales or rates and must be > 0 wherever a distribution has them.
_SCALE_KEYS = ("sigma", "alpha", "beta", "lam")


@dataclass(frozen=True)
class PriorDistribution:
    """One distribution of the prior language.

    Attributes:
        name: the ``dist`` value of a specification.
        keys: the keys a specification needs besides ``dist`` (PyMC's argument names).
        supports: the parameter supports (of :data:`SUPPORTS`) it fits.
        scipy_name: the scipy.stats distribution.
        scipy_args: its arguments from a checked specification.
        pymc_class: the PyMC distribution class.
    """

    name: str
    keys: tuple[str, ...]
    supports: frozenset[str]
    scipy_name: str
    scipy_args: Callable[[Mapping[str, float]], dict[str, float]]
    pymc_class: str


#: Every prior distribution by name.
DISTRIBUTIONS: dict[str, PriorDistribution] = {d.name: d for d in (
    PriorDistribution("lognormal", ("mu", "sigma"), _POSITIVE, "lognorm",
                      lambda s: {"s": s["sigma"], "scale": math.exp(s["mu"])}, "LogNormal"),
    PriorDistribution("halfnormal", ("sigma",), _POSITIVE, "halfnorm",
                      lambda s: {"scale": s["sigma"]}, "HalfNormal"),
    PriorDistribution("gamma", ("alpha", "beta"), _POSITIVE, "gamma",
                      lambda s: {"a": s["alpha"], "scale": 1.0 / s["beta"]}, "Gamma"),
    PriorDistribution("exponential", ("lam",), _POSITIVE, "expon",
                      lambda s: {"scale": 1.0 / s["lam"]}, "Exponential"),
    PriorDistribution("uniform", ("lower", "upper"), _POSITIVE | _REAL | _UNIT, "uniform",
                      lambda s: {"loc": s["lower"], "scale": s["upper"] - s["lower"]}, "Uniform"),
    PriorDistribution("normal", ("mu", "sigma"), _REAL, "norm",
                      lambda s: {"loc": s["mu"], "scale": s["sigma"]}, "Normal"),
    PriorDistribution("beta", ("alpha", "beta"), _UNIT, "beta",
                      lambda s: {"a": s["alpha"], "b": s["beta"]}, "Beta"),
)}
#: Keys each prior distribution needs (besides "dist").
PRIOR_DISTRIBUTIONS: dict[str, tuple[str, ...]] = {k: d.keys for k, d in DISTRIBUTIONS.items()}


@dataclass(frozen=True)
class ModelParameter:
    """A parameter of the model builder rather than of a family.

    Attributes:
        name: the variable's name in the model and in a run's [priors] table.
        support: "positive", "real" or "unit".
        default_prior: its prior unless a run overrides it.
    """

    name: str
    support: str
    default_prior: Mapping[str, Any]


#: The model builder's own parameters: detection probability (estimated detection) and
#: the scale of site offsets (partial pooling); their priors are resolved in infer.model.
MODEL_PARAMETER_SPECS: dict[str, ModelParameter] = {m.name: m for m in (
    ModelParameter("detection", "unit", {"dist": "beta", "alpha": 2.0, "beta": 2.0}),
    ModelParameter("site_scale", "positive", {"dist": "halfnormal", "sigma": 0.5}),
    # year-to-year standard deviation of log per-capita births: half-normal(0.5) puts half
    # its mass below 0.34 and 95% below 1 (a year twice as good as the average is ε ≈ 0.7)
    ModelParameter("environment_sd", "positive", {"dist": "halfnormal", "sigma": 0.5}),
    # effect on log per-capita births (deaths) per unit of a covariate
    ModelParameter("birth_effect", "real", {"dist": "normal", "mu": 0.0, "sigma": 1.0}),
    ModelParameter("death_effect", "real", {"dist": "normal", "mu": 0.0, "sigma": 1.0}),
)}
#: Names of the model builder's own parameters.
MODEL_PARAMETERS: tuple[str, ...] = tuple(MODEL_PARAMETER_SPECS)
#: Default priors of the builder's own parameters (overridable in a run's [priors] table).
MODEL_PRIORS: dict[str, dict[str, Any]] = {k: dict(m.default_prior)
                                           for k, m in MODEL_PARAMETER_SPECS.items()}


def _distribution(spec: Mapping[str, Any]) -> PriorDistribution:
    d = spec.get("dist")
    if d not in DISTRIBUTIONS:
        raise InputError(f"unknown prior distribution {d!r}", source="priors")
    return DISTRIBUTIONS[d]


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
    if dist not in DISTRIBUTIONS:
        raise InputError(f"unknown prior distribution {dist!r} for {name}",
                         source=where, hint="use one of " + ", ".join(DISTRIBUTIONS))
    keys = DISTRIBUTIONS[dist].keys
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
    for k in _SCALE_KEYS:
        if k in out and out[k] <= 0:
            raise InputError(f"{k} must be > 0, got {out[k]!r}", source=where)
    if dist == "uniform" and not out["lower"] < out["upper"]:
        raise InputError(f"uniform prior needs lower < upper, got {out['lower']}, {out['upper']}",
                         source=where)
    if support not in DISTRIBUTIONS[dist].supports:
        allowed = sorted(k for k, d in DISTRIBUTIONS.items() if support in d.supports)
        raise InputError(f"{name} is {support}-valued; a {dist} prior does not fit",
                         source=where, hint="use one of " + ", ".join(allowed))
    if dist == "uniform":
        if support == "positive" and out["lower"] < 0:
            raise InputError(f"{name} is positive; a uniform prior must have lower >= 0",
                             source=where)
        if support == "unit" and (out["lower"] < 0 or out["upper"] > 1):
            raise InputError(f"{name} lies in 0..1; a uniform prior must stay inside it",
                             source=where)
    return out


def scipy_prior(spec: Mapping[str, Any]) -> Any:
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

    d = _distribution(spec)
    return getattr(stats, d.scipy_name)(**d.scipy_args(spec))


def describe_prior(spec: Mapping[str, Any]) -> str:
    """One line for the report, e.g. ``lognormal(mu=-0.9163, sigma=1.5) [90% prior range ...]``.

    Args:
        spec: a checked prior specification.

    Returns:
        the distribution with its arguments; for a lognormal also its central 90% range.

    Raises:
        InputError: unknown distribution.
    """
    keys = _distribution(spec).keys
    args = ", ".join(f"{k}={spec[k]:.4g}" for k in keys)
    text = f"{spec['dist']}({args})"
    if spec["dist"] == "lognormal":
        lo, hi = (math.exp(spec["mu"] + z * spec["sigma"]) for z in (-1.6448536, 1.6448536))
        text += f" [90% prior range {lo:.3g}..{hi:.3g}]"
    return text


def lognormal_prior(median: float, sigma: float = 1.5) -> dict[str, Any]:
    """The lognormal prior specification with a given median.

    Args:
        median: exp(mu), > 0.
        sigma: the log-scale standard deviation (1.5: a 90% range of a factor of about
            12 either side of the median).

    Returns:
        ``{"dist": "lognormal", "mu": log(median), "sigma": sigma}``.

    Raises:
        ValueError: median not > 0 (from math.log).
    """
    return {"dist": "lognormal", "mu": math.log(median), "sigma": sigma}


def _pymc_distribution(spec: Mapping[str, Any]) -> tuple[Any, dict[str, Any]]:
    """The PyMC distribution class of a prior specification and its arguments."""
    import pymc as pm

    d = _distribution(spec)
    # numpy float64, not Python floats: PyTensor's autocasting may store a Python float
    # constant as float32, rounding e.g. a prior's mu (an error of ~1e-8 in the density)
    return getattr(pm, d.pymc_class), {k: np.float64(spec[k]) for k in d.keys}


def pymc_prior_variable(name: str, spec: Mapping[str, Any], dims: str | None = None) -> Any:
    """A PyMC random variable with a prior specification's distribution.

    Must be called inside a PyMC model context.

    Args:
        name: the variable's name.
        spec: a checked prior specification.
        dims: the model dimension of a vector variable (None for a scalar).

    Returns:
        the PyMC random variable.

    Raises:
        InputError: unknown distribution.
    """
    cls, kw = _pymc_distribution(spec)
    return cls(name, **kw, **({"dims": dims} if dims else {}))


def pymc_prior_logp(spec: Mapping[str, Any], value: Any) -> Any:
    """Log prior density of ``value`` under a prior specification, as a PyTensor graph.

    Args:
        spec: a checked prior specification.
        value: a tensor (or number) at which to evaluate the density.

    Returns:
        the log density tensor (elementwise for a vector value).

    Raises:
        InputError: unknown distribution.
    """
    import pymc as pm

    cls, kw = _pymc_distribution(spec)
    return pm.logp(cls.dist(**kw), value)
