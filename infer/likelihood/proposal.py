"""Where each transition's environment lies: a Gaussian guide for the quadrature over ε.

The environment-averaged transition probability of a pair m → n over an interval is
∫ P_{mn}(t; ε) φ(x) dx with ε = σ_t·x, x standard normal. For all but the smallest
counts P_{mn}(t; ε) is sharply peaked in ε (the pair itself says what kind of year it
was), far narrower than the prior spread, so Gauss–Hermite nodes spread over the prior
miss it. The quadrature is therefore centred on each pair's own posterior over x: a
Gaussian guide N(x̂, s²) from the linear noise approximation (van Kampen 1992,
Stochastic Processes in Physics and Chemistry, ch. X; from memory) — the count after an
interval is approximately normal with mean M and variance V solving

    M' = λ(M) − μ(M),    V' = 2·(λ'(M) − μ'(M))·V + λ(M) + μ(M),

with the rates of that environment, evaluated on a grid of x and combined with the
normal prior of x. The guide only places the nodes; the quadrature weights correct
for it exactly (:mod:`.environment`), so a rough guide costs accuracy, never bias.
"""
from __future__ import annotations

import numpy as np

__all__ = ["GRID", "gaussian_guide"]

#: Grid of x (prior standard deviations) on which the guide's log density is evaluated.
GRID = np.linspace(-6.0, 6.0, 49)
#: Runge–Kutta steps of the moment equations per interval.
_RK_STEPS = 12


def _interp(rate: np.ndarray, slope: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Piecewise-linear rate and its slope at real sizes x (clipped to 0..N)."""
    N = rate.size - 1
    xc = np.clip(x, 0.0, float(N))
    i = np.minimum(xc.astype(np.int64), N - 1)
    f = xc - i
    return rate[i] * (1 - f) + rate[i + 1] * f, slope[i]


def gaussian_guide(birth: np.ndarray, death: np.ndarray, m: np.ndarray, n: np.ndarray, dt: np.ndarray,
                   sigma_t: np.ndarray, log_birth_shift: np.ndarray, log_death_shift: np.ndarray,
                   death_sign: float) -> tuple[np.ndarray, np.ndarray]:
    """A Gaussian guide N(x̂, s²) for each pair's environment x (in prior standard deviations).

    Args:
        birth, death: base rates over sizes 0..N (immigration λ_0 is not scaled).
        m, n, dt: start count, end count and interval of each pair.
        sigma_t: per pair, the standard deviation of ε over that interval.
        log_birth_shift, log_death_shift: per pair, the known log factors (covariates) on
            births and deaths.
        death_sign: 0 when the environment moves births only, −1 when a good year also
            lowers deaths (the death factor is exp(−ε − σ_t²/2)).

    Returns:
        (x̂, s): per pair, the guide's centre and spread (0 < s ≤ 1).
    """
    b = np.asarray(birth, dtype=float).copy()
    b[-1] = b[-2] if b.size > 1 else b[-1]  # the cap's birth rate is ignored; keep the curve smooth
    d = np.asarray(death, dtype=float)
    iota = b[0]
    slope_b = np.append(np.diff(b), 0.0)
    slope_d = np.append(np.diff(d), 0.0)
    x = GRID[None, :]
    st = sigma_t[:, None]
    bs = np.exp(st * x - 0.5 * st ** 2 + log_birth_shift[:, None])
    ds = np.exp(death_sign * st * x - 0.5 * abs(death_sign) * st ** 2 + log_death_shift[:, None])
    M = np.broadcast_to(m[:, None].astype(float), bs.shape).copy()
    V = np.zeros_like(M)
    h = (dt / _RK_STEPS)[:, None]

    def rhs(M_: np.ndarray, V_: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        lb, sb = _interp(b, slope_b, M_)
        ld, sd = _interp(d, slope_d, M_)
        lam = iota + (lb - iota) * bs
        mu = ld * ds
        return lam - mu, 2.0 * (sb * bs - sd * ds) * V_ + lam + mu

    for _ in range(_RK_STEPS):
        k1m, k1v = rhs(M, V)
        k2m, k2v = rhs(M + 0.5 * h * k1m, V + 0.5 * h * k1v)
        k3m, k3v = rhs(M + 0.5 * h * k2m, V + 0.5 * h * k2v)
        k4m, k4v = rhs(M + h * k3m, V + h * k3v)
        M = np.maximum(M + h / 6 * (k1m + 2 * k2m + 2 * k3m + k4m), 0.0)
        V = np.maximum(V + h / 6 * (k1v + 2 * k2v + 2 * k3v + k4v), 0.0)
    var = V + 0.25  # a count is whole: at least the spread of rounding
    logp = -0.5 * (n[:, None] - M) ** 2 / var - 0.5 * np.log(var) - 0.5 * x ** 2
    k = np.clip(np.argmax(logp, axis=1), 1, GRID.size - 2)
    rows = np.arange(k.size)
    left, mid, right = logp[rows, k - 1], logp[rows, k], logp[rows, k + 1]
    step = GRID[1] - GRID[0]
    curv = (left - 2 * mid + right) / step ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        shift = np.where(curv < 0, 0.5 * step * (left - right) / (left - 2 * mid + right), 0.0)
        s = np.where(curv < 0, 1.0 / np.sqrt(-curv), 1.0)
    x_hat = GRID[k] + np.clip(shift, -step, step)
    # never wider than the prior: a guide wider than φ makes the corrected weights e^{u²}φ grow in the tails
    s = np.clip(s, 0.02, 1.0)
    return x_hat, s
