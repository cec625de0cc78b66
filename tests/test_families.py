"""Rate families: numpy and PyTensor agree, each formula matches its docstring, priors check.

The formulas are the ones each family's docstring states (DESIGN §1 "Rate families");
the checks below restate them independently, by hand, at chosen sizes.
"""
from __future__ import annotations

import math

import numpy as np
import pytest
import pytensor
import pytensor.tensor as pt
from scipy import stats

from tallyfit.infer.errors import InputError
from tallyfit.infer.families import (FAMILIES, PRIOR_DISTRIBUTIONS, Allee, DataScale, Linear, Logistic,
                                     PerSize, check_prior, get_family, pymc_prior_logp,
                                     pymc_prior_variable, scipy_prior)

SCALE = DataScale(time_scale=1.0, count_scale=30.0, size_lo=3.0, size_hi=60.0)


def _random_draws(family, n_draws: int, seed: int) -> dict[str, np.ndarray]:
    """Parameter draws from the family's default priors (scipy, not PyMC)."""
    rng = np.random.default_rng(seed)
    draws = {}
    for spec in family.free_parameters:
        prior = scipy_prior(family.default_priors(SCALE)[spec.name])
        shape = (n_draws,) + ((spec.length,) if spec.length else ())
        draws[spec.name] = prior.rvs(size=shape, random_state=rng)
    return draws


FAMILY_CASES = [
    Linear(), Linear(immigration=True), Logistic(), Logistic(immigration=True),
    Allee(), Allee(immigration=True), PerSize(knots=5).adapt(SCALE),
    PerSize(knots=[2.0, 10.0, 30.0, 70.0], immigration=True),
]


