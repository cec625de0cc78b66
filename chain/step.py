"""Discrete-time birth–death chain: per step up with p_n, down with q_n, stay with r_n."""
from __future__ import annotations

import numpy as np

from .base import ChainBase
from .errors import ChainError, RateError
from .memory import require_memory
from .passage import PassageCurve, absorbing_rates
from .extinction import ruin_probability
from .rates import RateSpec
from .simulate import _check_start, _check_times, simulate_steps


def _step(v: np.ndarray, p: np.ndarray, q: np.ndarray, r: np.ndarray) -> np.ndarray:
    """One step of row vectors v (…, sizes): v ← v·P for the tridiagonal step matrix."""
    out = v * r
    out[..., 1:] += v[..., :-1] * p[:-1]
    out[..., :-1] += v[..., 1:] * q[1:]
    return out


class StepChain(ChainBase):
    """Discrete-time chain: n → n+1 with p_n, n → n−1 with q_n, stay with r_n = 1 − p_n − q_n.

    Args:
        p, q: arrays over sizes 0..N (p[N] is ignored: the cap reflects) or callables.

    Raises:
        RateError: values outside [0, 1], p + q > 1, q[0] != 0, lengths differ.
    """

    _up_name = "p"
    _down_name = "q"

    def __init__(self, p: RateSpec, q: RateSpec) -> None:
        super().__init__(p, q)
        up, down = self._rates.upto(self.cap if self.finite else 64)
        for values, name in ((up, "p"), (down, "q")):
            if np.any(values > 1):
                n = int(np.flatnonzero(values > 1)[0])
                raise RateError(f"{name} at size {n} is {values[n]!r}; step probabilities must be <= 1",
                                name=name, size=n, value=float(values[n]))
        total = up + down
        if np.any(total > 1 + 1e-12):
            n = int(np.flatnonzero(total > 1 + 1e-12)[0])
            raise RateError(f"p + q at size {n} is {total[n]!r} > 1; the step probabilities must sum to at most 1",
                            name="p+q", size=n, value=float(total[n]))

    @property
    def p(self) -> np.ndarray:
        """Up-step probabilities over 0..N."""
        self._require_finite("p")
        return self._rates.up_spec

    @property
    def q(self) -> np.ndarray:
        """Down-step probabilities over 0..N."""
        self._require_finite("q")
        return self._rates.down_spec

    @property
    def r(self) -> np.ndarray:
        """Stay probabilities r = 1 − p − q over 0..N."""
        return np.clip(1.0 - self.p - self.q, 0.0, 1.0)

    def transition(self, steps: int, starts: np.ndarray | None = None) -> np.ndarray:
        """The ``steps``-step transition matrix P^steps (or its rows for ``starts``).

        Raises:
            ChainError: unbounded chain, a negative or fractional number of steps.
            CapTooLargeError: the matrix would not fit in memory.
        """
        self._require_finite("transition()")
        if int(steps) != steps or steps < 0:
            raise ChainError(f"steps must be a whole number >= 0, got {steps!r}")
        n1 = self.cap + 1
        if starts is None:
            require_memory(4 * n1 * n1 * 8, what="transition()", cap=self.cap)
            mat = np.diag(self.r) + np.diag(self.p[:-1], 1) + np.diag(self.q[1:], -1)
            return np.linalg.matrix_power(mat, int(steps))
        starts = np.atleast_1d(np.asarray(starts))
        for s in starts:
            _check_start(self._rates, s)
        v = np.zeros((starts.size, n1))
        v[np.arange(starts.size), starts.astype(int)] = 1.0
        p, q, r = self.p, self.q, self.r
        for _ in range(int(steps)):
            v = _step(v, p, q, r)
        return v

    def extinction_curve(self, start: int, steps: np.ndarray, threshold: int = 0) -> PassageCurve:
        """P(size first reaches <= ``threshold`` within the given numbers of steps | start)."""
        self._require_finite("extinction_curve()")
        steps = _check_times(steps, integer=True).astype(np.int64)
        start = _check_start(self._rates, start)
        if threshold < 0 or threshold > self.cap:
            raise ChainError(f"threshold must be between 0 and the cap {self.cap}, got {threshold}")
        if start <= threshold:
            return PassageCurve(steps.astype(float), np.ones(steps.size), np.zeros(steps.size), start, threshold)
        p, q = absorbing_rates(self.p, self.q, threshold)
        r = np.clip(1.0 - p - q, 0.0, 1.0)
        v = np.zeros(self.cap + 1)
        v[start] = 1.0
        out = np.empty(steps.size)
        k = 0
        for j, target in enumerate(steps):
            while k < target:
                v = _step(v, p, q, r)
                k += 1
            out[j] = v[: threshold + 1].sum()
        roundoff = np.full(steps.size, 4 * np.finfo(float).eps * max(1, steps.max()))  # no truncation here
        return PassageCurve(steps.astype(float), np.clip(out, 0, 1), roundoff, start, threshold)

    def absorption_probability(self, sizes: np.ndarray | None = None) -> np.ndarray:
        """P(reach 0 before N | start) on a finite chain whose top N is absorbing (p_N = q_N = 0).

        This is the ruin probability of the gambler's-ruin chain; 1 minus it is the
        fixation probability of a Moran process.

        Raises:
            ChainError: unbounded chain, or q_N > 0 (the top is not absorbing).
        """
        self._require_finite("absorption_probability()")
        if self.q[-1] != 0:
            raise ChainError(f"q at the top size {self.cap} is {self.q[-1]!r}; set it to 0 so the top absorbs")
        sizes = np.arange(self.cap + 1) if sizes is None else np.asarray(sizes, dtype=int)
        return ruin_probability(np.asarray(self.p), np.asarray(self.q), self.cap)[sizes]

    def simulate(self, start: int, steps: np.ndarray, n_paths: int = 1,
                 seed: int | np.random.Generator | None = None) -> np.ndarray:
        """Simulated sizes after the given numbers of steps, starting at ``start`` at step 0."""
        return simulate_steps(self._rates, start, steps, n_paths, seed)

    def to_continuous(self, rate: float = 1.0) -> "BirthDeathChain":
        """The continuous-time chain with λ_n = rate·p_n, μ_n = rate·q_n (same stationary law)."""
        from .birth_death import BirthDeathChain

        rate = float(rate)
        if not rate > 0:
            raise ChainError(f"rate must be > 0, got {rate!r}")
        if self.finite:
            return BirthDeathChain(self.p * rate, self.q * rate)
        up, down = self._rates.up_spec, self._rates.down_spec
        return BirthDeathChain(lambda n: np.asarray(up(n), float) * rate, lambda n: np.asarray(down(n), float) * rate)

    @classmethod
    def from_continuous(cls, chain: "BirthDeathChain", rate: float | None = None) -> "StepChain":
        """Uniformize a continuous-time chain (see BirthDeathChain.to_step)."""
        return chain.to_step(rate)
