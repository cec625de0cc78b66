"""The one PyMC model builder: a rate family, priors, an observation model and the count likelihood.

:func:`build_model` turns count data and a rate family (:mod:`infer.families`) into a
PyMC model whose log density is

    log p(θ) + Σ_groups log L(counts | λ(θ), μ(θ) [, p])

where L is the exact count likelihood of :mod:`infer.likelihood` (a PyTensor Op with
a gradient, added as a ``pm.Potential`` named ``count_loglik``), each site conditioned
on its first count (DESIGN §1 "Likelihood"). Rates are evaluated over the sizes
0..N of the cap N.

* Parameters are sampled each on its own unconstrained scale, unless the family
  declares sampling coordinates (:class:`infer.families.SamplingCoordinates`, e.g. the
  logistic family's): then the coordinates are flat variables, the named parameters
  Deterministics of them, and the named parameters' prior density plus the log-Jacobian
  is the Potential ``coordinate_prior``. Either way the posterior holds the named
  parameters, under the same priors.
* Sites share one set of rates by default (one Op over all sites). With
  ``pooling=True`` each site s has its own growth: the family's pooled parameter
  (``birth_rate``; for per-size the log birth knots) is shifted on the log scale by a
  site offset u_s = σ_site · z_s, z_s ~ Normal(0, 1), σ_site ~ halfnormal(0.5)
  (partial pooling, non-centred), and each site has its own Op.
* Detection: None or 1.0 = exact counts; a float p in (0, 1) = each replicate count
  is Binomial(true size, p) with p fixed; "estimate" = p ~ Beta(2, 2) is a parameter
  (identifiable from replicate surveys; a warning is issued without them).

* Good and bad years (``environment``; exact counts only): the per-capita births (and,
  with "births_and_deaths", the deaths) of each census interval are scaled by that
  interval's environment, ε ~ Normal(0, σ²/max(t, 1)), σ = ``environment_sd`` ~
  halfnormal(0.5), and by known covariates, exp(z·β) with ``birth_effect`` /
  ``death_effect`` ~ Normal(0, 1) per unit of each covariate; the likelihood averages
  over ε (:mod:`tallyfit.infer.likelihood.environment`), so no latent value per year is
  sampled.

The pointwise log-likelihood for PSIS-LOO and the log-likelihood of single draws are
computed after sampling by :mod:`tallyfit.infer.draws`.
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tallyfit.infer.covariates import Covariates, interval_design
from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import CapTooSmallError, InputError
from tallyfit.infer.families import (MODEL_PARAMETER_SPECS, MODEL_PRIORS, DataScale, RateFamily,
                                     SamplingCoordinates, check_prior, get_family, pymc_prior_logp,
                                     pymc_prior_variable, scipy_prior, tensor_backend)
from tallyfit.infer.likelihood import GuardedLikelihoodOp
from tallyfit.infer.observation import (DetectionWarning, check_exact_replicates, check_no_return_from_zero,
                                        data_scale, default_cap, normalise_detection)

__all__ = ["MODEL_PRIORS", "ENVIRONMENTS", "PoolingWarning", "Environment", "CountModel", "build_model",
           "build_count_model"]

#: The environment settings: which rates good and bad years move.
ENVIRONMENTS = {"births": "birth", "births_and_deaths": "birth_and_death"}


class PoolingWarning(UserWarning):
    """Partial pooling was asked for but cannot apply (a single site)."""


@dataclass(frozen=True)
class Environment:
    """Good and bad years and known covariates in the rates of each census interval.

    Attributes:
        varying: None (no year-to-year variation), "births" or "births_and_deaths".
        covariates: the covariate table, or None.
        births, deaths: the covariates acting on births and on deaths.
    """

    varying: str | None = None
    covariates: Covariates | None = None
    births: tuple[str, ...] = ()
    deaths: tuple[str, ...] = ()

    def __post_init__(self) -> None:
        if self.varying is not None and self.varying not in ENVIRONMENTS:
            raise InputError(f"year-to-year variation must be one of {', '.join(ENVIRONMENTS)}, not "
                             f"{self.varying!r}", source="varying_years")
        if (self.births or self.deaths) and self.covariates is None:
            raise InputError("covariates are named but no covariate table is given", source="covariates")

    @property
    def active(self) -> bool:
        """True when the rates differ between intervals (variation or covariates)."""
        return self.varying is not None or bool(self.births or self.deaths)

    def specification(self, series: Sequence[Any]) -> dict[str, Any] | None:
        """The likelihood's environment specification for these sites' counts (one covariate
        row per transition), or None when nothing varies between intervals."""
        if not self.active:
            return None
        return {"affects": ENVIRONMENTS[self.varying or "births"],
                "birth_covariates": interval_design(series, self.covariates, self.births, what="births")
                if self.births else None,
                "death_covariates": interval_design(series, self.covariates, self.deaths, what="deaths")
                if self.deaths else None}


NO_ENVIRONMENT = Environment()


# --------------------------------------------------------------------------- the model
@dataclass
class CountModel:
    """A built model and everything needed to use its draws afterwards.

    Attributes:
        model: the PyMC model.
        data: the count data.
        family: the rate family, adapted to the data (per-size knots placed).
        cap: the size cap N (rates over 0..N).
        detection: None, a fixed float p, or "estimate".
        priors: every resolved prior specification used ({name: spec}).
        pooling: whether site offsets are in the model.
        scale: the DataScale the defaults were set from.
        messages: notes and warnings for the user (also issued with warnings.warn).
        ops: the likelihood Ops (one for all sites, or one per site with pooling).
        var_names: names of the posterior variables worth summarising.
        environment: good and bad years and covariates (``Environment``).
    """

    model: Any
    data: CountData
    family: RateFamily
    cap: int
    detection: float | str | None
    priors: dict[str, dict[str, Any]]
    pooling: bool
    scale: DataScale
    messages: list[str] = field(default_factory=list)
    ops: list[Any] = field(default_factory=list)
    var_names: list[str] = field(default_factory=list)
    environment: Environment = NO_ENVIRONMENT

    @property
    def sizes(self) -> np.ndarray:
        """The sizes 0..N the model's rates are evaluated at."""
        return np.arange(self.cap + 1)

    def likelihood_groups(self) -> list[tuple[Any, str | None, dict[str, Any] | None]]:
        """The parts the likelihood is evaluated in: (counts, site or None, environment spec).

        One part for all sites, or one per site with partial pooling (each has its own rates).
        """
        if self.pooling:
            return [((s.times, s.counts), s.site, self.environment.specification([s])) for s in self.data.series]
        return [(self.data, None, self.environment.specification(self.data.series))]


