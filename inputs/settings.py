"""The run's settings: command-line options merged over an optional RUN.toml.

A settings file has the tables

    [fit]       rates, immigration, chains, draws, tune, seed, max_size, detection, pooling,
                target_accept (NUTS; default 0.95, high because birth and death rates are
                strongly correlated in the posterior and lower values give divergences),
                varying_years ("none", "births" or "births_and_deaths": good and bad years
                move every animal's births, or births and deaths, together), accept_jumps
                (fit counts that no birth–death process the priors allow could make, e.g. a
                real boom, instead of stopping at them as a likely typing slip)
    [covariates]  file (CSV: time, [site], one column per covariate), births and deaths
                (lists of column names acting on each), future (a table: the value of
                every covariate used in forecasts)
    [priors.NAME]  dist and its parameters (see the family's describe())
    [derive]    horizons, thresholds, generation_time, credible_level, max_draws
    [scenario.NAME]  harvest_rate, harvest_quota, death_factor, birth_factor, added_immigration

Unknown tables or keys stop the run with the file and key named, so a typing mistake is
never silently ignored.
"""
from __future__ import annotations

import tomllib
from dataclasses import asdict, dataclass, field, replace
from pathlib import Path
from typing import Any, Mapping

from tallyfit.infer.errors import InputError
from tallyfit.infer.scenarios import Scenario, scenarios_from_table

_FIT_KEYS = {"rates": str, "immigration": bool, "chains": int, "draws": int, "tune": int,
             "seed": int, "max_size": int, "detection": (float, int, str), "pooling": bool,
             "target_accept": float, "varying_years": str, "time_unit": str, "accept_jumps": bool}
_COVARIATE_KEYS = {"file": str, "births": list, "deaths": list, "future": dict}
#: Values of [fit] varying_years.
VARYING_YEARS = ("none", "births", "births_and_deaths")
_DERIVE_KEYS = {"horizons": list, "thresholds": list, "generation_time": (float, int),
                "credible_level": float, "max_draws": int}


@dataclass(frozen=True)
class RunSettings:
    """Everything a fit and its push-forward need, fully resolved.

    Attributes mirror the [fit] and [derive] tables; ``priors`` and ``scenarios`` come from
    [priors.*] and [scenario.*]. ``detection`` is None (exact counts), a number in (0, 1]
    (fixed detection probability) or "estimate".
    """

    rates: str = "logistic"
    immigration: bool = True
    chains: int = 4
    draws: int = 1000
    tune: int = 1000
    seed: int = 20261201
    max_size: int | None = None
    detection: float | str | None = None
    pooling: bool = False
    target_accept: float = 0.95
    horizons: tuple[float, ...] = (10.0, 20.0, 50.0, 100.0)
    thresholds: tuple[int, ...] = (0,)
    generation_time: float | None = None
    credible_level: float = 0.9
    max_draws: int | None = None
    priors: dict[str, Any] = field(default_factory=dict)
    scenarios: tuple[Scenario, ...] = ()
    varying_years: str = "none"
    covariates_file: str | None = None
    birth_covariates: tuple[str, ...] = ()
    death_covariates: tuple[str, ...] = ()
    future_covariates: dict[str, float] = field(default_factory=dict)
    time_unit: str = "auto"
    accept_jumps: bool = False

    def with_options(self, **options: Any) -> "RunSettings":
        """A copy with the given options replaced (None values are ignored)."""
        clean = {k: v for k, v in options.items() if v is not None}
        out = replace(self, **clean)
        out.validate("command line")
        return out

    def validate(self, source: str) -> None:
        """Check ranges; raise InputError naming ``source`` and the setting."""
        def bad(key: str, msg: str, hint: str | None = None) -> InputError:
            return InputError(msg, source=source, column=key, hint=hint)
        if self.chains < 1:
            raise bad("chains", f"chains must be >= 1, got {self.chains}")
        if self.varying_years not in VARYING_YEARS:
            raise bad("varying_years", f"varying_years must be one of {', '.join(VARYING_YEARS)}, got "
                      f"{self.varying_years!r}")
        unit = self.time_unit.strip()
        if unit != self.time_unit or not unit or len(unit) > 24 or not all(c.isalpha() or c == " " for c in unit):
            raise bad("time_unit", f"time_unit must be a word such as \"year\", \"month\" or \"day\" (or \"auto\"), "
                      f"got {self.time_unit!r}")
        used = (*self.birth_covariates, *self.death_covariates)
        if used and self.covariates_file is None:
            raise bad("covariates.file", "covariates are named but no covariate file is given",
                      hint="add file = \"covariates.csv\" to [covariates], or --covariates FILE")
        missing = [c for c in dict.fromkeys(used) if c not in self.future_covariates]
        if missing:
            raise bad("covariates.future", f"no future value for {', '.join(missing)}: forecasts need one",
                      hint="write [covariates.future] with a value for each covariate used")
        if self.covariates_file is not None and not used:
            raise bad("covariates", "a covariate file is given but no covariate acts on births or deaths",
                      hint="list columns in births = [...] or deaths = [...]")
        if self.draws < 10 or self.tune < 0:
            raise bad("draws", f"draws must be >= 10 and tune >= 0, got draws={self.draws}, tune={self.tune}")
        if not 0.5 <= self.target_accept < 1:
            raise bad("target_accept", f"target_accept must be in [0.5, 1), got {self.target_accept}")
        if self.max_size is not None and self.max_size < 2:
            raise bad("max_size", f"max_size must be >= 2, got {self.max_size}")
        if isinstance(self.detection, str) and self.detection != "estimate":
            raise bad("detection", f"detection must be a number in (0, 1] or \"estimate\", got {self.detection!r}")
        if isinstance(self.detection, (int, float)) and not 0 < self.detection <= 1:
            raise bad("detection", f"detection must be in (0, 1], got {self.detection!r}")
        if not self.horizons or any(not (h > 0) for h in self.horizons):
            raise bad("horizons", f"horizons must be positive times, got {list(self.horizons)}")
        if any(int(k) != k or k < 0 for k in self.thresholds):
            raise bad("thresholds", f"thresholds must be whole sizes >= 0, got {list(self.thresholds)}")
        if self.generation_time is not None and not self.generation_time > 0:
            raise bad("generation_time", f"generation_time must be > 0 years, got {self.generation_time}")
        if not 0 < self.credible_level < 1:
            raise bad("credible_level", f"credible_level must be between 0 and 1, got {self.credible_level}")

    def as_dict(self) -> dict[str, Any]:
        """Plain data for summary.json and run.toml (None stays None; run.toml leaves it out)."""
        d = asdict(self)
        d["scenarios"] = [s.as_dict() for s in self.scenarios]
        return d


