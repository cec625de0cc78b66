"""The public likelihood functions, and the prepared data they share with the Ops.

:class:`PreparedCounts` checks and arranges the data once (the pair grouping for exact
counts, :mod:`.exact`; the hidden-size tables with detection, :mod:`.hidden`) and keeps
what each evaluation learns about the windows, so that a sampler's nearby points start
from tight windows. The functions below build one for a single evaluation.
"""
from __future__ import annotations

from typing import Any

import numpy as np

from tallyfit.chain.errors import RateError
from tallyfit.chain.rates import check_rate_arrays

from .environment import DEFAULT_NODES, EnvironmentPlan, evaluate_environment
from .exact import ExactPlan, evaluate_exact
from .hidden import DetectionPlan, evaluate_detection
from .result import LikelihoodResult
from .series import as_series

__all__ = ["PreparedCounts", "check_detection", "evaluate_likelihood", "log_likelihood",
           "log_likelihood_grad", "pointwise_log_likelihood"]


def check_detection(p: Any) -> float:
    """Check a fixed detection probability.

    Args:
        p: the probability that one survey counts a given animal.

    Returns:
        p as a float.

    Raises:
        RateError: p not in (0, 1) (name "detection").
        TypeError, ValueError: p is not a number.
    """
    pv = float(p)
    if not (0.0 < pv < 1.0):
        raise RateError(f"detection probability must be in (0, 1), got {p!r} (for exact "
                        f"counts pass detection=None)", name="detection", value=pv)
    return pv


class PreparedCounts:
    """Count data checked and arranged once, reused across evaluations (as inside the Op).

    Keeps the pair grouping (exact counts) or the hidden-size tables (detection) and the
    window sizes that the last evaluation found sufficient, so repeated evaluations at
    nearby rates (a sampler's trajectory) start from tight windows.

    Args:
        times, counts: as for :func:`log_likelihood`.
        detection: kept for reference; the model used is chosen per evaluate() call.
        environment: None, or how environmental variation enters (exact counts only):
            {"affects": "birth" | "birth_and_death", "birth_covariates": (n_pairs, J) or
            None, "death_covariates": (n_pairs, L) or None, "nodes": K} (see
            :mod:`.environment`; covariate rows in the order of the transitions, site by
            site).

    Raises:
        CountValueError: unusable times or counts.
        RateError: a bad environment specification.
    """

    def __init__(self, times: Any, counts: Any, detection: Any = None, *,
                 environment: dict[str, Any] | None = None) -> None:
        self.series = as_series(times, counts)
        self.detection = detection
        self._exact: ExactPlan | None = None
        self._hidden: DetectionPlan | None = None
        self._environment: EnvironmentPlan | None = None
        self.nodes = DEFAULT_NODES
        if environment is not None:
            spec = dict(environment)
            self.nodes = int(spec.pop("nodes", DEFAULT_NODES))
            unknown = set(spec) - {"affects", "birth_covariates", "death_covariates"}
            if unknown:
                raise RateError(f"unknown environment settings {sorted(unknown)}", name="environment")
            self._exact = ExactPlan(self.series)
            self._environment = EnvironmentPlan(self._exact, spec.get("birth_covariates"),
                                                spec.get("death_covariates"), spec.get("affects", "birth"))

    @property
    def environment(self) -> EnvironmentPlan | None:
        """The environment plan (None for the plain model)."""
        return self._environment

    def evaluate_environment(self, birth: Any, death: Any, sigma: float, birth_effects: Any = (),
                             death_effects: Any = (), tol: float = 1e-10, grad: bool = True,
                             nodes: int | None = None) -> LikelihoodResult:
        """Evaluate under environmental variation (built with ``environment=...``).

        Args:
            birth, death: base rates over 0..N.
            sigma: the environment's standard deviation per time unit (≥ 0).
            birth_effects, death_effects: covariate effects on log births / log deaths.
            tol: wanted bound on the windows' share of the error.
            grad: compute gradients (also d_sigma, d_birth_effects, d_death_effects).
            nodes: Gauss–Hermite nodes per pair (default the plan's).

        Returns:
            LikelihoodResult.

        Raises:
            RateError: no environment was set up, or bad rates, σ or effects.
            CapTooSmallError, LikelihoodUnderflowError: as for :func:`evaluate_likelihood`.
        """
        if self._environment is None:
            raise RateError("these counts were prepared without an environment", name="environment")
        if not (tol > 0):
            raise RateError(f"tol must be > 0, got {tol!r}", name="tol")
        b, d, N = check_rate_arrays(birth, death)
        return evaluate_environment(self._environment, b, d, N, float(sigma), np.asarray(birth_effects, float),
                                    np.asarray(death_effects, float), float(tol), grad,
                                    self.nodes if nodes is None else int(nodes))

    def evaluate(self, birth: Any, death: Any, detection: Any = None, tol: float = 1e-10,
                 grad: bool = True) -> LikelihoodResult:
        """Evaluate at these rates, starting from the windows the last evaluation found.

        Args:
            birth, death, detection, tol, grad: as for :func:`evaluate_likelihood`.

        Returns:
            LikelihoodResult.

        Raises:
            As :func:`evaluate_likelihood`.
        """
        if not (tol > 0):
            raise RateError(f"tol must be > 0, got {tol!r}", name="tol")
        b, d, N = check_rate_arrays(birth, death)
        if detection is None:
            if self._exact is None:
                self._exact = ExactPlan(self.series)
            return evaluate_exact(self._exact, b, d, N, float(tol), grad)
        p = check_detection(detection)
        if self._hidden is None:
            self._hidden = DetectionPlan(self.series)
        return evaluate_detection(self._hidden, b, d, N, p, float(tol), grad)