def _coordinate_parameters(coords: SamplingCoordinates, priors: Mapping[str, Mapping[str, Any]]) -> dict[str, Any]:
    """Flat coordinates, the named parameters they determine (Deterministics) and their
    prior density with the Jacobian (the Potential ``coordinate_prior``); see
    :class:`infer.families.SamplingCoordinates`. Must be called inside a model context."""
    import pymc as pm

    start = coords.initial_point({k: float(scipy_prior(priors[k]).median())
                                  for k in coords.replaces})
    y = {k: pm.Flat(k, initval=start[k]) for k in coords.names}
    values, log_jac = coords.to_parameters(tensor_backend(), y)
    params = {k: pm.Deterministic(k, v) for k, v in values.items()}
    pm.Potential("coordinate_prior",
                 sum(pymc_prior_logp(priors[k], v) for k, v in params.items()) + log_jac)
    return params


def build_count_model(data: CountData, family: str | RateFamily, *, cap: int | None = None,
                      detection: Any = None, priors: Mapping[str, Any] | None = None,
                      pooling: bool = False, environment: Environment = NO_ENVIRONMENT) -> CountModel:
    """Build the PyMC model and keep what is needed to use its draws (see build_model).

    Args:
        data: count data (infer.counts.CountData).
        family: a RateFamily or its registry name.
        cap: size cap N (default :func:`default_cap`).
        detection: None/1.0, a probability in (0, 1), or "estimate".
        priors: overrides {parameter: spec} for the family's parameters, "detection"
            and "site_scale".
        pooling: partial pooling of site-level growth.
        environment: good and bad years and covariates (exact counts only).

    Returns:
        CountModel.

    Raises:
        InputError: bad family, detection, priors or cap (CapTooSmallError when a count,
            or a plausible true size, exceeds the cap), replicate counts that disagree
            under exact counts, data that are not CountData, an environment with a
            detection model.
    """
    import pymc as pm

    if not isinstance(data, CountData):
        raise InputError(f"data must be CountData (see tallyfit.inputs.counts_csv.load_counts), not "
                         f"{type(data).__name__}", source="data")
    det = normalise_detection(detection)
    fam = get_family(family)
    scale = data_scale(data, det)
    fam = fam.adapt(scale)
    messages: list[str] = []
    if cap is None:
        cap = default_cap(data, det)
    if isinstance(cap, bool) or not isinstance(cap, (int, np.integer)) or cap < 1:
        raise InputError(f"the maximum size must be a whole number >= 1, got {cap!r}",
                         source="--max-size")
    cap = int(cap)
    if cap < data.max_count:
        raise CapTooSmallError(f"the maximum size {cap} is below the largest count "
                               f"{data.max_count}", source="--max-size",
                               hint=f"use at least {default_cap(data, det)} (the default)")
    if det is None:
        check_exact_replicates(data)
        if not fam.immigration:
            check_no_return_from_zero(data, fam)
    elif environment.active:
        raise InputError("good and bad years and covariates are modelled for exact counts only, not with a "
                         "detection model", source="varying_years",
                         hint="fit without --detection, or without year-to-year variation and covariates")
    if det == "estimate" and not data.has_replicates:
        msg = ("detection is to be estimated but there are no replicate surveys: the "
               "detection probability is then barely identified and its prior "
               "(Beta(2, 2) unless overridden) drives the estimate; survey some occasions "
               "more than once, or fix detection to a known value")
        warnings.warn(msg, DetectionWarning, stacklevel=3)
        messages.append(msg)
    if pooling and data.n_sites < 2:
        msg = "partial pooling needs at least two sites; fitting one site without site offsets"
        warnings.warn(msg, PoolingWarning, stacklevel=3)
        messages.append(msg)
        pooling = False
    if det is not None and det != "estimate":
        top = int(math.ceil(data.max_count / det))
        if cap < top:
            raise CapTooSmallError(f"with detection {det} the largest count {data.max_count} "
                                   f"means about {top} animals, above the maximum size {cap}",
                                   source="--max-size",
                                   hint=f"use at least {default_cap(data, det)} (the default)")

    overrides = dict(priors or {})
    resolved = fam.resolve_priors(overrides, scale)
    model_priors = {}
    if det == "estimate":
        model_priors["detection"] = overrides.get("detection", MODEL_PRIORS["detection"])
    elif "detection" in overrides:
        raise InputError("a prior for detection was given but detection is not estimated",
                         source="priors.detection", hint="use --detection estimate")
    if pooling:
        model_priors["site_scale"] = overrides.get("site_scale", MODEL_PRIORS["site_scale"])
    elif "site_scale" in overrides:
        raise InputError("a prior for site_scale was given but pooling is off",
                         source="priors.site_scale")
    wanted = {"environment_sd": environment.varying is not None, "birth_effect": bool(environment.births),
              "death_effect": bool(environment.deaths)}
    for k, on in wanted.items():
        if on:
            model_priors[k] = overrides.get(k, MODEL_PRIORS[k])
        elif k in overrides:
            raise InputError(f"a prior for {k} was given but the model has no such parameter",
                             source=f"priors.{k}", hint="switch on varying years or name covariates")
    for k, v in model_priors.items():
        resolved[k] = check_prior(k, v, MODEL_PARAMETER_SPECS[k].support)

    coords: dict[str, Any] = {"site": list(data.sites)}
    for dim, names in (("birth_covariate", environment.births), ("death_covariate", environment.deaths)):
        if names:
            coords[dim] = list(names)
    vec_dims: dict[str, str] = {}
    for spec in fam.free_parameters:
        if spec.length:
            dim = f"{spec.name}_index"
            coords[dim] = list(range(spec.length))
            vec_dims[spec.name] = dim
    for name in fam.derived_parameters:
        coords["knot"] = [float(k) for k in getattr(fam, "knot_sizes", ())]
        vec_dims[name] = "knot"

    sizes = np.arange(cap + 1)
    ops = []
    with pm.Model(coords=coords) as model:
        sampler_coords = fam.sampling_coordinates(scale)
        params: dict[str, Any] = (_coordinate_parameters(sampler_coords, resolved)
                                  if sampler_coords is not None else {})
        for spec in fam.free_parameters:
            if spec.name not in params:
                params[spec.name] = pymc_prior_variable(spec.name, resolved[spec.name],
                                                        dims=vec_dims.get(spec.name))
        for name, value in fam.pytensor_derived(params).items():
            params[name] = pm.Deterministic(name, value, dims=vec_dims.get(name))
        extra = []
        if det == "estimate":
            extra = [pymc_prior_variable("detection", resolved["detection"])]
        if environment.active:
            import pytensor.tensor as pt

            extra = [pymc_prior_variable("environment_sd", resolved["environment_sd"])
                     if environment.varying else pt.constant(0.0, dtype="float64"),
                     pymc_prior_variable("birth_effect", resolved["birth_effect"], dims="birth_covariate")
                     if environment.births else pt.zeros((0,), dtype="float64"),
                     pymc_prior_variable("death_effect", resolved["death_effect"], dims="death_covariate")
                     if environment.deaths else pt.zeros((0,), dtype="float64")]
        op_det = det
        if not pooling:
            op = GuardedLikelihoodOp(data, detection=op_det, environment=environment.specification(data.series))
            ops.append(op)
            birth, death = fam.pytensor_rates(params, sizes)
            total = op(birth, death, *extra)
        else:
            import pytensor.tensor as pt

            site_scale = pymc_prior_variable("site_scale", resolved["site_scale"])
            z = pm.Normal("site_offset_z", 0.0, 1.0, dims="site")
            offset = pm.Deterministic("site_offset", site_scale * z, dims="site")
            if fam.pooled_parameter in {s.name for s in fam.free_parameters}:
                pm.Deterministic(f"site_{fam.pooled_parameter}",
                                 params[fam.pooled_parameter] * pt.exp(offset), dims="site")
            total = 0.0
            for i, s in enumerate(data.series):
                op = GuardedLikelihoodOp((s.times, s.counts), detection=op_det,
                                         environment=environment.specification([s]))
                ops.append(op)
                birth, death = fam.pytensor_rates(fam.site_parameters(params, offset[i]), sizes)
                total = total + op(birth, death, *extra)
        pm.Potential("count_loglik", total)

    var_names = [s.name for s in fam.free_parameters if not s.structural]
    var_names += list(fam.derived_parameters)
    if det == "estimate":
        var_names.append("detection")
    var_names += [k for k, on in wanted.items() if on]
    if pooling:
        var_names += ["site_scale", "site_offset"]
        if fam.pooled_parameter in {s.name for s in fam.free_parameters}:
            var_names.append(f"site_{fam.pooled_parameter}")
    return CountModel(model=model, data=data, family=fam, cap=cap, detection=det,
                      priors=resolved, pooling=pooling, scale=scale, messages=messages,
                      ops=ops, var_names=var_names, environment=environment)


