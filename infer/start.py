"""A feasible, data-informed starting point for the sampler, checked before any sampling.

PyMC's default start (each prior's mean) can lie where the counts are astronomically
unlikely (a series in the thousands with twofold changes, under rates of a few tenths). So

1. :func:`count_moments` estimates what the counts pin down best: the per-capita growth
   (weighted least squares of the one-step log growth, falling with size for a regulated
   family), the turnover b + d from the spread of the changes, the carrying capacity,
   immigration and the spread of good and bad years. For a linear birth–death process from
   n_0 with r = b − d, E N_t = n_0·e^{rt} and Var N_t = n_0·(b + d)/r·e^{rt}(e^{rt} − 1)
   (→ (b + d)·n_0·t; Bailey 1964, The Elements of Stochastic Processes, ch. 8; Kendall 1948
   — from memory), so the summed squared departures from the mean over the summed
   n_0·e^{rt}(e^{rt} − 1)/r estimate b + d (method of moments). Near its carrying capacity K
   a regulated population varies by ≈ b·K/r_0 (r_0 the growth of a small population; the
   linear-noise approximation, van Kampen 1981 — from memory): r_0 when the counts show no trend;
2. :func:`data_parameters` maps them into the family's parameters, each clipped into its
   prior's 1%–99% range (:data:`START_QUANTILES`);
3. :func:`find_start` evaluates the model's log density term by term there and at PyMC's
   default, takes the best finite one with a finite gradient (jittered variants when neither
   is), or raises InputError saying which term is −inf, where, and what to change (a family,
   a prior, the cap); the chains start around it, jittered from the run's seed.
"""
from __future__ import annotations

import math
import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from tallyfit.infer.errors import InputError
from tallyfit.infer.families import scipy_prior
from tallyfit.infer.model import CountModel
from tallyfit.infer.observation import replicate_detection_guess

__all__ = ["START_QUANTILES", "CHAIN_JITTER", "CountMoments", "StartPoint", "count_moments", "data_parameters",
           "find_start"]

#: Prior quantiles every estimate is clipped into.
START_QUANTILES = (0.01, 0.99)
#: Standard deviation of each chain's jitter around the start, on the sampler's own scales.
CHAIN_JITTER = 0.1
#: Jitter and number of the rescue attempts when neither the data's start nor PyMC's is finite.
RESCUE_JITTER, RESCUE_TRIES = 0.5, 4


@dataclass(frozen=True)
class CountMoments:
    """What the counts say directly about the rates (sizes are counts / detection).

    Attributes:
        growth: mean per-capita growth per unit time (b − d for a linear family); site_growth per site.
        intrinsic_growth: r_0, the per-capita growth of a small population (regulated families), else None.
        carrying_capacity: where the growth regression crosses zero, or the mean of the upper counts.
        turnover: per-capita b + d per unit time at ``typical_size`` (weighted as the estimate).
        immigration: arrivals per unit time (0 when the counts show none).
        environment_sd: year-to-year spread of log births (0 unless the model has it).
        n_transitions: transitions used.
    """

    growth: float
    intrinsic_growth: float | None
    carrying_capacity: float
    turnover: float
    typical_size: float
    immigration: float
    environment_sd: float
    site_growth: tuple[float, ...]
    n_transitions: int


def _size_factor(cm: CountModel) -> float:
    """1/p turning counts into sizes (p fixed, or the replicate guess, 0.5 without replicates)."""
    p = cm.detection if cm.detection != "estimate" else (replicate_detection_guess(cm.data) or 0.5)
    return 1.0 if p is None else 1.0 / float(p)


