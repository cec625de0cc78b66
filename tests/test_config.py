"""Settings and rates files: every malformed file stops with the file and key named;
the TOML readers never fail with anything but InputError (hypothesis fuzzing)."""
from __future__ import annotations

import json
import string

import pytest
from hypothesis import HealthCheck, given, settings, strategies as st

from tallyfit.cli import main
from tallyfit.inputs.settings import RunSettings, load_settings
from tallyfit.infer.errors import InputError
from tallyfit.inputs.rates_file import load_rates_file
from tallyfit.solve import solve_rates

BAD_RUN_TOML = [
    ("[fit\nchains = 4", "not valid TOML"),
    ("[fitting]\nchains = 4", "[fitting]"),
    ("[fit]\nchain = 4", "fit.chain"),
    ("[fit]\nchains = 'four'", "fit.chains"),
    ("[fit]\nchains = 0", "chains"),
    ("[fit]\ndraws = 5", "draws"),
    ("[fit]\ndetection = 1.5", "detection"),
    ("[fit]\ndetection = 'guess'", "detection"),
    ("[fit]\ndetection = 0", "detection"),
    ("[fit]\nmax_size = 1", "max_size"),
    ("[fit]\nimmigration = 'yes'", "fit.immigration"),
    ("[derive]\nhorizons = [10, -5]", "horizons"),
    ("[derive]\nhorizons = ['ten']", "derive.horizons"),
    ("[derive]\nthresholds = [1.5]", "thresholds"),
    ("[derive]\ngeneration_time = -2", "generation_time"),
    ("[derive]\ncredible_level = 1.5", "credible_level"),
    ("[derive]\nhorizon = [10]", "derive.horizon"),
    ("fit = 3", "fit"),
    ("[priors]\nbirth_rate = 3", "priors.birth_rate"),
    ("[scenario.baseline]\nharvest_rate = 0.1", "scenario.baseline"),
    ("[scenario.cull]\nharvest = 0.1", "scenario.cull.harvest"),
    ("[scenario.cull]\nharvest_rate = -1", "scenario.cull.harvest_rate"),
    ("[fit]\nchains = 4\nchains = 5", "not valid TOML"),
]


@pytest.mark.parametrize("text, key", BAD_RUN_TOML)
def test_bad_run_toml_names_file_and_key(tmp_path, text, key):
    path = tmp_path / "run.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_settings(path)
    assert "run.toml" in str(err.value) and key in str(err.value)


def test_binary_settings_file(tmp_path):
    path = tmp_path / "run.toml"
    path.write_bytes(b"\xff\xfe\x00junk")
    with pytest.raises(InputError, match="UTF-8"):
        load_settings(path)


def test_good_run_toml_round_trips(tmp_path):
    path = tmp_path / "run.toml"
    path.write_text("[fit]\nrates = 'linear'\nchains = 2\ndetection = 0.8\n[derive]\nhorizons = [5, 50]\n"
                    "thresholds = [0, 10]\ngeneration_time = 4\n[scenario.cull]\nharvest_rate = 0.05\n", encoding="utf-8")
    s = load_settings(path)
    assert (s.rates, s.chains, s.detection, s.horizons, s.thresholds, s.generation_time) == \
        ("linear", 2, 0.8, (5.0, 50.0), (0, 10), 4.0)
    assert [sc.name for sc in s.scenarios] == ["cull"] and s.scenarios[0].harvest_rate == 0.05
    assert s.with_options(chains=None, draws=300).draws == 300


