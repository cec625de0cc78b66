"""Reading a RATES.toml: a rate family with parameter values, or rates over sizes 0..N.

A RATES.toml gives either a family with parameter values,

    family = "logistic"          # linear, logistic, allee, per-size
    immigration = true
    cap = 300
    start = 40                   # size now (start of forecasts and simulations)
    horizons = [10, 20, 50, 100]
    thresholds = [0, 10]
    generation_time = 3.0        # years, for criterion E
    [parameters]
    birth_rate = 0.9
    death_rate = 0.3
    carrying_capacity = 60
    immigration = 0.5

or explicit arrays over sizes 0..N: ``birth = [...]`` and ``death = [...]`` (with the
same optional start/horizons/thresholds/generation_time). Anything wrong stops with the
file and key named (an InputError).
"""
from __future__ import annotations

import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

from tallyfit.chain.errors import RateError
from tallyfit.chain.rates import check_rate_arrays
from tallyfit.infer.errors import InputError

__all__ = ["RateSpecFile", "load_rates_file"]

_KEYS = {"family", "immigration", "cap", "start", "horizons", "thresholds", "generation_time",
         "parameters", "birth", "death", "detection"}


@dataclass(frozen=True)
class RateSpecFile:
    """A parsed RATES.toml.

    Attributes:
        source: file name; birth, death: rates over 0..cap; start: size now;
        horizons, thresholds, generation_time: forecast settings; continuation: callables
        (birth, death) continuing the family beyond the cap, or None for explicit arrays;
        detection: probability an animal is counted (simulation only).
    """

    source: str
    birth: np.ndarray
    death: np.ndarray
    start: int
    horizons: tuple[float, ...]
    thresholds: tuple[int, ...]
    generation_time: float | None
    continuation: tuple[Any, Any] | None
    detection: float


def load_rates_file(path: str | Path) -> RateSpecFile:
    """Read and check a RATES.toml.

    Raises:
        InputError: unreadable or invalid TOML, unknown keys, missing or bad values (the
            message names the file and key).
    """
    source = str(path)
    try:
        doc = tomllib.loads(Path(path).read_text(encoding="utf-8"))
    except OSError as exc:
        raise InputError(f"cannot read the rates file ({exc.strerror})", source=source) from None
    except UnicodeDecodeError:
        raise InputError("the rates file is not UTF-8 text", source=source) from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"not valid TOML: {exc}", source=source) from None
    for key in doc:
        if key not in _KEYS:
            raise InputError(f"unknown key '{key}'", source=source, column=key, hint="allowed: " + ", ".join(sorted(_KEYS)))

    def number(key: str, default: Any, kind: type = float, low: float | None = None) -> Any:
        v = doc.get(key, default)
        if v is None:
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)) or (kind is int and int(v) != v):
            raise InputError(f"'{key}' must be a {'whole ' if kind is int else ''}number, got {v!r}",
                             source=source, column=key)
        if low is not None and v < low:
            raise InputError(f"'{key}' must be >= {low}, got {v!r}", source=source, column=key)
        return kind(v)

    horizons = doc.get("horizons", [10, 20, 50, 100])
    thresholds = doc.get("thresholds", [0])
    if not isinstance(horizons, list) or not horizons or not all(
            isinstance(h, (int, float)) and not isinstance(h, bool) and h > 0 for h in horizons):
        raise InputError("'horizons' must be a list of positive times", source=source, column="horizons")
    if not isinstance(thresholds, list) or not all(isinstance(k, int) and not isinstance(k, bool) and k >= 0
                                                   for k in thresholds):
        raise InputError("'thresholds' must be a list of whole sizes >= 0", source=source, column="thresholds")
    gen = number("generation_time", None, float, 0)
    detection = number("detection", 1.0, float, 0)
    if not 0 < detection <= 1:
        raise InputError(f"'detection' must be in (0, 1], got {detection}", source=source, column="detection")
    continuation = None
    if "birth" in doc or "death" in doc:
        if "family" in doc:
            raise InputError("give either a family with [parameters] or birth/death arrays, not both",
                             source=source, column="family")
        try:
            birth = np.asarray(doc.get("birth"), dtype=float)
            death = np.asarray(doc.get("death"), dtype=float)
        except (TypeError, ValueError):
            raise InputError("'birth' and 'death' must be lists of numbers", source=source, column="birth") from None
        cap = birth.size - 1
    elif "family" in doc:
        from tallyfit.infer.families import get_family

        fam = get_family(doc["family"], immigration=bool(doc.get("immigration", "immigration" in doc.get("parameters", {}))))
        params = doc.get("parameters")
        if not isinstance(params, dict):
            raise InputError("a family needs a [parameters] table", source=source, column="parameters")
        for k, v in params.items():
            if isinstance(v, bool) or not isinstance(v, (int, float, list)):
                raise InputError(f"parameter '{k}' must be a number", source=source, column=f"parameters.{k}")
        missing = [p for p in fam.parameters if p not in params]
        if missing:
            raise InputError("missing parameter(s): " + ", ".join(missing), source=source, column="parameters",
                             hint=f"the {fam.name} family needs " + ", ".join(fam.parameters))
        cap = number("cap", None, int, 1)
        if cap is None:
            raise InputError("a family needs a size cap: cap = ...", source=source, column="cap")
        draws = {k: np.atleast_1d(np.asarray(v, dtype=float)) for k, v in params.items()}
        sizes = np.arange(cap + 1)
        b, d = fam.numpy_rates(draws, sizes)
        birth, death = b[0], d[0]

        def cont_b(n: np.ndarray) -> np.ndarray:
            return fam.numpy_rates(draws, np.asarray(n))[0][0]

        def cont_d(n: np.ndarray) -> np.ndarray:
            return fam.numpy_rates(draws, np.asarray(n))[1][0]
        continuation = (cont_b, cont_d)
    else:
        raise InputError("give a family (with [parameters] and cap) or birth and death arrays",
                         source=source, hint='e.g. family = "logistic"')
    try:
        check_rate_arrays(birth, death)
    except RateError as exc:
        raise InputError(str(exc), source=source, column="birth" if exc.name in (None, "birth") else "death",
                         hint="rates must be finite and >= 0 over sizes 0..cap, with no deaths at size 0") from None
    start = number("start", None, int, 0)
    if start is None:
        raise InputError("'start' (the size now) is required", source=source, column="start")
    if start > cap:
        raise InputError(f"start {start} is above the cap {cap}", source=source, column="start")
    return RateSpecFile(source, birth, death, start, tuple(float(h) for h in horizons), tuple(thresholds),
                        gen, continuation, detection)
