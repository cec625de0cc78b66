"""Environmental variation: the annual chain of a birth–death process with good and bad years.

In each time unit ("year") an environment ε ~ Normal(0, σ²) is drawn independently; during
that year the births are scaled by exp(ε − σ²/2) (the immigration λ_0 is not) and, with
affects="birth_and_death", the deaths by exp(−ε − σ²/2). Counts one year apart form a
Markov chain with transition matrix P̄ = E_ε[exp(Q(ε))], here a Gauss–Hermite rule with K
nodes (ε_k = √2 σ u_k, weights w_k/√π); σ = 0 is the plain chain (one node).

P̄ is built once per chain and threshold (chain.environment_kernels) on a window of sizes,
with the mass the window and the Poisson cut lose carried as a deficit per row: each
computed probability is ≤ its exact K-node value, by at most the deficit accumulated over
the years. The quadrature error is estimated on request with the (2K+1)-node rule.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from .environment_kernels import (POISSON_TAIL, UNIT, AnnualMatrix, build_annual, environment_nodes,
                                  factor_transient, first_window_top, gth_stationary, iterate_absorbed,
                                  mmatrix_solve_left, mmatrix_solve_right, rows_by_vectors)
from .birth_death import BirthDeathChain
from .errors import ChainError, RateError
from .memory import require_memory
from .passage import PassageCurve
from .rates import check_rate_arrays

#: Caps up to this use the whole range; above it the window top is chosen and widened.
FULL_RANGE = 200


@dataclass(frozen=True)
class AnnualCurves:
    """Extinction / quasi-extinction curves of the annual chain, for several starts and thresholds.

    Attributes:
        years: horizons (whole years ≥ 1).
        starts, thresholds: the start sizes and thresholds k.
        probability: shape (n_thresholds, n_starts, n_years); P(size ≤ k at some moment of
            years 0..y | start).
        error_bound: same shape; bound on the error from the window, Poisson cut and rounding.
        quadrature_error: same shape; |K-node − (2K+1)-node| (nan unless asked for).
        window_top: per threshold, the largest size kept.
    """

    years: np.ndarray
    starts: np.ndarray
    thresholds: np.ndarray
    probability: np.ndarray
    error_bound: np.ndarray
    quadrature_error: np.ndarray
    window_top: np.ndarray


@dataclass(frozen=True)
class AnnualCurve(PassageCurve):
    """One curve of the annual chain: a chain.passage.PassageCurve (``times`` in years) that
    also carries ``quadrature_error`` (|K-node − (2K+1)-node|, nan unless asked for)."""

    quadrature_error: np.ndarray = field(default_factory=lambda: np.zeros(0))


@dataclass(frozen=True)
class AnnualMeanTime:
    """Mean time to extinction (years) of the annual chain, per start.

    Attributes:
        starts: start sizes.
        mean: midpoint estimate of E[T] (inf where extinction is not certain or beyond floats).
        log_mean: its natural log.
        error_bound: half the annual resolution (0.5) + window and Poisson-cut effect + rounding.
        lower: a rigorous lower bound on E[T], Σ_{y≥1} S(y) with lost mass counted as extinct.
        quadrature_error: |K-node − (2K+1)-node| of ``mean`` (nan unless asked for).
    """

    starts: np.ndarray
    mean: np.ndarray
    log_mean: np.ndarray
    error_bound: np.ndarray
    lower: np.ndarray
    quadrature_error: np.ndarray


@dataclass(frozen=True)
class AnnualQuasiStationary:
    """Quasi-stationary law of the annual chain (0 absorbing).

    Attributes:
        pmf: over sizes 0..N (pmf[0] = 0).
        decay_rate: −log ρ per year (ρ the leading eigenvalue of P̄ on sizes ≥ 1).
        log_decay_rate: its log (accurate when the rate is tiny).
        extinction_per_year: 1 − ρ, the yearly extinction probability from this law.
        mean: mean size.
        residual: ‖x P̄ − ρ x‖₁ on sizes ≥ 1.
        leaked: x·δ, the yearly mass the window and Poisson cut lose from this law.
        converged, iterations: of the inverse iteration.
        quadrature_error: (L1 change of pmf, change of decay_rate) against 2K+1 nodes (nan unless asked for).
    """

    pmf: np.ndarray
    decay_rate: float
    log_decay_rate: float
    extinction_per_year: float
    mean: float
    residual: float
    leaked: float
    converged: bool
    iterations: int
    quadrature_error: tuple[float, float]


@dataclass(frozen=True)
class AnnualStationary:
    """Long-run (stationary) law of the annual chain with immigration.

    Attributes:
        pmf: over sizes 0..N (empty when ``exists`` is False).
        exists: False when λ_0 = 0 (extinction is the only long-run state).
        mean: mean size (nan if none).
        residual: global-balance residual ‖π P̄ − π‖₁ (includes ``leaked``).
        leaked: π·δ, the yearly mass the window and Poisson cut lose.
        top_mass: mass at sizes ≥ 0.9·N, next to the cap (a cap check).
        reason: a sentence explaining the answer.
        quadrature_error: L1 change of pmf against 2K+1 nodes (nan unless asked for).
    """

    pmf: np.ndarray
    exists: bool
    mean: float
    residual: float
    leaked: float
    top_mass: float
    reason: str
    quadrature_error: float


class EnvironmentalChain:
    """A birth–death chain on 0..N whose rates vary from year to year (environmental variation).

    Args:
        birth: λ_n over sizes 0..N (λ_0 > 0 is immigration, never scaled; birth[N] ignored).
        death: μ_n over sizes 0..N (μ_0 = 0).
        sigma: σ of the environment ε ~ Normal(0, σ²) drawn per year (0: the plain chain).
        affects: "birth" (births × exp(ε − σ²/2)) or "birth_and_death" (deaths × exp(−ε − σ²/2) too).
        nodes: Gauss–Hermite nodes K.

    Raises:
        RateError: bad rates (chain.rates.check_rate_arrays), or, with σ > 0, a birth rate
            below λ_0 at some size 1..N−1 (the scaled births would be negative).
        ChainError: bad sigma, affects or nodes.
    """

    def __init__(self, birth: np.ndarray, death: np.ndarray, sigma: float, *, affects: str = "birth",
                 nodes: int = 13) -> None:
        b, m, N = check_rate_arrays(birth, death)
        environment_nodes(sigma, nodes, affects)  # checks sigma, nodes, affects
        if sigma > 0 and np.any(b[1:N] < b[0]):
            n = int(np.flatnonzero(b[1:N] < b[0])[0]) + 1
            raise RateError(f"birth rate at size {n} is below the immigration rate λ_0 = {b[0]!r}: births "
                            "cannot be scaled by the environment", name="birth", size=n, value=float(b[n]))
        self._birth, self._death = b.copy(), m.copy()
        self._birth.setflags(write=False)
        self._death.setflags(write=False)
        self._N = N
        self._sigma = float(sigma)
        self._affects = affects
        self._nodes = int(nodes) if sigma > 0 else 1
        self._cache: dict[tuple[int, int], AnnualMatrix] = {}

    birth = property(lambda self: self._birth, doc="λ_n over 0..N.")
    death = property(lambda self: self._death, doc="μ_n over 0..N.")
    sigma = property(lambda self: self._sigma, doc="σ of the yearly environment.")
    affects = property(lambda self: self._affects, doc='"birth" or "birth_and_death".')
    nodes = property(lambda self: self._nodes, doc="Gauss–Hermite nodes K (1 when σ = 0).")
    cap = property(lambda self: self._N, doc="The size cap N.")

    # -- the annual matrix ---------------------------------------------------------------
    def _build(self, threshold: int | None, hi: int, nodes: int, lo: int | None = None,
               tail: float = POISSON_TAIL) -> AnnualMatrix:
        lo = (0 if threshold is None else threshold) if lo is None else lo
        require_memory(6 * (hi - lo + 1) ** 2 * 8, what="the annual matrix", cap=self._N)
        return build_annual(self._birth, self._death, self._sigma, self._affects, nodes, threshold, lo, hi, tail)

    def _matrix(self, threshold: int | None, hi: int, nodes: int, tail: float = POISSON_TAIL) -> AnnualMatrix:
        key = (-1 if threshold is None else threshold, nodes)
        got = self._cache.get(key)
        if got is None or got.hi < hi or got.tail > tail:
            if got is not None:  # keep the wider window or smaller cut the cached one had
                hi, tail = max(hi, got.hi), min(tail, got.tail)
            got = self._build(threshold, hi, nodes, tail=tail)
            self._cache[key] = got
        return got

    def annual_matrix(self, threshold: int | None = None) -> np.ndarray:
        """Dense P̄ over sizes 0..N (for small N and checks).

        Args:
            threshold: None for the chain itself; k ≥ 0 to make sizes ≤ k absorbing (then
                column k holds the probability of having reached ≤ k within the year).

        Returns:
            (N+1, N+1) array, P̄[i, j] = P(size j one year after size i).

        Raises:
            ChainError: a threshold outside 0..N.
            CapTooLargeError: the matrix would not fit in memory.
        """
        if threshold is not None:
            threshold = self._check_threshold(threshold)
        return self._build(threshold, self._N, self._nodes, lo=0).P

    def annual_rows(self, starts) -> tuple[np.ndarray, np.ndarray]:
        """Rows of P̄ for a few starts, by per-node uniformization of vectors (chain.uniformization
        .transition_rows) over the whole range: for large N where the dense matrix is too big.

        Args:
            starts: start sizes in 0..N.

        Returns:
            (rows, bound): rows shape (n_starts, N+1), each entry ≤ its exact K-node value;
            bound shape (n_starts,) bounds the Poisson mass cut.

        Raises:
            RateError: a start outside 0..N.
        """
        return rows_by_vectors(self._birth, self._death, self._sigma, self._affects, self._nodes, starts)

    # -- argument checks -------------------------------------------------------------------
    def _check_threshold(self, k) -> int:
        if int(k) != k or not 0 <= k < self._N:
            raise ChainError(f"threshold must be a whole size in 0..{self._N - 1}, got {k!r}")
        return int(k)

    def _check_starts(self, starts) -> np.ndarray:
        st = np.atleast_1d(np.asarray(starts, dtype=float))
        if st.ndim != 1 or st.size == 0 or np.any(st != np.round(st)) or np.any(st < 0) or np.any(st > self._N):
            raise ChainError(f"start sizes must be whole sizes in 0..{self._N}, got {starts!r}")
        return st.astype(np.int64)

    @staticmethod
    def _check_years(years) -> np.ndarray:
        y = np.atleast_1d(np.asarray(years, dtype=float))
        if y.ndim != 1 or y.size == 0 or not np.all(np.isfinite(y)):
            raise ChainError(f"years must be a non-empty 1-D array of whole years, got {years!r}")
        if np.any(y != np.round(y)) or np.any(y < 1):
            raise ChainError(f"years must be whole numbers of time units >= 1 (the annual chain is defined "
                             f"at year ends only), got {y[(y != np.round(y)) | (y < 1)][0]!r}")
        return y.astype(np.int64)

    # -- extinction curves -------------------------------------------------------------------
    def extinction_curves(self, starts, years, thresholds=(0,), *, tol: float = 1e-10,
                          quadrature_error: bool = False) -> AnnualCurves:
        """P(size first reaches ≤ k by the end of year y | start), for several starts and thresholds.

        Sizes ≤ k are absorbing within each year, so the passage is in continuous time; the
        annual absorbing matrix is iterated. The window is widened until the mass it loses
        over the horizon is ≤ ``tol`` (or it is the whole range).

        Args:
            starts: start sizes in 0..N.
            years: horizons, whole years ≥ 1.
            thresholds: quasi-extinction thresholds k (0 = extinction), each in 0..N−1.
            tol: wanted bound on the window and Poisson-cut part of the error.
            quadrature_error: also run the (2K+1)-node rule and report the difference.

        Returns:
            AnnualCurves.

        Raises:
            ChainError: starts, years or thresholds not whole numbers in range.
        """
        st = self._check_starts(starts)
        yr = self._check_years(years)
        ks = np.array([self._check_threshold(k) for k in np.atleast_1d(thresholds)], dtype=np.int64)
        shape = (ks.size, st.size, yr.size)
        prob, bound, quad = np.ones(shape), np.zeros(shape), np.full(shape, np.nan)
        tops = np.zeros(ks.size, dtype=np.int64)
        for t, k in enumerate(ks):
            live = st > k
            if not live.any():
                tops[t] = k
                continue
            s_live = st[live] - k

            def run(A: AnnualMatrix, idx=s_live):
                p, lost, rounding = iterate_absorbed(A, idx, yr)
                return (p, lost + rounding), lost.max() <= tol, tol * 1e-3 / yr.max()

            A, (p, b) = self._fitted(int(k), int(st.max()), run)
            prob[t][live], bound[t][live], tops[t] = p, b, A.hi
            if quadrature_error:
                p2 = iterate_absorbed(self._matrix(int(k), A.hi, self._quad_nodes()), s_live, yr)
                quad[t][live] = np.abs(p2[0] - p)
            elif self._nodes == 1:
                quad[t][live] = 0.0
        return AnnualCurves(yr, st, ks, prob, bound, quad, tops)

    def extinction_curve(self, start: int, years, threshold: int = 0, *, tol: float = 1e-10,
                         quadrature_error: bool = False) -> AnnualCurve:
        """P(size first reaches ≤ ``threshold`` by the end of year y | ``start``), per horizon.

        Args:
            start: start size.
            years: horizons, whole years ≥ 1 (a non-integer horizon is refused).
            threshold: k ≥ 0 (0 = extinction).
            tol: wanted bound on the window and Poisson-cut part of the error.
            quadrature_error: also estimate the quadrature error with 2K+1 nodes.

        Returns:
            AnnualCurve (probability, error_bound, quadrature_error per horizon).

        Raises:
            ChainError: bad start, years or threshold.
        """
        c = self.extinction_curves([start], years, [threshold], tol=tol, quadrature_error=quadrature_error)
        return AnnualCurve(c.years.astype(float), c.probability[0, 0], c.error_bound[0, 0], int(c.starts[0]),
                           int(c.thresholds[0]), quadrature_error=c.quadrature_error[0, 0])

    def _quad_nodes(self) -> int:
        return 2 * self._nodes + 1 if self._sigma > 0 else 1

    # -- mean time, quasi-stationary and long-run laws ------------------------------------------
    def _zero_tail(self) -> float:
        """First Poisson cut with 0 absorbing: the mean-time bound grows like z² δ, so δ ≲ 1e-9/z,
        with z guessed from the plain chain's longest mean time (closed form)."""
        with np.errstate(over="ignore", divide="ignore"):
            log_t = BirthDeathChain(np.where(np.arange(self._N + 1) == 0, 0.0, self._birth), self._death
                                    ).mean_time_to_extinction(np.array([self._N]), log=True)[0]
        return float(np.clip(1e-9 * np.exp(-log_t), 1e-60, POISSON_TAIL)) if np.isfinite(log_t) else POISSON_TAIL

    def _fitted(self, threshold: int | None, floor: int, run):
        """run(A) -> (result, ok, wanted tail) on windows widened from the first guess, then
        with a smaller Poisson cut, until ok (or the whole range and a cut of 1e-300)."""
        lo = 0 if threshold is None else threshold
        hi = first_window_top(self._birth, self._death, self._sigma, self._affects, floor, FULL_RANGE)
        tail = self._zero_tail() if threshold == 0 else POISSON_TAIL
        while True:
            A = self._matrix(threshold, hi, self._nodes, tail)
            out, ok, want = run(A)
            if ok or (A.hi >= self._N and not A.tail > max(want, 1e-300)):
                return A, out
            if A.hi < self._N:
                hi = min(self._N, A.hi + max(16, A.hi - lo))
            else:
                tail = max(want, 1e-300)

    def mean_time_to_extinction(self, starts, *, quadrature_error: bool = False) -> AnnualMeanTime:
        """Mean time (years) to first reach size 0, from each start.

        Exact for the annual chain by a linear solve, z = (I − T)^{-1} 1 on sizes ≥ 1 (T the
        annual matrix there), eliminated in non-negative arithmetic so that tiny yearly
        extinction probabilities keep their relative accuracy: z_s = Σ_{y≥0} S(y) with S the
        survival at year ends. As S is non-increasing in continuous time,
        Σ_{y≥1} S(y) ≤ E[T] ≤ Σ_{y≥0} S(y): ``mean`` is the midpoint z − 1/2 and the error
        bound includes 1/2 year. No tail beyond iterated years is needed (the solve sums
        every year); mass the window or the Poisson cut loses is treated as staying, and its
        effect g = (I − T)^{-1}(δ ∘ z) ≥ z − z_lost is added to the bound (``lower`` counts
        it as extinct, a rigorous lower bound). Mean times beyond the float range are inf.

        Args:
            starts: start sizes in 0..N (0 gives 0).
            quadrature_error: also estimate the quadrature error with 2K+1 nodes.

        Returns:
            AnnualMeanTime.

        Raises:
            ChainError: bad start sizes.
        """
        st = self._check_starts(starts)

        def at_starts(A: AnnualMatrix):
            O, piv = factor_transient(A)
            z = mmatrix_solve_right(O, piv, np.ones(O.shape[0]))
            with np.errstate(invalid="ignore", over="ignore"):
                g = mmatrix_solve_right(O, piv, np.where(A.deficit[1:] > 0, A.deficit[1:] * z, 0.0))
            zz, gg = np.zeros(st.size), np.zeros(st.size)
            pos = st >= 1
            zz[pos], gg[pos] = z[st[pos] - 1], g[st[pos] - 1]
            # g ≈ z² δ: a Poisson cut below 1e-9/z per year makes it negligible (none helps when z = inf)
            top = float(zz.max())
            return (zz, gg), bool(np.all(gg[pos] <= 1e-8 * zz[pos])), 1e-9 / max(top, 1.0) if top < np.inf else A.tail

        A, (zz, gg) = self._fitted(0, int(st.max()), at_starts)
        W = A.hi - A.lo + 1
        with np.errstate(invalid="ignore"):
            mean = np.where(st >= 1, zz - 0.5, 0.0)
            bound = np.where(st >= 1, 0.5 + gg + zz * (2 * W * A.rel + 4 * W * UNIT), 0.0)
            lower = np.where(st >= 1, zz - gg - 1.0 - zz * (2 * W * A.rel + 4 * W * UNIT), 0.0)
            with np.errstate(divide="ignore"):
                log_mean = np.log(mean)
        quad = np.zeros(st.size) if self._nodes == 1 else np.full(st.size, np.nan)
        if quadrature_error and self._nodes > 1:
            (z2, _), _, _ = at_starts(self._matrix(0, A.hi, self._quad_nodes(), A.tail))
            quad = np.abs(z2 - zz)
        return AnnualMeanTime(st, mean, log_mean, bound, np.where(lower > 0, lower, 0.0), quad)  # nan: no bound

    def quasi_stationary(self, *, quadrature_error: bool = False, rtol: float = 1e-13,
                         max_iter: int = 2000) -> AnnualQuasiStationary:
        """The left eigenvector of P̄ on sizes ≥ 1, 0 absorbing (the rate out of 0 is ignored, as in
        BirthDeathChain.quasi_stationary), by inverse iteration x ← x (I − T)^{-1} in
        non-negative arithmetic; 1 − ρ = 1/Σ(x (I − T)^{-1}) keeps its relative accuracy.

        Args:
            quadrature_error: also estimate the quadrature error with 2K+1 nodes.
            rtol: stop when the pmf changes by less than this (L1).
            max_iter: iteration limit (``converged`` False if reached).

        Returns:
            AnnualQuasiStationary.

        Raises:
            ChainError: a death rate is 0 at some size ≥ 1 (no single quasi-stationary law).
        """
        zero = np.flatnonzero(self._death[1:] == 0)
        if zero.size:
            raise ChainError(f"death rate is 0 at size {int(zero[0]) + 1}: the population can avoid "
                             "extinction from there, so there is no single quasi-stationary distribution")

        def solve(A: AnnualMatrix):
            O, piv = factor_transient(A)
            x = np.full(O.shape[0], 1.0 / O.shape[0])
            theta, ok, it = np.nan, False, 0
            for it in range(1, max_iter + 1):
                y = mmatrix_solve_left(O, piv, x)
                tot = y.sum()
                theta, new = 1.0 / tot, y / tot
                change = np.abs(new - x).sum()
                x = new
                if change <= rtol:
                    ok = True
                    break
            return (x, theta, ok, it), float(x @ A.deficit[1:]) <= 1e-6 * theta, 1e-8 * theta

        A, (x, theta, ok, it) = self._fitted(0, 1, solve)
        pmf = np.zeros(self._N + 1)
        pmf[1:A.hi + 1] = x
        decay = -math.log1p(-theta) if theta < 1 else math.inf
        residual = float(np.abs(x @ A.P[1:, 1:] - (1.0 - theta) * x).sum())
        quad = (0.0, 0.0) if self._nodes == 1 else (math.nan, math.nan)
        if quadrature_error and self._nodes > 1:
            (x2, t2, _, _), _, _ = solve(self._matrix(0, A.hi, self._quad_nodes(), A.tail))
            quad = (float(np.abs(x2 - x).sum()), abs(-math.log1p(-t2) - decay))
        return AnnualQuasiStationary(pmf, decay, math.log(decay) if decay > 0 else -math.inf, float(theta),
                                     float(np.arange(self._N + 1) @ pmf), residual, float(x @ A.deficit[1:]),
                                     ok, it, quad)

    def long_run(self, *, tol: float = 1e-10, quadrature_error: bool = False) -> AnnualStationary:
        """The stationary law of P̄ on 0..N (the left null vector of P̄ − I), with immigration.

        There is no detailed-balance product form under environmental variation; the null
        vector is found by Grassmann–Taksar–Heyman elimination (non-negative arithmetic, so
        tiny probabilities keep their relative accuracy), and the global-balance residual
        ‖π P̄ − π‖₁ is reported.

        Args:
            tol: wanted bound on the yearly mass the window loses from π.
            quadrature_error: also estimate the quadrature error with 2K+1 nodes.

        Returns:
            AnnualStationary (``exists`` False, with the reason, when λ_0 = 0).
        """
        if self._birth[0] == 0:
            return AnnualStationary(np.zeros(0), False, math.nan, math.nan, math.nan, math.nan,
                                    "size 0 is absorbing (no immigration): the only long-run state is "
                                    "extinction; use quasi_stationary()", math.nan)

        def solve(A: AnnualMatrix):
            pi = gth_stationary(A.P.copy())
            return pi, float(pi @ A.deficit) <= tol, tol * 1e-3

        A, pi = self._fitted(None, 1, solve)
        leaked = float(pi @ A.deficit)
        pmf = np.zeros(self._N + 1)
        pmf[:A.hi + 1] = pi
        quad = 0.0 if self._nodes == 1 else math.nan
        if quadrature_error and self._nodes > 1:
            pi2 = gth_stationary(self._matrix(None, A.hi, self._quad_nodes()).P.copy())
            quad = float(np.abs(pi2 - pi).sum())
        sizes = np.arange(self._N + 1)
        return AnnualStationary(pmf, True, float(sizes @ pmf), float(np.abs(pi @ A.P - pi).sum()), leaked,
                                float(pmf[sizes >= math.ceil(0.9 * self._N)].sum()),
                                "immigration makes 0 a passing state: the annual chain has one stationary law",
                                quad)