def build_model(data: CountData, family: str | RateFamily, *, cap: int | None = None,
                detection: Any = None, priors: Mapping[str, Any] | None = None,
                pooling: bool = False):
    """The PyMC model of count data under a rate family (the one shared builder).

    Each free parameter of the family gets its prior (defaults scaled to the data, see
    :mod:`infer.families`; overridden by ``priors``); derived quantities (per-size
    knot values) are recorded as Deterministics; the rates over 0..N go into the count
    likelihood Op, added as the Potential ``count_loglik``. See the module docstring
    for pooling and detection.

    Args:
        data: count data (infer.counts.CountData).
        family: a RateFamily or a registry name ("linear", "logistic", "allee", "per-size").
        cap: size cap N (default :func:`default_cap`).
        detection: None or 1.0 (exact counts), a probability in (0, 1) (fixed), or
            "estimate" (p ~ Beta(2, 2); warns with DetectionWarning when there are no
            replicate surveys).
        priors: {parameter: spec} overrides, e.g. a run's TOML [priors] table.
        pooling: partial pooling of site-level growth (site offsets on log birth rate
            with a half-normal scale); ignored with a PoolingWarning for one site.

    Returns:
        pm.Model.

    Raises:
        InputError: see :func:`build_count_model`.
    """
    return build_count_model(data, family, cap=cap, detection=detection, priors=priors,
                             pooling=pooling).model


