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

The pointwise log-likelihood for PSIS-LOO is computed after sampling, one term per
transition (exact counts: per pair of consecutive surveyed times; detection: per
surveyed occasion after a site's first), by :func:`pointwise_log_likelihood`.
"""
from __future__ import annotations

import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import xarray as xr

from tallyfit.infer.data import CountData
from tallyfit.infer.errors import InputError, InvalidRatesError, LikelihoodUnderflowError
from tallyfit.infer.likelihood import CountLikelihoodGradOp, CountLikelihoodOp
from tallyfit.infer.families import (MODEL_PARAMETERS, PRIOR_DISTRIBUTIONS, DataScale, RateFamily,
                             SamplingCoordinates, check_prior, get_family)

__all__ = [
    "MODEL_PRIORS",
    "DetectionWarning",
    "PoolingWarning",
    "CountModel",
    "GuardedLikelihoodOp",
    "build_model",
    "build_count_model",
    "normalise_detection",
    "data_scale",
    "replicate_detection_guess",
    "default_cap",
    "observation_table",
    "pointwise_log_likelihood",
    "site_draws",
    "draw_log_likelihood",
]

#: Default priors of the builder's own parameters (overridable in a run's [priors] table).
MODEL_PRIORS: dict[str, dict[str, Any]] = {
    "detection": {"dist": "beta", "alpha": 2.0, "beta": 2.0},
    "site_scale": {"dist": "halfnormal", "sigma": 0.5},
}
assert set(MODEL_PRIORS) == set(MODEL_PARAMETERS)
_MODEL_SUPPORT = {"detection": "unit", "site_scale": "positive"}


class DetectionWarning(UserWarning):
    """The detection probability is to be estimated but nothing identifies it well."""


class PoolingWarning(UserWarning):
    """Partial pooling was asked for but cannot apply (a single site)."""


# --------------------------------------------------------------------------- settings
def normalise_detection(detection: Any) -> float | str | None:
    """Check a detection setting.

    Args:
        detection: None or 1.0 (exact counts), a probability in (0, 1) (fixed), or
            "estimate" (also accepted: a numeric string such as "0.7").

    Returns:
        None, a float in (0, 1), or "estimate".

    Raises:
        InputError: anything else (names the setting and the choices).
    """
    if detection is None:
        return None
    if isinstance(detection, str):
        text = detection.strip().lower()
        if text in ("estimate", "est", "estimated"):
            return "estimate"
        if text in ("none", "exact", ""):
            return None
        try:
            detection = float(text)
        except ValueError:
            raise InputError(f"detection must be a probability, 'estimate' or 'exact', got "
                             f"{detection!r}", source="--detection") from None
    if isinstance(detection, bool):
        raise InputError(f"detection must be a probability or 'estimate', got {detection!r}",
                         source="--detection")
    try:
        p = float(detection)
    except (TypeError, ValueError):
        raise InputError(f"detection must be a probability or 'estimate', got {detection!r}",
                         source="--detection") from None
    if p == 1.0:
        return None
    if not (0.0 < p < 1.0):
        raise InputError(f"a detection probability must be in (0, 1], got {p!r}",
                         source="--detection", hint="use 1 for exact counts, or 'estimate'")
    return p


def _surveyed_counts(data: CountData) -> list[np.ndarray]:
    """Per site, the (n_surveyed_times, n_replicates) count rows with at least one count."""
    out = []
    for s in data.series:
        keep = ~np.all(np.isnan(s.counts), axis=1)
        out.append(s.counts[keep])
    return out


def replicate_detection_guess(data: CountData) -> float | None:
    """A crude detection probability from replicate surveys, for setting the cap and scales.

    With replicate counts y_1..y_R ~ Binomial(n, p) at one occasion, E y = np and
    Var y = np(1 − p), so p ≈ 1 − (pooled within-occasion variance)/(pooled mean)
    (method of moments, common practice). Only used to size the cap and the default
    priors' scale; the fit estimates p properly.

    Args:
        data: count data.

    Returns:
        the guess clipped to [0.2, 1.0], or None without replicate surveys.
    """
    num = 0.0
    den = 0.0
    for rows in _surveyed_counts(data):
        for r in rows:
            y = r[~np.isnan(r)]
            if y.size >= 2:
                num += float(np.var(y, ddof=1)) * (y.size - 1)
                den += float(np.mean(y)) * (y.size - 1)
    if den <= 0:
        return None
    return float(min(1.0, max(0.2, 1.0 - num / den)))


def _size_factor(data: CountData, detection: float | str | None) -> float:
    """1/p used to turn counts into plausible true sizes."""
    if detection is None:
        return 1.0
    if detection == "estimate":
        guess = replicate_detection_guess(data)
        return 1.0 / (0.5 if guess is None else guess)
    return 1.0 / float(detection)


def data_scale(data: CountData, detection: float | str | None = None) -> DataScale:
    """The scales default priors and per-size knots are set from.

    τ (time_scale) = median interval between consecutive surveyed times over all sites;
    c (count_scale) = median of the per-occasion largest counts (at least 1), times 1/p
    (p fixed, or for "estimate" the replicate guess of :func:`replicate_detection_guess`,
    0.5 without replicates); size_lo and size_hi = the smallest positive and the
    largest per-occasion count, times 1/p.

    Args:
        data: count data.
        detection: normalised detection setting.

    Returns:
        DataScale.
    """
    f = _size_factor(data, detection)
    gaps: list[float] = []
    occ: list[float] = []
    for s, rows in zip(data.series, _surveyed_counts(data)):
        t = s.times[~np.all(np.isnan(s.counts), axis=1)]
        gaps.extend(np.diff(t).tolist())
        occ.extend(np.nanmax(rows, axis=1).tolist())
    occ_a = np.asarray(occ, dtype=float)
    tau = float(np.median(gaps)) if gaps else 1.0
    pos = occ_a[occ_a > 0]
    lo = float(pos.min()) * f if pos.size else 1.0
    hi = max(float(occ_a.max()) * f, lo)
    c = max(1.0, float(np.median(occ_a)) * f)
    return DataScale(time_scale=tau, count_scale=c, size_lo=max(1.0, lo), size_hi=max(1.0, hi))


def default_cap(data: CountData, detection: float | str | None = None) -> int:
    """The default size cap N, well above the largest count.

    With M' = (largest count)/p (p = 1 for exact counts, the fixed p, or for "estimate"
    the replicate guess, 0.5 without replicates):

        N = ceil(max(M' + 3·sqrt(M') + 15, 1.2·M'))

    i.e. about three Poisson-like standard deviations plus 15 above the largest true
    size the data suggest (a regulated population's fluctuations scale as the square
    root of its size). Tight on purpose: the likelihood only follows paths between
    consecutive counts, and its cost grows with N (the push-forward continues each
    family's formula past the cap anyway). Every fit checks it: :func:`infer.fit.fit_counts`
    reports the posterior predictive mass near the cap and how much the log-likelihood
    of posterior draws moves when the cap is doubled, and says to raise the maximum
    size when either is not negligible.

    Args:
        data: count data.
        detection: normalised detection setting.

    Returns:
        the cap N (an int ≥ 20).
    """
    m = data.max_count * _size_factor(data, detection)
    return int(math.ceil(max(m + 3.0 * math.sqrt(m) + 15.0, 1.2 * m)))


# --------------------------------------------------------------------------- observations
def observation_table(data: CountData, detection: float | str | None = None) -> pd.DataFrame:
    """One row per pointwise log-likelihood term (the ``obs`` dimension for LOO).

    Exact counts: one per pair of consecutive surveyed times of a site; with a
    detection model: one per surveyed occasion after the site's first.

    Args:
        data: count data.
        detection: normalised detection setting (only None vs not matters).

    Returns:
        DataFrame with columns site, time_from, time_to, count_from, count_to (the
        largest replicate count at each end).
    """
    rows = []
    for s in data.series:
        keep = ~np.all(np.isnan(s.counts), axis=1)
        t = s.times[keep]
        c = np.nanmax(s.counts[keep], axis=1)
        for i in range(1, t.size):
            rows.append((s.site, float(t[i - 1]), float(t[i]), int(c[i - 1]), int(c[i])))
    return pd.DataFrame(rows, columns=["site", "time_from", "time_to", "count_from", "count_to"])


def _check_exact_replicates(data: CountData) -> None:
    for s in data.series:
        if s.counts.shape[1] < 2:
            continue
        lo = np.nanmin(np.where(np.isnan(s.counts), np.inf, s.counts), axis=1)
        hi = np.nanmax(np.where(np.isnan(s.counts), -np.inf, s.counts), axis=1)
        bad = np.flatnonzero(np.isfinite(lo) & (lo != hi))
        if bad.size:
            i = int(bad[0])
            raise InputError(
                f"site '{s.site}' has replicate counts {int(lo[i])} and {int(hi[i])} at time "
                f"{s.times[i]:g}, but the counts are treated as exact", source=data.source,
                column="count",
                hint="model counting error with detection='estimate' (--detection estimate) "
                     "or a fixed detection probability")


def _check_no_return_from_zero(data: CountData, family: RateFamily) -> None:
    for s in data.series:
        keep = ~np.all(np.isnan(s.counts), axis=1)
        t = s.times[keep]
        c = np.nanmax(s.counts[keep], axis=1)
        bad = np.flatnonzero((c[:-1] == 0) & (c[1:] > 0))
        if bad.size:
            i = int(bad[0])
            raise InputError(
                f"site '{s.site}' is counted 0 at time {t[i]:g} and {int(c[i + 1])} at "
                f"{t[i + 1]:g}: without immigration size 0 is absorbing, so these exact counts "
                f"are impossible under the {family.name} family", source=data.source,
                column="count",
                hint="include immigration (e.g. get_family(name, immigration=True)), or model "
                     "counting error with a detection probability")


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

    @property
    def sizes(self) -> np.ndarray:
        """The sizes 0..N the model's rates are evaluated at."""
        return np.arange(self.cap + 1)


def _prior_distribution(spec: Mapping[str, Any]) -> tuple[Any, dict[str, float]]:
    """The PyMC distribution class of a prior specification and its arguments.

    The specification's keys (PRIOR_DISTRIBUTIONS) are PyMC's own argument names.
    """
    import pymc as pm

    classes = {"lognormal": pm.LogNormal, "halfnormal": pm.HalfNormal, "gamma": pm.Gamma,
               "exponential": pm.Exponential, "uniform": pm.Uniform, "normal": pm.Normal,
               "beta": pm.Beta}
    d = spec["dist"]
    if d not in classes:
        raise InputError(f"unknown prior distribution {d!r}", source="priors")
    # numpy float64, not Python floats: PyTensor's autocasting may store a Python float
    # constant as float32, rounding e.g. a prior's mu (an error of ~1e-8 in the density)
    return classes[d], {k: np.float64(spec[k]) for k in PRIOR_DISTRIBUTIONS[d]}


def _make_rv(name: str, spec: Mapping[str, Any], *, dims: str | None = None):
    cls, kw = _prior_distribution(spec)
    return cls(name, **kw, **({"dims": dims} if dims else {}))


def _prior_logp(spec: Mapping[str, Any], value: Any):
    """Log prior density of ``value`` (a tensor) under a prior specification."""
    import pymc as pm

    cls, kw = _prior_distribution(spec)
    return pm.logp(cls.dist(**kw), value)


def _coordinate_parameters(coords: SamplingCoordinates, priors: Mapping[str, Mapping[str, Any]]) -> dict[str, Any]:
    """Flat coordinates, the named parameters they determine (Deterministics) and their
    prior density with the Jacobian (the Potential ``coordinate_prior``); see
    :class:`infer.families.SamplingCoordinates`. Must be called inside a model context."""
    import pymc as pm

    from tallyfit.infer.families import _Tensor, scipy_prior

    start = coords.initial_point({k: float(scipy_prior(priors[k]).median())
                                  for k in coords.replaces})
    y = {k: pm.Flat(k, initval=start[k]) for k in coords.names}
    values, log_jac = coords.to_parameters(_Tensor(), y)
    params = {k: pm.Deterministic(k, v) for k, v in values.items()}
    pm.Potential("coordinate_prior",
                 sum(_prior_logp(priors[k], v) for k, v in params.items()) + log_jac)
    return params


#: Largest number of uniformization steps (max total rate × longest census interval)
#: a likelihood evaluation may need before the point is treated as impossible.
MAX_STEPS = 2e6
_REFUSED = (InvalidRatesError, LikelihoodUnderflowError, MemoryError)


def _too_fast(birth: np.ndarray, death: np.ndarray, longest_interval: float) -> bool:
    """Rates so high that one census interval needs more than MAX_STEPS steps (or not finite)."""
    top = float(np.max(np.asarray(birth)[:-1] + np.asarray(death)[:-1], initial=0.0))
    top = max(top, float(np.asarray(death)[-1]))
    return not np.isfinite(top) or top * longest_interval > MAX_STEPS


class _Refusals:
    """Shared by the value and gradient Ops: the inputs last refused, so a refused point
    is evaluated (and rejected) once, not once per Op."""

    def __init__(self, longest_interval: float) -> None:
        self.longest_interval = longest_interval
        self.key: bytes | None = None

    @staticmethod
    def _key(inputs: Sequence[Any]) -> bytes:
        return b"".join(np.asarray(x, dtype=np.float64).tobytes() for x in inputs)

    def check(self, inputs: Sequence[Any]) -> None:
        """Raise InvalidRatesError for a point refused before or too fast to evaluate."""
        if self.key is not None and self._key(inputs) == self.key:
            raise InvalidRatesError("this point was refused before")
        if _too_fast(inputs[0], inputs[1], self.longest_interval):
            raise InvalidRatesError("rates too fast for the census intervals")

    def remember(self, inputs: Sequence[Any]) -> None:
        """Record a refused point."""
        self.key = self._key(inputs)


class _GuardedGradOp(CountLikelihoodGradOp):
    """Gradient Op of :class:`GuardedLikelihoodOp`: zeros where the point is refused."""

    def __init__(self, evaluator: Any, refusals: _Refusals) -> None:
        super().__init__(evaluator)
        self.refusals = refusals

    def perform(self, node, inputs, outputs):
        try:
            self.refusals.check(inputs)
            super().perform(node, inputs, outputs)
        except _REFUSED:
            self.refusals.remember(inputs)
            outputs[0][0] = np.zeros_like(np.asarray(inputs[0], dtype=np.float64))
            outputs[1][0] = np.zeros_like(np.asarray(inputs[1], dtype=np.float64))
            if len(outputs) > 2:
                outputs[2][0] = np.asarray(0.0)


class GuardedLikelihoodOp(CountLikelihoodOp):
    """The count likelihood Op, giving −inf (zero gradient) at points it cannot evaluate.

    Far-off parameter values tried by the sampler (early in warm-up a trajectory can
    run to death rates of 1e5 per year) give rates that overflow, transitions too
    improbable for double precision, or a uniformization needing millions of steps.
    Such points have negligible posterior mass (turnover that fast makes the observed
    counts essentially impossible), so they are refused: log-likelihood −inf, which
    NUTS rejects, instead of a crash or an evaluation that runs for minutes. Refused
    are: the likelihood's InvalidRatesError and LikelihoodUnderflowError, MemoryError,
    and rates with max_n(λ_n + μ_n) × (longest census interval) > MAX_STEPS (2e6).
    A refused point is remembered so that the gradient Op does not evaluate it again.
    Errors in the data themselves are raised when the Op is built.

    Args:
        data: CountData or a (times, counts) pair.
        detection: None, a fixed probability, or "estimate" (then p is a third input).
    """

    def __init__(self, data: Any, *, detection: float | str | None = None) -> None:
        super().__init__(data, detection=detection)
        pairs = ([(s.times, s.counts) for s in data.series] if hasattr(data, "series")
                 else [data])
        longest = 0.0
        for times, counts in pairs:
            c = np.asarray(counts, dtype=float).reshape(len(times), -1)
            t = np.asarray(times, dtype=float)[~np.all(np.isnan(c), axis=1)]
            if t.size > 1:
                longest = max(longest, float(np.max(np.diff(t))))
        self.longest_interval = longest
        self.refusals = _Refusals(longest)
        self.grad_op = _GuardedGradOp(self._ev, self.refusals)

    def perform(self, node, inputs, outputs):
        try:
            self.refusals.check(inputs)
            super().perform(node, inputs, outputs)
        except _REFUSED:
            self.refusals.remember(inputs)
            outputs[0][0] = np.asarray(-np.inf)


def build_count_model(data: CountData, family: str | RateFamily, *, cap: int | None = None,
                      detection: Any = None, priors: Mapping[str, Any] | None = None,
                      pooling: bool = False) -> CountModel:
    """Build the PyMC model and keep what is needed to use its draws (see build_model).

    Args:
        data: count data (infer.data.CountData).
        family: a RateFamily or its registry name.
        cap: size cap N (default :func:`default_cap`).
        detection: None/1.0, a probability in (0, 1), or "estimate".
        priors: overrides {parameter: spec} for the family's parameters, "detection"
            and "site_scale".
        pooling: partial pooling of site-level growth.

    Returns:
        CountModel.

    Raises:
        InputError: bad family, detection, priors or cap (CapTooSmallError when a count,
            or a plausible true size, exceeds the cap), replicate counts that disagree
            under exact counts, data that are not CountData.
    """
    import pymc as pm

    if not isinstance(data, CountData):
        raise InputError(f"data must be CountData (see infer.data.load_counts), not "
                         f"{type(data).__name__}", source="data")
    from tallyfit.infer.errors import CapTooSmallError

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
        _check_exact_replicates(data)
        if not fam.immigration:
            _check_no_return_from_zero(data, fam)
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
    for k, v in model_priors.items():
        resolved[k] = check_prior(k, v, _MODEL_SUPPORT[k])

    coords: dict[str, Any] = {"site": list(data.sites)}
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
                params[spec.name] = _make_rv(spec.name, resolved[spec.name],
                                             dims=vec_dims.get(spec.name))
        for name, value in fam.pytensor_derived(params).items():
            params[name] = pm.Deterministic(name, value, dims=vec_dims.get(name))
        extra = []
        if det == "estimate":
            extra = [_make_rv("detection", resolved["detection"])]
        op_det = det
        if not pooling:
            op = GuardedLikelihoodOp(data, detection=op_det)
            ops.append(op)
            birth, death = fam.pytensor_rates(params, sizes)
            total = op(birth, death, *extra)
        else:
            import pytensor.tensor as pt

            site_scale = _make_rv("site_scale", resolved["site_scale"])
            z = pm.Normal("site_offset_z", 0.0, 1.0, dims="site")
            offset = pm.Deterministic("site_offset", site_scale * z, dims="site")
            if fam.pooled_parameter in fam.free_parameter_names:
                pm.Deterministic(f"site_{fam.pooled_parameter}",
                                 params[fam.pooled_parameter] * pt.exp(offset), dims="site")
            total = 0.0
            for i, s in enumerate(data.series):
                op = GuardedLikelihoodOp((s.times, s.counts), detection=op_det)
                ops.append(op)
                birth, death = fam.pytensor_rates(fam.site_parameters(params, offset[i]), sizes)
                total = total + op(birth, death, *extra)
        pm.Potential("count_loglik", total)

    var_names = [s.name for s in fam.free_parameters if not s.structural]
    var_names += list(fam.derived_parameters)
    if det == "estimate":
        var_names.append("detection")
    if pooling:
        var_names += ["site_scale", "site_offset"]
        if fam.pooled_parameter in fam.free_parameter_names:
            var_names.append(f"site_{fam.pooled_parameter}")
    return CountModel(model=model, data=data, family=fam, cap=cap, detection=det,
                      priors=resolved, pooling=pooling, scale=scale, messages=messages,
                      ops=ops, var_names=var_names)


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
        data: count data (infer.data.CountData).
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


# --------------------------------------------------------------------------- after sampling
def site_draws(posterior: xr.Dataset, family: RateFamily, site: str | None = None,
               *, pooled: bool = False) -> dict[str, np.ndarray]:
    """Posterior draws of the quantities ``family.numpy_rates`` reads, flattened over (chain, draw).

    Args:
        posterior: the posterior group (an xarray Dataset with chain and draw dims).
        family: the fitted (adapted) family.
        site: with pooling, the site whose rates are wanted (its offset applied).
        pooled: whether the fit used site offsets.

    Returns:
        {name: array (n_draws,) or (n_draws, length)} in chain-major order.

    Raises:
        InputError: pooled fit without a site, or an unknown site.
    """
    out: dict[str, np.ndarray] = {}
    names = set(family.parameters) | {s.name for s in family.free_parameters}
    for name in names:
        if name in posterior:
            v = posterior[name].stack(sample=("chain", "draw")).transpose("sample", ...)
            out[name] = np.asarray(v.values, dtype=float)
    if pooled:
        if site is None:
            raise InputError("this fit has site offsets: name a site", source="site")
        sites = list(posterior["site_offset"].coords["site"].values)
        if site not in sites:
            raise InputError(f"no site {site!r}; sites are {sites}", source="site")
        off = posterior["site_offset"].sel(site=site).stack(sample=("chain", "draw")).values
        out = family.site_parameters(out, np.asarray(off, dtype=float))
    return out


def _likelihood_evaluator(data: Any, detection: float | str | None):
    """A reusable evaluator (plans built once, warm windows) for pointwise terms.

    Uses the likelihood module's prepared-data object, so that thousands of draws do
    not each re-plan the data (which costs ~40x an evaluation).
    """
    from tallyfit.infer import likelihood as lk

    if isinstance(data, tuple):
        return lk._Prepared(data[0], data[1], detection)
    return lk._Prepared(data, None, detection)


def pointwise_log_likelihood(cm: CountModel, posterior: xr.Dataset,
                             progressbar: bool = False) -> xr.DataArray:
    """Per-observation log-likelihood of every posterior draw (for PSIS-LOO).

    Rates of each draw come from ``family.numpy_rates`` (the formula of the fit), the
    terms from the likelihood module's pointwise evaluation.

    Args:
        cm: the built model.
        posterior: the posterior group.
        progressbar: show a tqdm bar over the draws.

    Returns:
        DataArray (chain, draw, obs), obs labelled as in :func:`observation_table`.
    """
    n_chain = posterior.sizes["chain"]
    n_draw = posterior.sizes["draw"]
    n = n_chain * n_draw
    obs = observation_table(cm.data, cm.detection)
    groups: list[tuple[Any, str | None]]
    if cm.pooling:
        groups = [((s.times, s.counts), s.site) for s in cm.data.series]
    else:
        groups = [(cm.data, None)]
    if cm.detection == "estimate":
        p_all = posterior["detection"].stack(sample=("chain", "draw")).values
    elif cm.detection is None:
        p_all = None
    else:
        p_all = np.full(n, float(cm.detection))
    columns = []
    iterator: Any = range(n)
    for group, site in groups:
        ev = _likelihood_evaluator(group, cm.detection)
        draws = site_draws(posterior, cm.family, site, pooled=cm.pooling)
        birth, death = cm.family.numpy_rates(draws, cm.sizes)
        rows = []
        if progressbar:
            from tqdm.auto import tqdm

            iterator = tqdm(range(n), desc="pointwise log-likelihood", leave=False)
        for k in iterator:
            p = None if p_all is None else float(p_all[k])
            try:
                r = ev.evaluate(birth[k], death[k], p, 1e-10, False)
                rows.append(np.concatenate(r.pointwise))
            except _REFUSED:
                # rates the likelihood refuses (overflow, or data too improbable to
                # represent): this draw gives the data probability 0
                rows.append(np.full(_n_terms(group), -np.inf))
        columns.append(np.asarray(rows))
    values = np.concatenate(columns, axis=1).reshape(n_chain, n_draw, -1)
    if values.shape[2] != len(obs):
        raise RuntimeError(f"the likelihood returned {values.shape[2]} pointwise terms, "
                           f"expected {len(obs)}")
    return xr.DataArray(values, dims=("chain", "draw", "obs"),
                        coords={"chain": posterior.coords["chain"].values,
                                "draw": posterior.coords["draw"].values,
                                "obs": np.arange(len(obs)),
                                "obs_site": ("obs", obs["site"].astype(str).values),
                                "obs_time": ("obs", obs["time_to"].values)},
                        name="counts")


def _n_terms(group: Any) -> int:
    if isinstance(group, tuple):
        counts = group[1]
        return int(np.count_nonzero(~np.all(np.isnan(counts), axis=1))) - 1
    return sum(int(np.count_nonzero(~np.all(np.isnan(s.counts), axis=1))) - 1
               for s in group.series)


def draw_log_likelihood(cm: CountModel, posterior: xr.Dataset, flat_indices: Sequence[int],
                        cap: int | None = None) -> np.ndarray:
    """Total log-likelihood of selected posterior draws, optionally at another cap.

    The rates of each draw are ``family.numpy_rates`` over 0..cap — the family's formula
    continues past the fitted cap, so a larger cap shows how much the fitted cap matters.

    Args:
        cm: the built model.
        posterior: the posterior group.
        flat_indices: draw indices into the (chain, draw) stack, chain-major.
        cap: size cap for the evaluation (default the model's).

    Returns:
        float array, one log-likelihood per selected draw (−inf where the likelihood
        refuses the rates).
    """
    cap = cm.cap if cap is None else int(cap)
    sizes = np.arange(cap + 1)
    idx = np.asarray(flat_indices, dtype=int)
    if cm.detection == "estimate":
        p_all = posterior["detection"].stack(sample=("chain", "draw")).values[idx]
    else:
        p_all = np.full(idx.size, np.nan if cm.detection is None else float(cm.detection))
    groups = ([((s.times, s.counts), s.site) for s in cm.data.series] if cm.pooling
              else [(cm.data, None)])
    total = np.zeros(idx.size)
    for group, site in groups:
        ev = _likelihood_evaluator(group, cm.detection)
        draws = site_draws(posterior, cm.family, site, pooled=cm.pooling)
        draws = {k: v[idx] for k, v in draws.items()}
        birth, death = cm.family.numpy_rates(draws, sizes)
        for k in range(idx.size):
            p = None if cm.detection is None else float(p_all[k])
            try:
                total[k] += ev.evaluate(birth[k], death[k], p, 1e-10, False).ll
            except _REFUSED:
                total[k] = -np.inf
    return total
