"""The solvers under extreme rates (1e-12 to 1e6 per capita, caps up to 5000): no overflow,
no NaN, no silent truncation — every answer is finite, or infinite for a stated reason."""
from __future__ import annotations

import numpy as np
from hypothesis import given, settings, strategies as st

from tallyfit.chain import BirthDeathChain

SETTINGS = dict(deadline=None, max_examples=25)


@st.composite
def extreme_chains(draw, max_cap=5000):
    cap = draw(st.integers(2, max_cap))
    n = np.arange(cap + 1, dtype=float)
    lb = draw(st.floats(-12, 6))
    ld = draw(st.floats(-12, 6))
    crowd = draw(st.floats(-12, 2))  # per-capita death rising with size: 10**crowd per animal
    iota = draw(st.one_of(st.just(0.0), st.floats(1e-12, 1e6)))
    birth = 10.0 ** lb * n + iota
    death = n * (10.0 ** ld + 10.0 ** crowd * n)
    return birth, death


@settings(**SETTINGS)
@given(extreme_chains())
def test_stationary_mean_time_and_extinction_stay_finite(rates):
    birth, death = rates
    c = BirthDeathChain(birth, death)
    s = c.stationary()
    if birth[0] > 0:
        assert s.exists
        assert np.all(np.isfinite(s.pmf)) and abs(s.pmf.sum() - 1) < 1e-9  # common practice
        assert s.residual <= 1e-8
    else:
        assert not s.exists and "quasi_stationary" in s.reason
    u = c.extinction_probability()
    assert np.all((u >= 0) & (u <= 1))
    log_t = c.mean_time_to_extinction(log=True)
    assert not np.isnan(log_t).any()
    assert np.all(np.diff(log_t[1:]) >= -1e-9)  # the mean time never falls with the start size


@settings(**SETTINGS)
@given(extreme_chains(max_cap=3000))
def test_quasi_stationary_is_a_distribution(rates):
    birth, death = rates
    b0 = birth.copy()
    b0[0] = 0.0
    qs = BirthDeathChain(b0, death).quasi_stationary()
    assert np.all(np.isfinite(qs.pmf)) and qs.pmf[0] == 0 and abs(qs.pmf.sum() - 1) < 1e-9
    # θ itself may be below the float range for a strongly growing population; its log is kept
    assert np.isfinite(qs.log_decay_rate) and qs.decay_rate >= 0
    assert qs.decay_rate == np.exp(qs.log_decay_rate)


@settings(**SETTINGS)
@given(extreme_chains(max_cap=400), st.data())
def test_extinction_curve_reports_its_bound(rates, data):
    birth, death = rates
    b0 = birth.copy()
    b0[0] = 0.0
    c = BirthDeathChain(b0, death)
    top = float(np.max(b0[:-1] + death[:-1]).clip(min=death[-1]))
    t_max = min(50.0, 2e5 / top)  # keep the uniformization steps affordable
    times = np.linspace(t_max / 5, t_max, 5)
    start = data.draw(st.integers(1, birth.size - 1))
    curve = c.extinction_curve(start, times)
    p = curve.probability
    assert np.all(np.isfinite(p)) and np.all((p >= 0) & (p <= 1)) and np.all(np.diff(p) >= 0)
    assert np.all(curve.error_bound <= 1e-9)  # the bound is stated, and small