BAD_RATES_TOML = [
    ("family = 'logistic'\nstart = 5\n[parameters]\nbirth_rate = 1.0", "cap"),
    ("family = 'logistic'\ncap = 50\nstart = 5\n[parameters]\nbirth_rate = 1.0", "missing parameter"),
    ("family = 'wobbly'\ncap = 50\nstart = 5\n[parameters]\nbirth_rate = 1.0", "unknown rate family"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]", "start"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 7", "start"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 1\nhorizons = [0]", "horizons"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 1\nthresholds = [-1]", "thresholds"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 1\ncolour = 'red'", "colour"),
    ("birth = [1, 'x', 0]\ndeath = [0, 1, 1]\nstart = 1", "birth"),
    ("start = 1", "give a family"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 1\ndetection = 2", "detection"),
    ("birth = [1, 1, 0]\ndeath = [0, 1, 1]\nstart = 1.5", "start"),
]


@pytest.mark.parametrize("text, fragment", BAD_RATES_TOML)
def test_bad_rates_toml(tmp_path, text, fragment):
    path = tmp_path / "rates.toml"
    path.write_text(text, encoding="utf-8")
    with pytest.raises(InputError) as err:
        load_rates_file(path)
    assert "rates.toml" in str(err.value) or "--rates" in str(err.value)
    assert fragment in str(err.value)


def test_negative_rate_in_rates_file_is_bad_input_exit_2(tmp_path, capsys):
    path = tmp_path / "rates.toml"
    path.write_text("birth = [1, 1, 0]\ndeath = [0, -1, 1]\nstart = 1\n", encoding="utf-8")
    assert main(["solve", str(path)]) == 2
    err = capsys.readouterr().err
    assert "death rate at size 1 is negative" in err and "Traceback" not in err


def test_solve_immigration_death_matches_poisson(tmp_path, capsys):
    # Karlin & Taylor (1975): λ_n = ι, μ_n = nδ has a Poisson(ι/δ) stationary law, mean ι/δ.
    n = 120
    birth = [2.0] * (n + 1)
    death = [0.5 * k for k in range(n + 1)]
    path = tmp_path / "rates.toml"
    path.write_text(f"birth = {birth}\ndeath = {death}\nstart = 4\n", encoding="utf-8")
    assert main(["solve", str(path), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["stationary_exists"] and out["stationary_mean"] == pytest.approx(4.0, rel=1e-10)


def test_simulate_writes_counts_and_bad_times_write_nothing(tmp_path):
    rates = tmp_path / "rates.toml"
    rates.write_text("family = 'logistic'\nimmigration = true\ncap = 200\nstart = 20\n[parameters]\n"
                     "birth_rate = 0.9\ndeath_rate = 0.3\ncarrying_capacity = 40\nimmigration = 0.5\n", encoding="utf-8")
    out = tmp_path / "sim.csv"
    assert main(["--quiet", "simulate", str(rates), "--times", "0", "1", "2", "--out", str(out), "--seed", "3"]) == 0
    text = out.read_text().splitlines()
    assert text[0] == "time,count" and text[1] == "0,20" and len(text) == 4
    bad = tmp_path / "bad.csv"
    assert main(["--quiet", "simulate", str(rates), "--times", "2", "1", "--out", str(bad)]) == 2
    assert not bad.exists()


_toml_chars = st.text(alphabet=string.printable, max_size=200)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=_toml_chars)
def test_fuzz_settings_reader_only_raises_input_error(tmp_path, text):
    path = tmp_path / "fuzz.toml"
    path.write_text(text, encoding="utf-8")
    try:
        assert isinstance(load_settings(path), RunSettings)
    except InputError:
        pass


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(fit=st.dictionaries(st.sampled_from(["chains", "draws", "tune", "seed", "max_size", "detection", "rates",
                                            "immigration", "pooling", "other"]),
                           st.one_of(st.integers(-5, 5000), st.floats(allow_nan=False, allow_infinity=False),
                                     st.booleans(), st.text(max_size=5)), max_size=5))
def test_fuzz_settings_values(tmp_path, fit):
    import tomli_w

    path = tmp_path / "fuzz.toml"
    path.write_text(tomli_w.dumps({"fit": fit}), encoding="utf-8")
    try:
        load_settings(path)
    except InputError:
        pass


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(text=_toml_chars)
def test_fuzz_rates_reader_only_raises_input_error(tmp_path, text):
    path = tmp_path / "fuzz.toml"
    path.write_text(text, encoding="utf-8")
    try:
        load_rates_file(path)
    except InputError:
        pass
