"""Continuous-time birth–death chain: the main object of tallyfit's mathematics."""
from __future__ import annotations

import numpy as np

from .base import ChainBase
from .errors import ChainError
from .memory import require_memory
from .passage import PassageCurve, absorbing_rates
from .rates import RateSpec
from .simulate import _check_start, _check_times, simulate_continuous


class BirthDeathChain(ChainBase):
    """Birth–death process with birth rates λ_n and death rates μ_n (μ_0 = 0).

    From size n the population gains one at rate λ_n (births plus immigration) and loses one
    at rate μ_n. λ_0 > 0 means immigration; λ_0 = 0 makes 0 absorbing.

    Args:
        birth: array over sizes 0..N (finite chain; birth[N] is ignored, the cap reflects),
            or a callable f(n: ndarray) -> ndarray for an unbounded chain.
        death: same form as ``birth``; death[0] must be 0.

    Raises:
        RateError: negative, NaN or infinite rates, death[0] != 0, arrays of different
            lengths, or one array and one callable.
    """

    _up_name = "birth"
    _down_name = "death"

    def __init__(self, birth: RateSpec, death: RateSpec) -> None:
        super().__init__(birth, death)

    @property
    def birth(self) -> np.ndarray:
        """Birth rates over 0..N (finite chains)."""
        self._require_finite("birth")
        return self._rates.up_spec

    @property
    def death(self) -> np.ndarray:
        """Death rates over 0..N (finite chains)."""
        self._require_finite("death")
        return self._rates.down_spec

    def transition(self, dt: float, starts: np.ndarray | None = None) -> np.ndarray:
        """Transition probabilities P(dt) = exp(Q dt) by uniformization (positive sums).

        Args:
            dt: time interval (>= 0).
            starts: start sizes for the rows wanted (default: every size, the full matrix).

        Returns:
            (N+1, N+1) matrix, or (len(starts), N+1) rows; entry [i, j] = P(size j at dt | start i).

        Raises:
            ChainError: unbounded chain, bad dt or start sizes.
            CapTooLargeError: the rows would not fit in memory.
        """
        from .uniformization import transition_rows

        self._require_finite("transition()")
        dt = float(dt)
        if not np.isfinite(dt) or dt < 0:
            raise ChainError(f"dt must be finite and >= 0, got {dt!r}")
        n1 = self.cap + 1
        starts_a = np.arange(n1) if starts is None else np.atleast_1d(np.asarray(starts))
        require_memory(3 * starts_a.size * n1 * 8, what="transition()", cap=self.cap)
        bad = (starts_a != np.round(starts_a)) | (starts_a < 0) | (starts_a > self.cap)
        if bad.any():
            raise ChainError(f"start size {starts_a[np.flatnonzero(bad)[0]]!r} is not a whole size in 0..{self.cap}")
        starts_a = starts_a.astype(np.int64)
        # a far Poisson tail keeps tiny entries (down to ~1e-100) accurate in relative terms
        res = transition_rows(self.birth, self.death, starts_a, np.array([dt]), tail=1e-150)
        return np.minimum(res.rows[0], 1.0)  # remove round-off above 1

    def extinction_curve(self, start: int, times: np.ndarray, threshold: int = 0, *,
                         tol: float = 1e-10, window_top: int | None = None) -> PassageCurve:
        """P(size first reaches <= ``threshold`` by time t | ``start`` at time 0), per horizon.

        threshold = 0 gives the extinction curve; k > 0 a quasi-extinction curve.

        Args:
            start: start size.
            times: horizons, ascending, >= 0.
            threshold: quasi-extinction threshold k (0 <= k).
            tol: wanted bound on the absolute error of each probability.
            window_top: first guess of the largest size paths need (e.g. a high quantile of
                the quasi-stationary law); the range is widened until the bound holds.

        Returns:
            PassageCurve (probability, error_bound per horizon).

        Raises:
            ChainError: unbounded chain, bad start, threshold or times.
        """
        from .uniformization import transition_rows

        self._require_finite("extinction_curve()")
        times = _check_times(times, integer=False)
        start = _check_start(self._rates, start)
        threshold = int(threshold)
        if threshold < 0 or threshold > self.cap:
            raise ChainError(f"threshold must be between 0 and the cap {self.cap}, got {threshold}")
        if start <= threshold:
            return PassageCurve(times, np.ones(times.size), np.zeros(times.size), start, threshold)
        up, down = absorbing_rates(self.birth, self.death, threshold)
        # cut the top where paths rarely go; widen until the escaped mass is below tol
        margin = max(16, start // 4)
        if window_top is not None:
            margin = max(margin, int(window_top) - start)
        while True:
            hi = min(self.cap, start + margin)
            res = transition_rows(up, down, np.array([start], dtype=np.int64), times, lo=threshold, hi=hi,
                                  tail=tol * 1e-3, absolute=True)
            leaked = res.leaked[:, 0]
            if hi == self.cap or leaked.max() <= tol:
                break
            margin *= 2
        prob = np.clip(res.rows[:, 0, 0], 0.0, 1.0)
        prob = np.maximum.accumulate(prob)  # exact curve is non-decreasing; removes round-off wiggle
        return PassageCurve(times, prob, leaked, start, threshold)

    def simulate(self, start: int, times: np.ndarray, n_paths: int = 1,
                 seed: int | np.random.Generator | None = None) -> np.ndarray:
        """Exact (Gillespie) paths: size at each census time, starting at ``start`` at time 0.

        Args:
            start: size at time 0.
            times: census times, ascending, >= 0.
            n_paths: number of independent paths.
            seed: seed or numpy Generator.

        Returns:
            int64 array (n_paths, len(times)).
        """
        return simulate_continuous(self._rates, start, times, n_paths, seed)

    def to_step(self, rate: float | None = None) -> "StepChain":
        """The uniformized step chain p_n = λ_n/Λ, q_n = μ_n/Λ (same stationary law).

        Args:
            rate: Λ >= max(λ_n + μ_n); default that maximum (finite chains only).

        Raises:
            ChainError: rate below the largest total rate, or an unbounded chain without rate.
        """
        from .step import StepChain

        if self.finite:
            top = float(np.max(self.birth + self.death))
            lam = top if rate is None else float(rate)
            if lam <= 0 or lam < top * (1 - 1e-12):
                raise ChainError(f"uniformization rate {lam} is below the largest total rate {top}")
            return StepChain(self.birth / lam, self.death / lam)
        if rate is None:
            raise ChainError("an unbounded chain needs an explicit uniformization rate")
        lam = float(rate)
        up, down = self._rates.up_spec, self._rates.down_spec
        return StepChain(lambda n: np.asarray(up(n), float) / lam, lambda n: np.asarray(down(n), float) / lam)
