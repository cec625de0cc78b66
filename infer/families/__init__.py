"""Rate families: how a few parameters become birth rates λ_n and death rates μ_n.

Every family describes per-capita rates b(n), d(n) and composes them the same way
(DESIGN §1): λ_n = n·b(n) + ι, μ_n = n·d(n), ι ≥ 0 the optional immigration. The
package, one concept a module:

=================  =====================================================================
module             what it holds
=================  =====================================================================
``priors``         the prior language: one table of distributions (keys, supports,
                   scipy.stats and PyMC builders), check_prior, scipy_prior,
                   describe_prior, the PyMC prior helpers, and the model builder's own
                   parameters (detection, site_scale) with their supports and priors
``backend``        one formula, two backends: :data:`NUMPY` and :func:`tensor_backend`
``scale``          :class:`DataScale`, the data's scales the default priors are set from
``parameters``     :class:`ParameterSpec` and the default birth and death rate priors
``coordinates``    sampler coordinates (:class:`SamplingCoordinates`; the logistic
                   family's :class:`RegulatedCoordinates`)
``base``           :class:`RateFamily`, what every family shares
``linear``,        one family each, declaring only its own math (formula in the class
``logistic``,      docstring)
``allee``,
``per_size``
=================  =====================================================================

This module holds the registry (:data:`FAMILIES`, :func:`get_family`) and re-exports
the public names. The one shared PyMC builder (:func:`infer.model.build_model`) creates
each family's parameters from their prior specifications, calls
:meth:`RateFamily.pytensor_rates`, and fits; :meth:`RateFamily.numpy_rates` evaluates
the same formula for arrays of posterior draws at any sizes.
"""
from __future__ import annotations

from typing import Any

from tallyfit.infer.errors import InputError
from tallyfit.infer.families.allee import Allee
from tallyfit.infer.families.backend import NUMPY, Backend, NumpyBackend, TensorBackend, tensor_backend
from tallyfit.infer.families.base import RateFamily
from tallyfit.infer.families.coordinates import ImmigrationCoordinates, RegulatedCoordinates, SamplingCoordinates
from tallyfit.infer.families.linear import Linear
from tallyfit.infer.families.logistic import Logistic
from tallyfit.infer.families.parameters import ParameterSpec, default_rate_priors
from tallyfit.infer.families.per_size import PerSize
from tallyfit.infer.families.priors import (DISTRIBUTIONS, MODEL_PARAMETER_SPECS, MODEL_PARAMETERS,
                                            MODEL_PRIORS, PRIOR_DISTRIBUTIONS, ModelParameter,
                                            PriorDistribution, check_prior, describe_prior,
                                            lognormal_prior, pymc_prior_logp, pymc_prior_variable,
                                            scipy_prior)
from tallyfit.infer.families.scale import DataScale

__all__ = [
    "DataScale",
    "ParameterSpec",
    "SamplingCoordinates",
    "RegulatedCoordinates",
    "ImmigrationCoordinates",
    "RateFamily",
    "Linear",
    "Logistic",
    "Allee",
    "PerSize",
    "FAMILIES",
    "get_family",
    "check_prior",
    "scipy_prior",
    "describe_prior",
    "lognormal_prior",
    "default_rate_priors",
    "pymc_prior_variable",
    "pymc_prior_logp",
    "PriorDistribution",
    "DISTRIBUTIONS",
    "PRIOR_DISTRIBUTIONS",
    "ModelParameter",
    "MODEL_PARAMETER_SPECS",
    "MODEL_PARAMETERS",
    "MODEL_PRIORS",
    "Backend",
    "NumpyBackend",
    "TensorBackend",
    "NUMPY",
    "tensor_backend",
]

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
