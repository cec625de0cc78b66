"""Write the bundled demo data sets. Every place and number here is invented.

Each data set is simulated exactly (Gillespie) from known rates with ``chain.simulate``
and written as a counts CSV (columns time, count[, site, survey]) with a sidecar TOML
that describes it and records the true rates, so fits can be checked against the truth.

Run:  python example_counts/make_examples.py   (rewrites the files next to this script)
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd
import tomli_w

from tallyfit.chain import BirthDeathChain

HERE = Path(__file__).resolve().parent


def logistic_rates(birth_rate: float, death_rate: float, carrying_capacity: float,
                   immigration: float = 0.0):
    """λ_n = b·n + ι, μ_n = n·(d + (b − d)·n/K): births and deaths balance at K."""
    def birth(n):
        return birth_rate * n + immigration

    def death(n):
        return n * (death_rate + (birth_rate - death_rate) * n / carrying_capacity)
    return birth, death


def linear_rates(birth_rate: float, death_rate: float, immigration: float = 0.0):
    """λ_n = b·n + ι, μ_n = d·n."""
    return (lambda n: birth_rate * n + immigration), (lambda n: death_rate * n)


def _write(name: str, table: pd.DataFrame, meta: dict) -> None:
    table.to_csv(HERE / f"{name}.csv", index=False)
    with open(HERE / f"{name}.toml", "wb") as fh:
        tomli_w.dump(meta, fh)


def heron_fen(seed: int = 11) -> None:
    """(a) One colony with immigration, settling near its carrying capacity."""
    truth = dict(birth_rate=0.9, death_rate=0.3, carrying_capacity=60.0, immigration=0.6)
    chain = BirthDeathChain(*logistic_rates(**truth))
    years = np.arange(1995, 2025)
    counts = chain.simulate(12, years - years[0], seed=seed)[0]
    _write("heron_fen", pd.DataFrame({"time": years, "count": counts}), {
        "description": "Invented: breeding pairs of a reed-bed bird at Heron Fen (a made-up "
                       "wetland), counted each June 1995-2024. The colony was founded by a few "
                       "pairs and is topped up by birds arriving from elsewhere.",
        "family": "logistic", "time_unit": "year", "detection": 1.0, "seed": seed,
        "true_rates": truth,
    })


def copper_tarn(seed: int = 5) -> None:
    """(b) A small isolated population in decline, with two missed years."""
    truth = dict(birth_rate=0.32, death_rate=0.38, immigration=0.0)
    chain = BirthDeathChain(*linear_rates(**truth))
    years = np.arange(1990, 2022)
    for s in range(seed, seed + 200):  # first seed whose path is still alive at the end
        counts = chain.simulate(48, years - years[0], seed=s)[0]
        if counts[-1] > 0:
            break
    counts = counts.astype(object)
    missed = [2001, 2013]
    for y in missed:
        counts[years == y] = ""
    _write("copper_tarn", pd.DataFrame({"time": years, "count": counts}), {
        "description": "Invented: adult natterjack-like toads at Copper Tarn (a made-up upland "
                       "pool), counted each spring 1990-2021; no survey in 2001 and 2013 "
                       "(blank counts). Isolated: no immigration; slowly declining.",
        "family": "linear", "time_unit": "year", "detection": 1.0, "seed": s,
        "missed_years": missed, "true_rates": truth,
    })


def five_dunes(seed: int = 23) -> None:
    """(c) Five sites sharing rates, counted with imperfect detection, three surveys a year."""
    truth = dict(birth_rate=0.8, death_rate=0.25, carrying_capacity=40.0, immigration=0.0)
    detection = 0.7
    chain = BirthDeathChain(*logistic_rates(**truth))
    rng = np.random.default_rng(seed)
    years = np.arange(2008, 2024)
    rows = []
    hidden = {}
    for k, (site, start) in enumerate(zip(["North Spit", "Gull Hollow", "Marram Ridge",
                                           "Saltmeadow", "Far Bank"], [35, 22, 41, 15, 28])):
        sizes = chain.simulate(start, years - years[0], seed=seed + k)[0]
        hidden[site] = [int(v) for v in sizes]
        for year, size in zip(years, sizes):
            for survey in (1, 2, 3):
                rows.append({"site": site, "time": int(year), "survey": survey,
                             "count": int(rng.binomial(size, detection))})
    _write("five_dunes", pd.DataFrame(rows, columns=["site", "time", "survey", "count"]), {
        "description": "Invented: a dune-nesting beetle-eating lizard at five sites on the made-up "
                       "Five Dunes reserve, 2008-2023. Each site is walked three times each "
                       "summer; an animal present is seen with probability 0.7 on a walk.",
        "family": "logistic", "time_unit": "year", "detection": detection, "seed": seed,
        "true_rates": truth, "true_sizes": hidden,
    })


def gorse_point(seed: int = 31) -> None:
    """(d) A colony with good and bad years, and a change of management part-way through."""
    truth = dict(birth_rate=0.7, death_rate=0.2, carrying_capacity=120.0, immigration=0.5)
    sigma, rat_free_effect = 0.35, -0.36  # σ of log births per year; log factor on deaths once rat-free
    rng = np.random.default_rng(seed)
    years = np.arange(1991, 2026)
    rat_free = (years >= 2009).astype(int)
    birth, death = logistic_rates(**truth)
    counts = [40]
    for year, z in zip(years[:-1], rat_free[:-1]):
        eps = sigma * rng.standard_normal()  # this year's conditions
        b_year = np.exp(eps - sigma ** 2 / 2)
        d_year = np.exp(rat_free_effect * z)
        chain = BirthDeathChain(lambda n: truth["immigration"] + (birth(n) - truth["immigration"]) * b_year,
                                lambda n: death(n) * d_year)
        counts.append(int(chain.simulate(counts[-1], np.array([0.0, 1.0]), seed=rng)[0][1]))
    pd.DataFrame({"time": years, "rat_free": rat_free}).to_csv(HERE / "gorse_point_covariates.csv", index=False)
    _write("gorse_point", pd.DataFrame({"time": years, "count": counts}), {
        "description": "Invented: breeding pairs of a burrow-nesting seabird at Gorse Point (a made-up "
                       "headland), counted each July 1991-2025. Good and bad years move the whole colony's "
                       "breeding success together; rats were cleared from the headland in 2009 "
                       "(gorse_point_covariates.csv: rat_free = 1 from 2009).",
        "family": "logistic", "time_unit": "year", "detection": 1.0, "seed": seed,
        "true_rates": truth, "true_environment_sd": sigma, "environment_affects": "births",
        "true_death_effect": {"rat_free": rat_free_effect},
    })


if __name__ == "__main__":
    heron_fen()
    copper_tarn()
    five_dunes()
    gorse_point()
    print("wrote", ", ".join(sorted(p.name for p in HERE.glob("*.csv"))))
