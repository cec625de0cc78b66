"""What every birth–death chain answers from its rates alone, by the same method names.

Continuous-time chains (rates λ_n, μ_n) and step chains (probabilities p_n, q_n) share the
product-form solvers: the stationary law, the ultimate extinction probability, the mean
time to extinction and the quasi-stationary law depend only on the up/down values (for a
step chain the same formulas give steps instead of time units). The subclasses add what
depends on the clock: transition probabilities, extinction curves and simulation.
"""
from __future__ import annotations

import numpy as np

from .errors import ChainError
from .extinction import extinction_probability, log_mean_time_to_extinction
from .quasi import QuasiStationary, quasi_stationary
from .rates import Rates, RateSpec
from .stationary import Stationary, stationary


class ChainBase:
    """Shared solvers; subclasses set the names of the up and down rates."""

    _up_name = "up"
    _down_name = "down"

    def __init__(self, up: RateSpec, down: RateSpec) -> None:
        self._rates = Rates.build(up, down, self._up_name, self._down_name)

    # -- description -------------------------------------------------------
    @property
    def cap(self) -> int | None:
        """The size cap N of a finite chain, or None for an unbounded chain."""
        return self._rates.cap

    @property
    def finite(self) -> bool:
        """True for a chain over sizes 0..N."""
        return self._rates.finite

    def rates_upto(self, m: int) -> tuple[np.ndarray, np.ndarray]:
        """The (up, down) values over sizes 0..m (finite chains: up to N)."""
        return self._rates.upto(m)

    def _require_finite(self, what: str) -> None:
        if not self.finite:
            raise ChainError(f"{what} needs a finite chain: give the rates as arrays over sizes 0..N")

    # -- product-form solvers ---------------------------------------------
    def stationary(self, *, target: float = 1e-12) -> Stationary:
        """Stationary distribution by detailed balance, or the reason there is none.

        Args:
            target: for an unbounded chain, the wanted bound on the mass beyond the
                truncation (``tail_bound`` on the result).

        Returns:
            Stationary with pmf, exists, mean, tail_bound, residual and reason.
        """
        return stationary(self._rates, target=target)

    def extinction_probability(self, sizes: np.ndarray | None = None) -> np.ndarray:
        """Ultimate probability of reaching size 0 from each start size.

        Args:
            sizes: start sizes (default 0..N; 0..100 for an unbounded chain).

        Returns:
            array of probabilities (nan where an unbounded chain's series was inconclusive).
        """
        return extinction_probability(self._rates, sizes)[0]

    def mean_time_to_extinction(self, sizes: np.ndarray | None = None, *, log: bool = False) -> np.ndarray:
        """Mean time to reach size 0 from each start size (inf where it is infinite).

        Args:
            sizes: start sizes (default 0..N; 0..100 for an unbounded chain).
            log: return natural logs (useful when the times exceed the float range).

        Returns:
            array of mean times in the rates' time unit (steps for a step chain).
        """
        log_t = log_mean_time_to_extinction(self._rates, sizes)[0]
        if log:
            return log_t
        with np.errstate(over="ignore"):
            return np.exp(log_t)

    def quasi_stationary(self) -> QuasiStationary:
        """The distribution of sizes conditioned on not yet being extinct, with its decay rate.

        Raises:
            ChainError: for an unbounded chain (its quasi-stationary law need not be unique),
                or when a death rate is 0 at a size >= 1.
        """
        self._require_finite("quasi_stationary()")
        up, down = self._rates.upto(self.cap)
        return quasi_stationary(up, down)
