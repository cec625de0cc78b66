"""Independent references shared by the tests (not tallyfit code)."""
from __future__ import annotations

import numpy as np


def generator(birth: np.ndarray, death: np.ndarray) -> np.ndarray:
    """Dense generator Q on sizes 0..N with a reflecting cap (birth[N] ignored), built directly
    from the rates, for scipy.linalg.expm / solve / eig references."""
    n_cap = birth.size - 1
    q = np.zeros((n_cap + 1, n_cap + 1))
    for i in range(n_cap + 1):
        lam = birth[i] if i < n_cap else 0.0
        if i < n_cap:
            q[i, i + 1] = lam
        if i > 0:
            q[i, i - 1] = death[i]
        q[i, i] = -(lam + death[i])
    return q


def gillespie_years(birth: np.ndarray, death: np.ndarray, sigma: float, start: int, years: int,
                    rng: np.random.Generator) -> list[int]:
    """Size after each of ``years`` whole years, exact event by event (Gillespie 1977, J. Phys.
    Chem. 81:2340) on sizes 0..N (N = birth.size − 1, no births at N). Each year draws
    ε ~ N(0, σ²) and scales the births, not the immigration birth[0], by exp(ε − σ²/2)."""
    import math

    n_cap = birth.size - 1
    n, out = start, []
    for _ in range(years):
        s = math.exp(sigma * rng.standard_normal() - sigma ** 2 / 2)
        t = 0.0
        while True:
            up = birth[0] + (birth[n] - birth[0]) * s if n < n_cap else 0.0
            down = death[n]
            t += rng.exponential(1 / (up + down))
            if t > 1:
                break
            n += 1 if rng.random() < up / (up + down) else -1
        out.append(int(n))
    return out