def evaluate_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                        detection: float | None = None, tol: float = 1e-10,
                        grad: bool = True) -> LikelihoodResult:
    """Log-likelihood, gradients and the achieved truncation bound in one result.

    Args:
        times, counts: see :func:`log_likelihood`.
        birth, death: rates over sizes 0..N (birth[N] ignored; death[0] = 0).
        detection: None for exact counts, else the detection probability p in (0, 1).
        tol: wanted bound on |log L_true − log L| (windows are widened until met).
        grad: compute gradients.

    Returns:
        LikelihoodResult with ll, d_birth, d_death, d_detection, error_bound, pointwise,
        and cost counters.

    Raises:
        CountValueError, ReplicateMismatchError: unusable times or counts.
        RateError: unusable rates, detection probability or tol.
        CapTooSmallError: a count exceeds the cap N.
        LikelihoodUnderflowError: a possible transition has a probability too small for
            double precision to bound within tol.
    """
    return PreparedCounts(times, counts, detection).evaluate(birth, death, detection, tol, grad)


def log_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                   detection: float | None = None, tol: float = 1e-10) -> float:
    """Log-likelihood of head counts under the birth–death chain with these rates.

    Args:
        times: 1-D survey times of one site; or a list of such arrays (several sites); or
            a data object with ``.series`` (items with ``.times``, ``.counts``), with
            ``counts`` = None.
        counts: matching counts, 1-D or 2-D (n_times, n_replicates), NaN = survey not
            made; or a list of such arrays; or None with a data object.
        birth, death: rates λ_n, μ_n over sizes 0..N.
        detection: None for exact counts (replicates at one time must agree); else the
            detection probability p: each count ~ Binomial(true size, p), the first true
            size with a uniform prior over 0..N.
        tol: bound on the error of the returned value from windows and truncation.

    Returns:
        The log-likelihood, each site conditioned on its first count (or its first
        occasion's counts). −inf when a transition is impossible in exact arithmetic.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    return evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol,
                               grad=False).ll


def log_likelihood_grad(times: Any, counts: Any, birth: Any, death: Any, *,
                        detection: float | None = None, tol: float = 1e-10) -> tuple:
    """Log-likelihood and its gradients with respect to every birth and death rate.

    Args:
        times, counts, birth, death, detection, tol: as for :func:`log_likelihood`.

    Returns:
        (ll, d_birth, d_death) for exact counts; (ll, d_birth, d_death, d_detection) when
        a detection probability is given (d_detection = ∂ll/∂p). d_birth and d_death are
        arrays over sizes 0..N; d_birth[N] and d_death[0] are 0. When ll is −inf the
        gradients are zeros.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    r = evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol, grad=True)
    if detection is None:
        return r.ll, r.d_birth, r.d_death
    return r.ll, r.d_birth, r.d_death, r.d_detection


def pointwise_log_likelihood(times: Any, counts: Any, birth: Any, death: Any, *,
                             detection: float | None = None,
                             tol: float = 1e-10) -> list[np.ndarray]:
    """One log-likelihood term per transition and site (for PSIS-LOO).

    Args:
        times, counts, birth, death, detection, tol: as for :func:`log_likelihood`.

    Returns:
        A list with one 1-D array per site: exact counts, log P over each pair of
        consecutive surveyed times; detection, log p(counts at occasion i | earlier
        counts) for each surveyed occasion after the first (the first occasion's kept
        prior mass folded into the second term). Each site's terms sum to its
        log-likelihood.

    Raises:
        See :func:`evaluate_likelihood`.
    """
    return evaluate_likelihood(times, counts, birth, death, detection=detection, tol=tol,
                               grad=False).pointwise
