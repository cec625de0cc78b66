"""Push-forward: derived quantities for fixed draws equal the chain solvers' answers, and
scenarios change the rates as their formulas say."""
from __future__ import annotations

import numpy as np
import pytest
import xarray as xr

from tallyfit.chain import BirthDeathChain
from tallyfit.infer.criterion_e import (CATEGORIES, criterion_e_category, criterion_e_horizons,
                                        horizons_with_criterion_e)
from tallyfit.infer.pushforward import PushForwardSpec, push_forward, summarise
from tallyfit.infer.families import get_family
from tallyfit.infer.scenarios import BASELINE, Scenario, scenarios_from_table
from tallyfit.infer.errors import InputError


def _posterior(values: dict[str, list[float]]) -> xr.Dataset:
    n = len(next(iter(values.values())))
    return xr.Dataset({k: (("chain", "draw"), np.asarray(v, float).reshape(1, n)) for k, v in values.items()},
                      coords={"chain": [0], "draw": np.arange(n)})


def test_iucn_horizons_follow_criterion_e():
    # IUCN (2012) Red List Categories and Criteria v3.1, criterion E: CR max(10 y, 3 G), EN max(20 y, 5 G),
    # both capped at 100 y; VU 100 y.
    assert criterion_e_horizons(None) == {"CR": 10.0, "EN": 20.0, "VU": 100.0}
    assert criterion_e_horizons(5.0) == {"CR": 15.0, "EN": 25.0, "VU": 100.0}
    assert criterion_e_horizons(40.0) == {"CR": 100.0, "EN": 100.0, "VU": 100.0}


def test_iucn_category_thresholds():
    # IUCN (2012) criterion E: CR >= 50%, EN >= 20%, VU >= 10%.
    p_cr = np.array([0.5, 0.49, 0.1, 0.0, 0.0])
    p_en = np.array([0.6, 0.2, 0.19, 0.05, 0.0])
    p_vu = np.array([0.9, 0.5, 0.3, 0.1, 0.0999])
    assert [CATEGORIES[c] for c in criterion_e_category(p_cr, p_en, p_vu)] == ["CR", "EN", "VU", "VU", "below VU"]


def test_push_forward_equals_chain_solvers_for_fixed_draws():
    fam = get_family("logistic", immigration=True)
    post = _posterior({"birth_rate": [0.9, 0.7], "death_rate": [0.3, 0.35],
                       "carrying_capacity": [40.0, 25.0], "immigration": [0.5, 0.2]})
    cap = 120
    spec = PushForwardSpec(cap=cap, sites=("a", "b"), starts=(30, 8),
                           horizons=horizons_with_criterion_e([5.0, 50.0], None), thresholds=(0, 3))
    ds = push_forward(fam, post, spec, [BASELINE, Scenario("cull", harvest_rate=0.2)], workers=1)
    sizes = np.arange(cap + 1)
    for i in range(2):
        draw = {k: post[k].values[0, i:i + 1] for k in post.data_vars}
        b, d = fam.numpy_rates(draw, sizes)
        chain = BirthDeathChain(b[0], d[0])
        st = chain.stationary()
        got = ds["stationary_pmf"].sel(scenario="baseline", chain=0, draw=i).values
        np.testing.assert_allclose(got, st.pmf, rtol=1e-9, atol=1e-300)  # cap far above K: same law
        b0 = b[0].copy()
        b0[0] = 0.0
        closed = BirthDeathChain(b0, d[0])
        qs = closed.quasi_stationary()
        assert ds["quasi_decay_rate"].sel(scenario="baseline", chain=0, draw=i) == pytest.approx(qs.decay_rate, rel=1e-9)
        for j, start in enumerate(spec.starts):
            curve = closed.extinction_curve(start, spec.horizons, threshold=3)
            got = ds["extinction_probability"].sel(scenario="baseline", chain=0, draw=i, site=spec.sites[j], threshold=3)
            np.testing.assert_allclose(got.values, curve.probability, rtol=1e-8, atol=1e-15)
            lt = chain.mean_time_to_extinction([start], log=True)[0] / np.log(10)
            assert ds["log10_mean_time_to_extinction"].sel(scenario="baseline", chain=0, draw=i,
                                                           site=spec.sites[j]) == pytest.approx(lt, rel=1e-12)
        # the scenario adds a per-capita removal rate 0.2 to the death rates (paired with the baseline)
        cull = ds["death_per_capita"].sel(scenario="cull", chain=0, draw=i).values[1:]
        base = ds["death_per_capita"].sel(scenario="baseline", chain=0, draw=i).values[1:]
        np.testing.assert_allclose(cull - base, 0.2, rtol=1e-12)
    # sites independent given the rates: P(all extinct) is the product over sites (common practice)
    allp = ds["extinction_probability_all_sites"].values
    np.testing.assert_allclose(allp, ds["extinction_probability"].prod("site").values, rtol=1e-14)
    s = summarise(ds)
    assert s["baseline"]["stationary_exists_probability"] == 1.0
    assert sum(s["cull"]["iucn_category_probability"].values()) == pytest.approx(1.0)


