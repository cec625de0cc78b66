"""Exact event-by-event simulation of birth–death paths (Gillespie 1977), vectorised over paths.

Continuous time: from size n the next event comes after an Exp(λ_n + μ_n) wait and is a
birth with probability λ_n/(λ_n + μ_n). Step chains: each step goes up with p_n, down with
q_n, else stays. Only sizes at the census times are kept.
"""
from __future__ import annotations

import numpy as np

from .errors import ChainError
from .rates import Rates


def _check_times(times: np.ndarray, integer: bool) -> np.ndarray:
    times = np.asarray(times, dtype=float)
    if times.ndim != 1 or times.size == 0:
        raise ChainError("times must be a non-empty 1-D array")
    if not np.all(np.isfinite(times)) or times.min() < 0:
        raise ChainError("times must be finite and >= 0")
    if np.any(np.diff(times) < 0):
        raise ChainError("times must be in ascending order")
    if integer and np.any(times != np.round(times)):
        raise ChainError("a step chain is observed at whole numbers of steps")
    return times


def _check_start(rates: Rates, start: int) -> int:
    if int(start) != start or start < 0:
        raise ChainError(f"start size must be a whole number >= 0, got {start!r}")
    if rates.finite and start > rates.cap:
        raise ChainError(f"start size {start} is above the cap N={rates.cap}")
    return int(start)


def simulate_continuous(rates: Rates, start: int, times: np.ndarray, n_paths: int = 1,
                        seed: int | np.random.Generator | None = None,
                        max_events: int = 10**8) -> np.ndarray:
    """Sizes at ``times`` along ``n_paths`` exact paths that are at ``start`` at time 0.

    Args:
        rates: validated continuous-time rates.
        start: size at time 0.
        times: census times, ascending, >= 0.
        n_paths: number of independent paths.
        seed: seed or Generator, for reproducible paths.
        max_events: safety limit on the events simulated per path.

    Returns:
        int64 array (n_paths, len(times)).

    Raises:
        ChainError: bad times or start; a path exceeding ``max_events`` (rates far too high
            for the horizon).
    """
    times = _check_times(times, integer=False)
    start = _check_start(rates, start)
    rng = np.random.default_rng(seed)
    out = np.empty((n_paths, times.size), dtype=np.int64)
    state = np.full(n_paths, start, dtype=np.int64)
    clock = np.zeros(n_paths)
    next_census = np.zeros(n_paths, dtype=np.int64)
    active = np.arange(n_paths)
    events = 0
    while active.size:
        s = state[active]
        lam, mu = rates.at(s)
        total = lam + mu
        with np.errstate(divide="ignore"):
            wait = np.where(total > 0, rng.standard_exponential(active.size) / np.where(total > 0, total, 1.0), np.inf)
        t_new = clock[active] + wait
        # record every census time passed while the path sat at size s
        due = np.searchsorted(times, t_new, side="left")
        nc = next_census[active]
        while True:
            pending = nc < due
            if not pending.any():
                break
            idx = active[pending]
            out[idx, nc[pending]] = s[pending]
            nc[pending] += 1
        next_census[active] = nc
        clock[active] = t_new
        up = rng.random(active.size) * total < lam
        state[active] = s + np.where(up, 1, -1)
        active = active[nc < times.size]
        events += 1
        if events > max_events:
            raise ChainError(f"simulation exceeded {max_events} events per path; the rates are too high for "
                             "the census horizon")
    return out


def simulate_steps(rates: Rates, start: int, steps: np.ndarray, n_paths: int = 1,
                   seed: int | np.random.Generator | None = None) -> np.ndarray:
    """Sizes after the given numbers of steps along ``n_paths`` paths of a step chain.

    Args:
        rates: validated step probabilities (up = p, down = q).
        start: size at step 0.
        steps: whole step numbers, ascending.
        n_paths: number of independent paths.
        seed: seed or Generator.

    Returns:
        int64 array (n_paths, len(steps)).
    """
    steps = _check_times(steps, integer=True).astype(np.int64)
    start = _check_start(rates, start)
    rng = np.random.default_rng(seed)
    out = np.empty((n_paths, steps.size), dtype=np.int64)
    state = np.full(n_paths, start, dtype=np.int64)
    k = 0
    for j, target in enumerate(steps):
        while k < target:
            p, q = rates.at(state)
            u = rng.random(n_paths)
            state = state + (u < p) - ((u >= p) & (u < p + q))
            k += 1
        out[:, j] = state
    return out