def _wls(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> np.ndarray:
    sw = np.sqrt(w)[:, None]
    return np.linalg.lstsq(x * sw, y * sw[:, 0], rcond=None)[0]


def _variance_factor(r: np.ndarray, dt: np.ndarray, regulated: bool) -> np.ndarray:
    """Var N_t / (n_0·(b + d)): e^{r dt}(e^{r dt} − 1)/r for a linear process (Bailey 1964), or
    (e^{2r dt} − 1)/(2r) with r the slope of the mean growth n·r(n) at n_0 for a regulated one
    (the linear-noise approximation, van Kampen 1981 — from memory); → dt as r → 0."""
    x, small = r * dt, np.abs(r * dt) < 1e-8
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        g = np.expm1(2 * x) / (2 * np.where(small, 1.0, r)) if regulated else np.exp(x) * np.expm1(x) / np.where(small, 1.0, r)
    return np.where(small, dt, g)


def count_moments(cm: CountModel) -> CountMoments | None:
    """Moment and least-squares estimates of growth, turnover, carrying capacity and immigration.

    Args:
        cm: the built model (its data, detection, family and environment are read).

    Returns:
        CountMoments, or None when no site has two surveyed times with a positive first count.
    """
    factor = _size_factor(cm)
    rows, sizes = [], []
    for k, s in enumerate(cm.data.series):
        t, c = s.surveyed_times, s.largest_counts * factor
        sizes.extend(c.tolist())
        rows += [(k, c[i], c[i + 1], t[i + 1] - t[i]) for i in range(t.size - 1)]
    if not rows:
        return None
    site, n0, n1, dt = (np.asarray(v, dtype=float) for v in zip(*rows))
    sizes_a = np.asarray(sizes, dtype=float)
    regulated = "carrying_capacity" in cm.priors or cm.family.name == "per-size"
    immigrating = cm.family.immigration
    from_zero, pos = n0 == 0, n0 > 0
    if not pos.any():   # nothing but zeros to start from
        return None
    n0p, n1p, dtp = n0[pos], n1[pos], dt[pos]
    y = np.log((n1p + 0.5) / (n0p + 0.5)) / dtp       # one-step log growth per unit time
    w = (n0p + 0.5) * dtp                               # 1 / Var(y) up to the turnover
    r_bar = float(np.sum(w * y) / np.sum(w))
    site_growth = tuple(float(np.sum((w * y)[site[pos] == k]) / max(np.sum(w[site[pos] == k]), 1e-300))
                        for k in range(cm.data.n_sites))
    cols = [np.ones_like(y)] + ([n0p] if regulated else [])
    fitted = len(y) > len(cols) + immigrating
    beta = _wls(np.column_stack(cols + [1.0 / (n0p + 0.5)] * immigrating), y, w) if fitted else np.zeros(3)
    iota = max(float(beta[-1]), 0.0) if immigrating else 0.0
    if immigrating and fitted and iota == 0.0:   # no sign of arrivals: refit without them
        beta = _wls(np.column_stack(cols), y, w)
    if immigrating and from_zero.any():
        iota = max(iota, float(np.mean(n1[from_zero] / dt[from_zero])))
    upper = sizes_a[sizes_a >= np.quantile(sizes_a, 0.75)]
    k_cap = max(float(np.mean(upper)), 1.0)
    r0: float | None = None
    if regulated and fitted and beta[0] > 0 and beta[1] < 0:
        k_reg = -float(beta[0]) / float(beta[1])
        if 0.5 * float(np.median(sizes_a)) <= k_reg <= 3.0 * float(sizes_a.max()):
            k_cap, r0 = k_reg, float(beta[0])
    if r0 is not None:   # the logistic mean path from n_0, and the slope of n·r(n) there
        slope, mean = r0 * (1.0 - 2.0 * n0p / k_cap), k_cap / (1.0 + (k_cap / n0p - 1.0) * np.exp(-r0 * dtp))
    else:
        slope, mean = np.full_like(n0p, r_bar), n0p * np.exp(r_bar * dtp)
    g = _variance_factor(slope, dtp, r0 is not None)
    dev2 = (n1p - mean) ** 2
    typical = float(np.sum(n0p ** 2 * g) / np.sum(n0p * g))
    sigma_env = 0.0   # with good and bad years: Var = n_0·s·g + (mean·b)²·σ²·dt²/max(dt, 1), least squares
    if cm.environment.varying is not None:
        from scipy.optimize import nnls

        scale = np.maximum(mean, 1.0) ** 2
        a = np.column_stack([n0p * g / scale, dtp ** 2 / np.maximum(dtp, 1.0)])
        (s, v), _ = nnls(a, dev2 / scale)
        sigma_env = math.sqrt(v) / max(s / 2.0 + r_bar / 2.0, 1e-12) if v > 0 else 0.0
    else:
        s = float(np.sum(dev2) / np.sum(n0p * g))
    s = max(float(s), 1.1 * abs(r_bar), 1e-6)
    if regulated and r0 is None:   # fluctuation about K: Var ≈ b·K / r_0 with b = s/2 at K
        var_c = float(np.var(sizes_a))
        r0 = max(s / 2.0 * k_cap / var_c if var_c > 0 else s / 2.0, r_bar, 1e-6)
    return CountMoments(growth=r_bar, intrinsic_growth=r0, carrying_capacity=k_cap, turnover=s,
                        typical_size=typical, immigration=iota, environment_sd=sigma_env,
                        site_growth=site_growth, n_transitions=int(len(y)))


def _clip(value: float, spec: dict[str, Any]) -> float:
    lo, hi = scipy_prior(spec).ppf(START_QUANTILES)
    return float(np.clip(value, lo, hi))


def _median(spec: dict[str, Any]) -> float:
    return float(scipy_prior(spec).median())


@dataclass
class DataStart:
    """A start from the counts: the family's named parameters and the model's free variables.

    Attributes:
        parameters: {name: value} of the family's parameters (b, d, K, ι, ... as estimated).
        variables: {free variable: value} for PyMC (untransformed; the family's sampler coordinates).
        clipped: {name: (estimate, value used)} for estimates moved into the prior's range.
        moments: the estimates from the counts (None without usable transitions).
    """

    parameters: dict[str, Any]
    variables: dict[str, Any]
    clipped: dict[str, tuple[float, float]] = field(default_factory=dict)
    moments: CountMoments | None = None


def _small_population_rates(mom: CountMoments) -> tuple[float, float]:
    """Per-capita b and d of a small population: b − d the growth (r_0 when regulated, with
    d(n) = d + r_0·n/K), b + d(n) the turnover at the typical size."""
    s, r_bar = mom.turnover, mom.growth
    if mom.intrinsic_growth is None:
        return (s + r_bar) / 2.0, (s - r_bar) / 2.0
    r0, k_cap = mom.intrinsic_growth, mom.carrying_capacity
    b = (s + r0 * (1.0 - mom.typical_size / k_cap)) / 2.0
    return b, b - min(r0, 0.95 * b)


def data_parameters(cm: CountModel) -> DataStart:
    """The start from the counts mapped into the model's parameters, clipped into each prior's range.

    Args:
        cm: the built model.

    Returns:
        DataStart. Parameters without an estimate (smoothness scales, covariate effects,
        random-walk innovations) start at their prior median.
    """
    mom = count_moments(cm)
    pri = cm.priors
    clipped: dict[str, tuple[float, float]] = {}
    est: dict[str, float] = {}

    def put(name: str, value: float) -> None:
        if name in pri:
            v = _clip(value, pri[name])
            if not math.isclose(v, value, rel_tol=1e-9):
                clipped[name] = (float(value), v)
            est[name] = v

    if mom is not None:
        b, d = _small_population_rates(mom)
        if "allee_threshold" in pri:
            put("allee_threshold", _median(pri["allee_threshold"]))
            b *= (est["allee_threshold"] + mom.typical_size) / mom.typical_size
        if "birth_rate" not in pri or "death_rate" not in pri:
            put("birth_rate", b)
            put("death_rate", d)
        else:
            excess = max(b - _clip(math.inf, pri["birth_rate"]), d - _clip(math.inf, pri["death_rate"]), 0.0)
            for name, value in (("birth_rate", b), ("death_rate", d)):   # b − d kept, turnover lowered
                put(name, value - excess)
                if excess > 0:
                    clipped[name] = (float(value), est[name])
        put("carrying_capacity", mom.carrying_capacity)
        if "immigration" in pri:   # no sign of arrivals in the counts: the prior's median
            put("immigration", mom.immigration if mom.immigration > 0 else _median(pri["immigration"]))
        put("environment_sd", mom.environment_sd)
        put("detection", 1.0 / _size_factor(cm))   # estimated detection: the replicates' guess (else 0.5)
        if cm.family.name == "logistic" and not est["death_rate"] < est["birth_rate"]:
            est["death_rate"] = 0.5 * est["birth_rate"]
    params = dict(est)
    variables: dict[str, Any] = {}
    coords = cm.family.sampling_coordinates(cm.scale)
    if coords is not None:
        point = {k: params.get(k, _median(pri[k])) for k in coords.replaces}
        params.update(point)
        variables.update(coords.initial_point(point))
    if cm.family.name == "per-size" and mom is not None:
        _per_size_start(cm, mom, put)
        params.update(est)
    for rv in cm.model.free_RVs:
        name, shape = rv.name, tuple(int(x) for x in rv.shape.eval())
        if name in variables:
            continue
        if name in est:
            variables[name] = np.full(shape, est[name]) if shape else est[name]
        elif name == "site_offset_z" or name.endswith("_innovations"):
            variables[name] = np.zeros(shape)
        elif name in pri:
            variables[name] = np.full(shape, _median(pri[name])) if shape else _median(pri[name])
    if cm.pooling and mom is not None and "site_scale" in variables:
        u = np.log(np.maximum(1.0 + (np.asarray(mom.site_growth) - mom.growth)
                              / max(params.get("birth_rate", 1.0), 1e-12), 0.2))
        put("site_scale", float(np.std(u)) if np.std(u) > 0 else _median(pri["site_scale"]))
        variables["site_scale"] = est["site_scale"]
        variables["site_offset_z"] = np.clip(u / est["site_scale"], -2.5, 2.5)
    return DataStart(parameters=params, variables=variables, clipped=clipped, moments=mom)


def _per_size_start(cm: CountModel, mom: CountMoments, put: Any) -> None:
    """Levels and slopes of log b(n), log d(n) over the knots from the estimated b(n), d(n),
    the turnover lowered (b − d kept) until both are inside their levels' prior ranges."""
    knots = np.asarray(getattr(cm.family, "knot_sizes"), dtype=float)
    b0, d0 = _small_population_rates(mom)
    b = np.full_like(knots, b0)
    d = d0 + (0.0 if mom.intrinsic_growth is None else (b0 - d0) * knots / mom.carrying_capacity)
    top = {w: math.exp(_clip(math.inf, cm.priors[f"log_{w}_level"])) for w in ("birth", "death")}
    excess = max(float(b.max()) - top["birth"], float(d.max()) - top["death"], 0.0)
    j = np.arange(knots.size, dtype=float)
    for what, rate in (("birth", b - excess), ("death", d - excess)):
        slope, level = np.polyfit(j, np.log(np.maximum(rate, 1e-3 * top[what])), 1)
        put(f"log_{what}_level", float(level))
        put(f"log_{what}_slope", float(slope))


# --------------------------------------------------------------------------- the check
@dataclass
class StartPoint:
    """The checked start of a run.

    Attributes:
        point: the start on the sampler's own scales ({value variable: array}).
        source: where it came from ("the counts", "PyMC's default", "the counts, jittered").
        log_density: the model's log density there (priors, Jacobians and likelihood).
        terms: {term: log density}: each prior and each Potential (e.g. count_loglik).
        chain_points: one start per chain: the start jittered by CHAIN_JITTER, each finite.
        data: the start from the counts (estimates, and what was clipped into the priors).
        tried: [(source, log density)] of every candidate evaluated, in order.
        gradient_seconds: wall time of one gradient evaluation at the start (to estimate sampling time).
    """

    point: dict[str, np.ndarray]
    source: str
    log_density: float
    terms: dict[str, float]
    chain_points: list[dict[str, np.ndarray]]
    data: DataStart
    tried: list[tuple[str, float]]
    gradient_seconds: float = math.nan

    def summary(self) -> dict[str, Any]:
        """A JSON-ready record for the run's settings: source, log density, parameters used."""
        return {"from": self.source, "log_density": float(self.log_density), "tried": [list(t) for t in self.tried],
                "parameters": {k: np.asarray(v).tolist() for k, v in self.data.parameters.items()},
                "clipped_into_prior": {k: list(v) for k, v in self.data.clipped.items()}}


class _Density:
    """The model's log density term by term (and its gradient), compiled once."""

    def __init__(self, model: Any) -> None:
        factors = model.basic_RVs + model.potentials
        self.model = model
        self.names = [f.name for f in factors]
        self._terms = model.compile_fn([t.sum() for t in model.logp(factors, sum=False)],
                                       inputs=model.value_vars, on_unused_input="ignore")
        self._grad: Any = None
        self.gradient_seconds = math.nan   # of the last gradient evaluated

    def terms(self, point: dict[str, np.ndarray]) -> dict[str, float]:
        with np.errstate(all="ignore"):   # overflow shows as inf or nan, not as an error
            return {n: float(v) for n, v in zip(self.names, self._terms(point))}

    def gradient_finite(self, point: dict[str, np.ndarray]) -> bool:
        self._grad = self._grad or self.model.compile_dlogp()
        t0 = time.perf_counter()
        with np.errstate(all="ignore"):
            finite = bool(np.all(np.isfinite(self._grad(point))))
        self.gradient_seconds = time.perf_counter() - t0
        return finite


def _total(terms: dict[str, float]) -> float:
    return total if math.isfinite(total := float(sum(terms.values()))) else -math.inf


def _to_point(cm: CountModel, variables: dict[str, Any]) -> dict[str, np.ndarray]:
    from pymc.initial_point import make_initial_point_fn

    fn = make_initial_point_fn(model=cm.model, overrides=dict(variables), return_transformed=True)
    return {k: np.asarray(v, dtype=float) for k, v in fn(0).items()}


def _jittered(point: dict[str, np.ndarray], sd: float, rng: np.random.Generator) -> dict[str, np.ndarray]:
    return {k: v + sd * rng.standard_normal(v.shape) for k, v in point.items()}


def find_start(cm: CountModel, *, chains: int = 1, seed: int = 0) -> StartPoint:
    """A checked, finite start for the sampler, and one jittered start per chain.

    Candidates, in order: the start from the counts (:func:`data_parameters`) and PyMC's
    default start; the one with the highest finite log density (and a finite gradient) is
    taken. When neither is finite, up to RESCUE_TRIES jittered variants of the counts'
    start and the midpoint of the two are tried.

    Args:
        cm: the built model.
        chains: number of chain starts to make.
        seed: seed of the chains' jitter (the same seed gives the same starts).

    Returns:
        StartPoint.

    Raises:
        InputError: no candidate has a finite log density (or gradient); the message names
            the terms that are −inf, the transitions the likelihood cannot give a
            probability to and what to change (a family, a prior, --max-size).
    """
    density = _Density(cm.model)
    data = data_parameters(cm)
    from_counts = _to_point(cm, data.variables)
    default = {k: np.asarray(v, dtype=float) for k, v in cm.model.initial_point().items()}
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x57A87]))
    evaluated: list[tuple[str, dict[str, np.ndarray], dict[str, float]]] = []

    def evaluate(batch: list[tuple[str, dict[str, np.ndarray]]]) -> tuple | None:
        found = []
        for label, point in batch:
            terms = density.terms(point)
            evaluated.append((label, point, terms))
            if math.isfinite(_total(terms)):
                found.append((_total(terms), label, point, terms))
        for total, label, point, terms in sorted(found, key=lambda f: -f[0]):
            if density.gradient_finite(point):
                return label, point, terms
        return None

    best = evaluate([("the counts", from_counts), ("PyMC's default", default)])
    if best is None:
        mid = {k: 0.5 * (from_counts[k] + default[k]) for k in from_counts}
        rescue = [("the counts, jittered", _jittered(from_counts, RESCUE_JITTER, rng)) for _ in range(RESCUE_TRIES)]
        best = evaluate([("midway between the counts and PyMC's default", mid)] + rescue)
    if best is None:
        from tallyfit.infer.no_start import no_start_error

        raise no_start_error(cm, data, from_counts, evaluated)
    label, point, terms = best
    chain_points = []   # each chain's start: jittered, the jitter halved until finite (else the start itself)
    for _ in range(chains):
        trials = (_jittered(point, CHAIN_JITTER / 2 ** a, rng) for a in range(4))
        chain_points.append(next((p for p in trials if math.isfinite(_total(density.terms(p)))), point))
    return StartPoint(point=point, source=label, log_density=_total(terms), terms=terms,
                      chain_points=chain_points, data=data, tried=[(s, _total(t)) for s, _, t in evaluated],
                      gradient_seconds=density.gradient_seconds)