def test_partial_pooling_gives_each_site_its_own_rates():
    # With site offsets u_s the site's birth rate is b·exp(u_s) (infer.families.RateFamily.site_parameters);
    # the site-indexed results must equal the chain solvers run on that site's own rates.
    fam = get_family("logistic", immigration=False)
    post = _posterior({"birth_rate": [0.9, 0.7], "death_rate": [0.3, 0.35], "carrying_capacity": [30.0, 25.0]})
    offsets = np.array([[[0.4, -0.5], [-0.2, 0.1]]])  # (chain, draw, site)
    post["site_offset"] = (("chain", "draw", "site"), offsets)
    post = post.assign_coords(site=["south", "north"])
    cap = 90
    # spec sites in a different order from the posterior's: matched by name
    spec = PushForwardSpec(cap=cap, sites=("north", "south"), starts=(12, 20), horizons=(5.0, 20.0), thresholds=(0,))
    ds = push_forward(fam, post, spec, [BASELINE], workers=1)
    sizes = np.arange(cap + 1)
    for i in range(2):
        shared = {k: post[k].values[0, i:i + 1] for k in ("birth_rate", "death_rate", "carrying_capacity")}
        for site, start in zip(spec.sites, spec.starts):
            u = float(post["site_offset"].sel(site=site).values[0, i])
            own = dict(shared, birth_rate=shared["birth_rate"] * np.exp(u))
            b, d = fam.numpy_rates(own, sizes)
            closed = BirthDeathChain(b[0], d[0])
            curve = closed.extinction_curve(start, spec.horizons)
            got = ds["extinction_probability"].sel(scenario="baseline", chain=0, draw=i, site=site, threshold=0)
            np.testing.assert_allclose(got.values, curve.probability, rtol=1e-8, atol=1e-15)
            lt = closed.mean_time_to_extinction([start], log=True)[0] / np.log(10)
            assert ds["log10_mean_time_to_extinction"].sel(scenario="baseline", chain=0, draw=i,
                                                           site=site) == pytest.approx(lt, rel=1e-12)
        # rate-only quantities describe the typical site (offset 0)
        b, d = fam.numpy_rates(shared, sizes)
        qs = BirthDeathChain(b[0], d[0]).quasi_stationary()
        assert ds["quasi_decay_rate"].sel(scenario="baseline", chain=0, draw=i) == pytest.approx(qs.decay_rate, rel=1e-9)
    allp = ds["extinction_probability_all_sites"].values
    np.testing.assert_allclose(allp, ds["extinction_probability"].prod("site").values, rtol=1e-14)
    with pytest.raises(InputError, match="no site 'east'"):
        push_forward(fam, post, PushForwardSpec(cap=cap, sites=("east",), starts=(5,), horizons=(5.0,)), workers=1)


def test_no_immigration_means_no_stationary_law_and_supercritical_linear_is_unregulated():
    lin = get_family("linear", immigration=True)
    post = _posterior({"birth_rate": [0.5, 0.6], "death_rate": [0.4, 0.3], "immigration": [0.5, 0.5]})
    spec = PushForwardSpec(cap=200, sites=("s",), starts=(10,), horizons=(10.0, 20.0, 100.0))
    ds = push_forward(lin, post, spec, [BASELINE], workers=1)
    # Karlin & McGregor (1957): with λ_n = bn + ι, μ_n = dn the stationary sum converges iff b < d.
    assert ds["stationary_exists"].values.tolist() == [[[False, False]]]
    log = get_family("logistic", immigration=False)
    post2 = _posterior({"birth_rate": [0.9], "death_rate": [0.3], "carrying_capacity": [30.0]})
    ds2 = push_forward(log, post2, spec, [BASELINE], workers=1)
    assert not bool(ds2["stationary_exists"].values.ravel()[0])  # 0 absorbing: only the quasi-stationary law
    assert np.isfinite(ds2["quasi_decay_rate"].values).all()


def test_scenario_formulas():
    sizes = np.arange(6.0)
    birth = 0.8 * sizes + 0.5
    death = 0.3 * sizes
    sc = Scenario("mix", harvest_rate=0.1, harvest_quota=2.0, death_factor=0.5, birth_factor=2.0, added_immigration=1.0)
    b, d = sc.apply(birth, death, sizes)
    np.testing.assert_allclose(b, 2.0 * 0.8 * sizes + 0.5 + 1.0)
    np.testing.assert_allclose(d, 0.5 * 0.3 * sizes + 0.1 * sizes + 2.0 * (sizes >= 1))
    assert d[0] == 0.0


@pytest.mark.parametrize("table, key", [
    ({"baseline": {"harvest_rate": 0.1}}, "scenario.baseline"),
    ({"cull": {"harvest_rat": 0.1}}, "scenario.cull.harvest_rat"),
    ({"cull": {"harvest_rate": -0.1}}, "scenario.cull.harvest_rate"),
    ({"cull": {"harvest_rate": "lots"}}, "scenario.cull.harvest_rate"),
    ({"cull": {"harvest_rate": True}}, "scenario.cull.harvest_rate"),
    ({"cull": 3}, "scenario.cull"),
])
def test_bad_scenarios_name_the_setting(table, key):
    with pytest.raises(InputError) as err:
        scenarios_from_table(table, source="run.toml")
    assert key in str(err.value) and "run.toml" in str(err.value)