@pytest.mark.parametrize("family", FAMILY_CASES, ids=repr)
def test_numpy_and_pytensor_rates_agree(family):
    # common practice: one formula, two backends, same numbers
    sizes = np.arange(0, 91)
    draws = _random_draws(family, 4, seed=1)
    birth, death = family.numpy_rates(draws, sizes)
    assert birth.shape == death.shape == (4, sizes.size)
    symbols = {s.name: (pt.dvector(s.name) if s.length else pt.dscalar(s.name))
               for s in family.free_parameters}
    bt, dt = family.pytensor_rates(symbols, sizes)
    f = pytensor.function(list(symbols.values()), [bt, dt])
    for i in range(4):
        b_i, d_i = f(*[draws[k][i] for k in symbols])
        np.testing.assert_allclose(b_i, birth[i], rtol=1e-12, atol=1e-12)
        np.testing.assert_allclose(d_i, death[i], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("family", FAMILY_CASES, ids=repr)
def test_rates_are_valid_and_continue_past_any_cap(family):
    # common practice: rates are >= 0, no death from size 0 (μ_0 = 0), λ_0 = ι
    sizes = np.arange(0, 5001)  # far beyond any cap the model would use
    draws = _random_draws(family, 3, seed=2)
    birth, death = family.numpy_rates(draws, sizes)
    assert np.all(np.isfinite(birth)) and np.all(np.isfinite(death))
    assert np.all(birth >= 0) and np.all(death >= 0)
    np.testing.assert_array_equal(death[:, 0], 0.0)
    expected_b0 = draws["immigration"] if family.immigration else np.zeros(3)
    np.testing.assert_allclose(birth[:, 0], expected_b0, rtol=1e-14)
    # the same formula evaluated on a short range and a long one gives the same values
    b_short, d_short = family.numpy_rates(draws, sizes[:50])
    np.testing.assert_array_equal(b_short, birth[:, :50])
    np.testing.assert_array_equal(d_short, death[:, :50])


def test_linear_formula():
    # formula of the docstring: λ_n = b n + ι, μ_n = d n
    fam = Linear(immigration=True)
    n = np.array([0, 1, 7, 250])
    b, d = fam.numpy_rates({"birth_rate": 0.4, "death_rate": 0.7, "immigration": 1.5}, n)
    np.testing.assert_allclose(b[0], 0.4 * n + 1.5)
    np.testing.assert_allclose(d[0], 0.7 * n)


def test_logistic_formula_and_balance_at_carrying_capacity():
    # docstring: λ_n = b n, μ_n = n (d + (b - d) n / K); births equal deaths at n = K
    fam = Logistic()
    bb, dd, K = 0.9, 0.3, 60.0
    n = np.array([1.0, 20.0, 60.0, 61.0, 200.0])
    b, d = fam.numpy_rates({"birth_rate": bb, "death_rate": dd, "carrying_capacity": K}, n)
    np.testing.assert_allclose(b[0], bb * n)
    np.testing.assert_allclose(d[0], n * (dd + (bb - dd) * n / K))
    np.testing.assert_allclose(b[0, 2], d[0, 2], rtol=1e-14)        # at K
    assert b[0, 1] > d[0, 1] and b[0, 3] < d[0, 3]                    # below / above K
    # many draws at once, balance at each draw's own K
    draws = _random_draws(fam, 50, seed=3)
    Ks = np.round(draws["carrying_capacity"]).clip(1, 5000)
    draws["carrying_capacity"] = Ks
    b, d = fam.numpy_rates(draws, np.arange(0, 5001))
    rows = np.arange(50)
    kept = draws["birth_rate"] > draws["death_rate"]
    np.testing.assert_allclose(b[rows, Ks.astype(int)][kept], d[rows, Ks.astype(int)][kept],
                               rtol=1e-12)


def test_logistic_death_clipped_when_birth_below_death():
    # docstring: per-capita death max(0, d + (b - d) n/K) — zero from n = K d/(d - b) on
    fam = Logistic()
    b, d = fam.numpy_rates({"birth_rate": 0.2, "death_rate": 0.5, "carrying_capacity": 10.0},
                           np.arange(0, 40))
    threshold = 10.0 * 0.5 / (0.5 - 0.2)
    n = np.arange(0, 40)
    np.testing.assert_array_equal(d[0][n >= threshold], 0.0)
    assert np.all(d[0][(n > 0) & (n < threshold)] > 0)


def test_allee_formula_balance_and_threshold():
    # docstring: b(n) = b n/(A + n), d(n) = d + c n with c = (b K/(A+K) - d)/K
    fam = Allee()
    bb, dd, K, A = 1.2, 0.3, 50.0, 8.0
    n = np.arange(0, 200, dtype=float)
    b, d = fam.numpy_rates({"birth_rate": bb, "death_rate": dd, "carrying_capacity": K,
                            "allee_threshold": A}, n)
    c = (bb * K / (A + K) - dd) / K
    np.testing.assert_allclose(b[0], n * bb * n / (A + n))
    np.testing.assert_allclose(d[0], n * (dd + c * n))
    np.testing.assert_allclose(b[0, 50], d[0, 50], rtol=1e-13)      # balance at K
    # per-capita birth is half of b at n = A
    np.testing.assert_allclose(b[0, 8] / 8.0, bb / 2)
    # deaths outrun births at small sizes (the Allee threshold), births win between
    # the threshold and K, deaths win above K
    assert d[0, 1] > b[0, 1]
    assert b[0, 30] > d[0, 30]
    assert d[0, 80] > b[0, 80]
    # A -> 0 gives the logistic family
    b0, d0 = fam.numpy_rates({"birth_rate": bb, "death_rate": dd, "carrying_capacity": K,
                              "allee_threshold": 1e-12}, n)
    bl, dl = Logistic().numpy_rates({"birth_rate": bb, "death_rate": dd,
                                     "carrying_capacity": K}, n)
    np.testing.assert_allclose(b0, bl, rtol=1e-9)
    np.testing.assert_allclose(d0, dl, rtol=1e-9)


def test_per_size_piecewise_linear_in_log_and_flat_outside():
    # docstring: log b(n) linear between knots, constant beyond the first and last knot
    fam = PerSize(knots=[5.0, 15.0, 25.0, 45.0])
    xb = np.array([-1.0, 0.0, -0.5, -2.0])
    xd = np.array([-2.0, -1.5, 0.5, 1.0])
    n = np.arange(0, 100, dtype=float)
    b, d = fam.numpy_rates({"log_birth_knots": xb, "log_death_knots": xd}, n)
    pb = b[0, 1:] / n[1:]
    pd_ = d[0, 1:] / n[1:]
    np.testing.assert_allclose(np.log(pb), np.interp(n[1:], fam.knot_sizes, xb), rtol=1e-12)
    np.testing.assert_allclose(np.log(pd_), np.interp(n[1:], fam.knot_sizes, xd), rtol=1e-12)
    np.testing.assert_allclose(pb[n[1:] >= 45], math.exp(-2.0))  # flat beyond the last knot
    np.testing.assert_allclose(pb[n[1:] <= 5], math.exp(-1.0))   # and below the first


def test_per_size_random_walk_has_second_order_differences():
    # docstring: x_j - 2 x_{j-1} + x_{j-2} = σ z_j, x_0 = level, x_1 = level + slope
    fam = PerSize(knots=6).adapt(SCALE)
    draws = _random_draws(fam, 5, seed=4)
    knots = np.asarray(fam.knot_sizes)
    b, _ = fam.numpy_rates(draws, knots)   # at the knot sizes, b(s_j) = exp(x_j)
    x = np.log(b / knots)
    level = draws["log_birth_level"]
    np.testing.assert_allclose(x[:, 0], level)
    np.testing.assert_allclose(x[:, 1] - x[:, 0], draws["log_birth_slope"])
    second = x[:, 2:] - 2 * x[:, 1:-1] + x[:, :-2]
    np.testing.assert_allclose(second, draws["birth_smoothness"][:, None]
                               * draws["birth_innovations"], atol=1e-12)
    # knots spread evenly over the observed sizes
    np.testing.assert_allclose(fam.knot_sizes, np.linspace(3.0, 60.0, 6))


def test_site_parameters_shift_growth_on_log_scale():
    # partial pooling: b_site = b·exp(u); per-size: log b(s_j) + u; other parameters shared
    draws = {"birth_rate": np.array([0.5, 0.8]), "death_rate": np.array([0.2, 0.3]),
             "carrying_capacity": np.array([40.0, 50.0])}
    u = np.array([0.3, -0.4])
    site = Logistic().site_parameters(draws, u)
    np.testing.assert_allclose(site["birth_rate"], draws["birth_rate"] * np.exp(u))
    np.testing.assert_array_equal(site["death_rate"], draws["death_rate"])
    ps = PerSize(knots=[1.0, 5.0, 9.0])
    knots = {"log_birth_knots": np.zeros((2, 3)), "log_death_knots": np.ones((2, 3))}
    site = ps.site_parameters(knots, u)
    np.testing.assert_allclose(site["log_birth_knots"], u[:, None] * np.ones((2, 3)))
    np.testing.assert_array_equal(site["log_death_knots"], knots["log_death_knots"])


def test_registry_and_unknown_family():
    assert set(FAMILIES) == {"linear", "logistic", "allee", "per-size"}
    assert isinstance(get_family("Logistic", immigration=True), Logistic)
    assert get_family("per_size").name == "per-size"
    with pytest.raises(InputError, match="linear, logistic, allee, per-size"):
        get_family("gompertz")
    with pytest.raises(InputError, match="options"):
        get_family("linear", carrying=3)


def test_priors_resolve_override_and_refuse_bad():
    fam = Logistic(immigration=True)
    pri = fam.resolve_priors({"birth_rate": {"dist": "gamma", "alpha": 2, "beta": 4}}, SCALE)
    assert pri["birth_rate"] == {"dist": "gamma", "alpha": 2.0, "beta": 4.0}
    assert pri["carrying_capacity"]["mu"] == pytest.approx(math.log(30.0))
    with pytest.raises(InputError, match="no parameter"):
        fam.resolve_priors({"allee_threshold": {"dist": "lognormal", "mu": 0, "sigma": 1}})
    with pytest.raises(InputError, match="does not fit"):
        fam.resolve_priors({"birth_rate": {"dist": "normal", "mu": 0, "sigma": 1}})
    with pytest.raises(InputError, match="sigma"):
        check_prior("x", {"dist": "lognormal", "mu": 0})
    with pytest.raises(InputError, match="> 0"):
        check_prior("x", {"dist": "lognormal", "mu": 0, "sigma": -1})
    with pytest.raises(InputError, match="cannot be changed"):
        PerSize(4).adapt(SCALE).resolve_priors(
            {"birth_innovations": {"dist": "normal", "mu": 0, "sigma": 3}})


def test_scipy_prior_matches_lognormal_density():
    # lognormal density (common practice): exp(-(log x - mu)^2 / (2 s^2)) / (x s sqrt(2π))
    spec = {"dist": "lognormal", "mu": -0.5, "sigma": 1.3}
    x = np.array([0.05, 0.3, 1.0, 4.0])
    dens = np.exp(-(np.log(x) + 0.5) ** 2 / (2 * 1.3 ** 2)) / (x * 1.3 * np.sqrt(2 * np.pi))
    np.testing.assert_allclose(scipy_prior(spec).pdf(x), dens, rtol=1e-12)
    assert isinstance(scipy_prior({"dist": "beta", "alpha": 2, "beta": 2}).dist,
                      type(stats.beta))


# one example of every distribution of the prior language, and points inside its support
PRIOR_EXAMPLES = {
    "lognormal": ({"dist": "lognormal", "mu": -0.5, "sigma": 1.3}, [0.05, 0.6, 3.0]),
    "halfnormal": ({"dist": "halfnormal", "sigma": 0.7}, [0.01, 0.5, 2.0]),
    "gamma": ({"dist": "gamma", "alpha": 2.5, "beta": 4.0}, [0.05, 0.6, 2.0]),
    "exponential": ({"dist": "exponential", "lam": 3.0}, [0.01, 0.4, 2.0]),
    "uniform": ({"dist": "uniform", "lower": 0.2, "upper": 1.7}, [0.3, 1.0, 1.6]),
    "normal": ({"dist": "normal", "mu": 0.4, "sigma": 2.0}, [-3.0, 0.1, 4.0]),
    "beta": ({"dist": "beta", "alpha": 2.0, "beta": 5.0}, [0.05, 0.3, 0.9]),
}


def test_prior_examples_cover_the_table():
    assert set(PRIOR_EXAMPLES) == set(PRIOR_DISTRIBUTIONS)


@pytest.mark.parametrize("name", sorted(PRIOR_EXAMPLES))
def test_pymc_prior_density_matches_scipy(name):
    # scipy.stats densities (an implementation independent of PyMC) against the PyMC
    # side of the same table entry, for the density and for a named model variable
    import pymc as pm

    spec, points = PRIOR_EXAMPLES[name]
    x = np.asarray(points)
    expected = scipy_prior(spec).logpdf(x)
    got = pymc_prior_logp(spec, pt.as_tensor_variable(x)).eval()
    np.testing.assert_allclose(got, expected, rtol=1e-12)
    with pm.Model(coords={"k": [0, 1, 2]}):
        rv = pymc_prior_variable("theta", spec, dims="k")
    assert tuple(rv.shape.eval()) == (3,)
    np.testing.assert_allclose(pm.logp(rv, x).eval(), expected, rtol=1e-12)


def test_describe_states_formula_and_priors():
    fam = Allee(immigration=True)
    text = fam.describe(fam.default_priors(SCALE))
    assert "b·n/(A + n)" in text and "allee_threshold" in text and "lognormal" in text
    assert "+ ι" in text


# --------------------------------------------------------------------------- sampler coordinates
@pytest.mark.parametrize("which", ["regulated", "regulated+immigration", "immigration", "allee+immigration"])
def test_sampler_coordinates_invert_and_jacobian_matches_finite_differences(which):
    # change of variables (common practice): the stated log|det ∂θ/∂y| against the
    # log-determinant (numpy.linalg.slogdet) of a central-difference Jacobian
    from tallyfit.infer.families import NUMPY, ImmigrationCoordinates, RegulatedCoordinates

    if which == "immigration":
        coords = ImmigrationCoordinates(count_scale=SCALE.count_scale)
        theta = {"birth_rate": 0.9, "immigration": 2.5}
        assert Linear(immigration=True).sampling_coordinates(SCALE).replaces == coords.replaces
        assert Linear(immigration=False).sampling_coordinates(SCALE) is None
    elif which == "allee+immigration":
        coords = ImmigrationCoordinates(count_scale=SCALE.count_scale, threshold=True)
        theta = {"birth_rate": 0.9, "immigration": 2.5, "allee_threshold": 6.0}
        assert Allee(immigration=True).sampling_coordinates(SCALE).replaces == coords.replaces
        assert Allee(immigration=False).sampling_coordinates(SCALE) is None
    else:
        coords = RegulatedCoordinates(count_scale=SCALE.count_scale, immigration=which != "regulated")
        theta = {"birth_rate": 0.9, "death_rate": 0.2, "carrying_capacity": 45.0}
        if which != "regulated":
            theta["immigration"] = 2.5
    y = coords.from_parameters(theta)
    back, log_jac = coords.to_parameters(NUMPY, y)
    for k, v in theta.items():
        assert float(back[k]) == pytest.approx(v, rel=1e-12)
    names = list(coords.names)
    h = 1e-6
    jac = np.empty((len(coords.replaces), len(names)))
    for j, name in enumerate(names):
        up, down = dict(y), dict(y)
        up[name] += h
        down[name] -= h
        pu, _ = coords.to_parameters(NUMPY, up)
        pd_, _ = coords.to_parameters(NUMPY, down)
        jac[:, j] = [(float(pu[k]) - float(pd_[k])) / (2 * h) for k in coords.replaces]
    sign, logdet = np.linalg.slogdet(jac)
    assert sign != 0
    assert float(log_jac) == pytest.approx(logdet, abs=1e-6)


def test_regulated_coordinates_refuse_points_outside_b_above_d():
    from tallyfit.infer.families import RegulatedCoordinates

    coords = RegulatedCoordinates(count_scale=30.0, immigration=False)
    with pytest.raises(InputError, match="b > d"):
        coords.from_parameters({"birth_rate": 0.2, "death_rate": 0.3, "carrying_capacity": 40.0})
    start = coords.initial_point({"birth_rate": 0.2, "death_rate": 0.3, "carrying_capacity": 40.0})
    assert start["logit_death_share"] == pytest.approx(0.0)  # d moved to b/2


def test_logistic_prior_draws_are_the_prior_restricted_to_b_above_d():
    # the restricted prior: b > d always; K is independent of (b, d), so its draws keep
    # the unrestricted lognormal law (Kolmogorov–Smirnov against scipy.stats.lognorm);
    # P(b > d) for two lognormals = Φ((μ_b − μ_d)/sqrt(σ_b² + σ_d²)) (scipy.stats.norm)
    fam = Logistic()
    priors = fam.resolve_priors(scale=SCALE)
    draws = fam.draw_prior(priors, 4000, np.random.default_rng(5))
    assert np.all(draws["birth_rate"] > draws["death_rate"])
    k = priors["carrying_capacity"]
    assert stats.kstest(draws["carrying_capacity"],
                        stats.lognorm(s=k["sigma"], scale=math.exp(k["mu"])).cdf).pvalue > 0.01
    # the restriction keeps b's prior where b > d: P(b > x | b > d) from a large
    # unrestricted reference sample
    b, d = priors["birth_rate"], priors["death_rate"]
    p_keep = stats.norm.cdf((b["mu"] - d["mu"]) / math.hypot(b["sigma"], d["sigma"]))
    rng = np.random.default_rng(6)
    bb = scipy_prior(b).rvs(size=200_000, random_state=rng)
    dd = scipy_prior(d).rvs(size=200_000, random_state=rng)
    assert np.mean(bb > dd) == pytest.approx(p_keep, abs=0.005)
    ref = bb[bb > dd]
    assert stats.ks_2samp(draws["birth_rate"], ref).pvalue > 0.01


@pytest.mark.parametrize("family", ["logistic", "linear", "allee"])
def test_model_prior_in_coordinates_is_the_family_prior_with_jacobian(family):
    # the model's log density without the likelihood, at a point given in sampler
    # coordinates, equals Σ log p_k(θ_k) (scipy.stats densities) + log|det ∂θ/∂y|
    import pytensor as _pt

    from tallyfit.infer.counts import CountData
    from tallyfit.infer.families import NUMPY
    from tallyfit.infer.model import build_count_model

    data = CountData.single(np.arange(8.0), np.array([20, 24, 27, 31, 30, 33, 29, 32.0]))
    cm = build_count_model(data, {"logistic": Logistic, "linear": Linear, "allee": Allee}[family](immigration=True))
    coords = cm.family.sampling_coordinates(cm.scale)
    theta = {"birth_rate": 0.7, "death_rate": 0.25, "carrying_capacity": 35.0, "immigration": 0.8,
             "allee_threshold": 4.0}
    theta = {k: v for k, v in theta.items() if k in coords.replaces}
    y = coords.from_parameters(theta)
    model = cm.model
    graph = model.replace_rvs_by_values([model["coordinate_prior"]])[0]
    fn = _pt.function(model.value_vars, graph, on_unused_input="ignore")
    value = float(fn(*[y.get(v.name, 0.0) for v in model.value_vars]))  # the potential holds only y
    _, log_jac = coords.to_parameters(NUMPY, y)
    expected = sum(scipy_prior(cm.priors[k]).logpdf(v) for k, v in theta.items()) + float(log_jac)
    assert value == pytest.approx(expected, rel=1e-10)


def test_per_size_prior_draws_carry_the_knot_values():
    # the knot values follow the random-walk formula of the PerSize docstring
    fam = PerSize(knots=5).adapt(SCALE)
    draws = fam.draw_prior(fam.resolve_priors(scale=SCALE), 50, np.random.default_rng(2))
    assert draws["birth_innovations"].shape == (50, 3)
    x = draws["log_birth_knots"]
    assert x.shape == (50, 5)
    np.testing.assert_allclose(x[:, 0], draws["log_birth_level"])
    np.testing.assert_allclose(x[:, 1] - x[:, 0], draws["log_birth_slope"])
    second = x[:, 2:] - 2 * x[:, 1:-1] + x[:, :-2]
    np.testing.assert_allclose(second, draws["birth_smoothness"][:, None]
                               * draws["birth_innovations"], atol=1e-12)
