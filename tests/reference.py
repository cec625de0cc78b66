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