def _typed(table: Mapping[str, Any], spec: Mapping[str, Any], section: str, source: str) -> dict[str, Any]:
    out = {}
    for key, value in table.items():
        if key not in spec:
            raise InputError(f"unknown setting '{key}' in [{section}]", source=source,
                             column=f"{section}.{key}", hint="allowed: " + ", ".join(spec))
        want = spec[key]
        ok = isinstance(value, want) and not (want is not bool and isinstance(value, bool))
        if want is float and isinstance(value, int) and not isinstance(value, bool):
            ok, value = True, float(value)
        if not ok:
            raise InputError(f"'{key}' has the wrong type ({type(value).__name__})", source=source,
                             column=f"{section}.{key}")
        out[key] = value
    return out


def _covariate_settings(table: Mapping[str, Any], source: str, folder: Path) -> dict[str, Any]:
    """[covariates] as RunSettings fields (the file relative to the settings file's folder)."""
    raw = _typed(table, _COVARIATE_KEYS, "covariates", source)
    out: dict[str, Any] = {}
    if "file" in raw:
        out["covariates_file"] = str((folder / raw["file"]).resolve())
    for key, field_name in (("births", "birth_covariates"), ("deaths", "death_covariates")):
        if key in raw:
            if not all(isinstance(v, str) and v for v in raw[key]):
                raise InputError(f"'{key}' must be a list of covariate column names", source=source,
                                 column=f"covariates.{key}")
            out[field_name] = tuple(raw[key])
    if "future" in raw:
        future = {}
        for k, v in raw["future"].items():
            if isinstance(v, bool) or not isinstance(v, (int, float)):
                raise InputError(f"the future value of '{k}' must be a number", source=source,
                                 column=f"covariates.future.{k}")
            future[str(k)] = float(v)
        out["future_covariates"] = future
    return out


def load_settings(path: str | Path | None, base: RunSettings | None = None) -> RunSettings:
    """Read a RUN.toml over ``base`` (defaults when None).

    Raises:
        InputError: unreadable file, TOML syntax error (with its line), unknown table or
            key, wrong type or out-of-range value.
    """
    settings = base or RunSettings()
    if path is None:
        return settings
    source = str(path)
    try:
        raw = Path(path).read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the settings file ({exc.strerror})", source=source,
                         hint="check the path") from None
    try:
        doc = tomllib.loads(raw.decode("utf-8"))
    except UnicodeDecodeError:
        raise InputError("the settings file is not UTF-8 text", source=source) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", source=source,
                         hint="fix the syntax at the line shown") from None
    allowed = {"fit", "derive", "priors", "scenario", "covariates"}
    for key in doc:
        if key not in allowed:
            raise InputError(f"unknown table [{key}]", source=source, column=key,
                             hint="allowed tables: " + ", ".join(sorted(allowed)))
    for section in ("fit", "derive", "priors", "covariates"):
        if section in doc and not isinstance(doc[section], dict):
            raise InputError(f"'{section}' must be a table", source=source, column=section)
    fit = _typed(doc.get("fit", {}), _FIT_KEYS, "fit", source)
    derive = _typed(doc.get("derive", {}), _DERIVE_KEYS, "derive", source)
    for key in ("horizons", "thresholds"):
        if key in derive:
            vals = derive[key]
            if not all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in vals):
                raise InputError(f"'{key}' must be a list of numbers", source=source, column=f"derive.{key}")
            derive[key] = tuple(float(v) if key == "horizons" else v for v in vals)
    if "thresholds" in derive:
        if any(int(v) != v for v in derive["thresholds"]):
            raise InputError("thresholds must be whole sizes", source=source, column="derive.thresholds")
        derive["thresholds"] = tuple(int(v) for v in derive["thresholds"])
    if "generation_time" in derive:
        derive["generation_time"] = float(derive["generation_time"])
    if isinstance(fit.get("detection"), (int, float)):
        fit["detection"] = float(fit["detection"])
    scenarios = tuple(scenarios_from_table(doc["scenario"], source=source)[1:]) if "scenario" in doc else ()
    priors = dict(doc.get("priors", {}))
    for name, prior in priors.items():
        if not isinstance(prior, dict):
            raise InputError(f"prior for '{name}' must be a table", source=source, column=f"priors.{name}",
                             hint=f"write [priors.{name}] then dist = \"lognormal\", mu = 0.0, sigma = 1.0")
    cov = _covariate_settings(doc.get("covariates", {}), source, Path(path).parent)
    out = replace(settings, **fit, **derive, **cov, priors=priors or settings.priors,
                  scenarios=scenarios or settings.scenarios)
    out.validate(source)
    return out
