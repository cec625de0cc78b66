"""IUCN Red List criterion E (quantitative analysis) from extinction probabilities.

IUCN (2012), IUCN Red List Categories and Criteria, Version 3.1, 2nd ed., criterion E:
Critically Endangered at ≥ 50% probability of extinction within 10 years or 3
generations, whichever is longer (at most 100 years); Endangered at ≥ 20% within 20 years
or 5 generations (at most 100 years); Vulnerable at ≥ 10% within 100 years.
"""
from __future__ import annotations

from collections.abc import Sequence

import numpy as np

__all__ = ["CATEGORIES", "SOURCE", "criterion_e_horizons", "criterion_e_category", "horizons_with_criterion_e"]

#: Category codes 0..3 in order of severity.
CATEGORIES: tuple[str, ...] = ("below VU", "VU", "EN", "CR")
SOURCE = "IUCN (2012) Red List Categories and Criteria v3.1, criterion E"


def criterion_e_horizons(generation_time: float | None) -> dict[str, float]:
    """Criterion E horizons in years: CR max(10 y, 3 G), EN max(20 y, 5 G), both at most 100 y; VU 100 y.

    Args:
        generation_time: years per generation, or None (then the shortest horizons, 10 and
            20 years, which are right when G <= 3.3 years).

    Returns:
        {"CR": years, "EN": years, "VU": years}.
    """
    g = 0.0 if generation_time is None else float(generation_time)
    return {"CR": min(100.0, max(10.0, 3 * g)), "EN": min(100.0, max(20.0, 5 * g)), "VU": 100.0}


def criterion_e_category(p_cr: np.ndarray, p_en: np.ndarray, p_vu: np.ndarray) -> np.ndarray:
    """Category code per draw (index into CATEGORIES).

    CR if P >= 0.5 at the CR horizon, EN if P >= 0.2 at the EN horizon, VU if P >= 0.1
    within 100 years, else "below VU".

    Args:
        p_cr, p_en, p_vu: extinction probabilities at the three horizons (same shape).

    Returns:
        int8 array of codes, the same shape.
    """
    code = np.zeros(np.shape(p_cr), dtype=np.int8)
    code = np.where(np.asarray(p_vu) >= 0.1, 1, code)
    code = np.where(np.asarray(p_en) >= 0.2, 2, code)
    code = np.where(np.asarray(p_cr) >= 0.5, 3, code)
    return code.astype(np.int8)


def horizons_with_criterion_e(horizons: Sequence[float], generation_time: float | None) -> tuple[float, ...]:
    """The user's horizons together with the criterion E horizons, sorted, without duplicates.

    Args:
        horizons: the user's horizons.
        generation_time: years per generation, or None.

    Returns:
        ascending tuple of floats.
    """
    return tuple(sorted({float(h) for h in horizons} | set(criterion_e_horizons(generation_time).values())))
