"""How counts relate to true sizes: the detection setting, the data's scales and the size cap.

These are the observation model's settings and the data summaries the model builder sets
its defaults from (:mod:`tallyfit.infer.model`): the detection probability (exact counts,
fixed or estimated), the time and count scales of the default priors, the default cap N,
one label per pointwise log-likelihood term, and the checks that exact counts can be
produced by the chosen family at all.
"""
from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import InputError
from tallyfit.infer.families import DataScale, RateFamily

__all__ = ["DetectionWarning", "normalise_detection", "replicate_detection_guess", "data_scale", "default_cap",
           "observation_table", "check_exact_replicates", "check_no_return_from_zero"]


class DetectionWarning(UserWarning):
    """The detection probability is to be estimated but nothing identifies it well."""


def normalise_detection(detection: Any) -> float | str | None:
    """Check a detection setting.

    Args:
        detection: None or 1.0 (exact counts), a probability in (0, 1) (fixed), or
            "estimate" (also accepted: a numeric string such as "0.7").

    Returns:
        None, a float in (0, 1), or "estimate".

    Raises:
        InputError: anything else (names the setting and the choices).
    """
    if detection is None:
        return None
    if isinstance(detection, str):
        text = detection.strip().lower()
        if text in ("estimate", "est", "estimated"):
            return "estimate"
        if text in ("none", "exact", ""):
            return None
        try:
            detection = float(text)
        except ValueError:
            raise InputError(f"detection must be a probability, 'estimate' or 'exact', got "
                             f"{detection!r}", source="--detection") from None
    if isinstance(detection, bool):
        raise InputError(f"detection must be a probability or 'estimate', got {detection!r}",
                         source="--detection")
    try:
        p = float(detection)
    except (TypeError, ValueError):
        raise InputError(f"detection must be a probability or 'estimate', got {detection!r}",
                         source="--detection") from None
    if p == 1.0:
        return None
    if not (0.0 < p < 1.0):
        raise InputError(f"a detection probability must be in (0, 1], got {p!r}",
                         source="--detection", hint="use 1 for exact counts, or 'estimate'")
    return p


def replicate_detection_guess(data: CountData) -> float | None:
    """A crude detection probability from replicate surveys, for setting the cap and scales.

    With replicate counts y_1..y_R ~ Binomial(n, p) at one occasion, E y = np and
    Var y = np(1 − p), so p ≈ 1 − (pooled within-occasion variance)/(pooled mean)
    (method of moments, common practice). Only used to size the cap and the default
    priors' scale; the fit estimates p properly.

    Args:
        data: count data.

    Returns:
        the guess clipped to [0.2, 1.0], or None without replicate surveys.
    """
    num = 0.0
    den = 0.0
    for rows in [s.surveyed_counts for s in data.series]:
        for r in rows:
            y = r[~np.isnan(r)]
            if y.size >= 2:
                num += float(np.var(y, ddof=1)) * (y.size - 1)
                den += float(np.mean(y)) * (y.size - 1)
    if den <= 0:
        return None
    return float(min(1.0, max(0.2, 1.0 - num / den)))


def _size_factor(data: CountData, detection: float | str | None) -> float:
    """1/p used to turn counts into plausible true sizes."""
    if detection is None:
        return 1.0
    if detection == "estimate":
        guess = replicate_detection_guess(data)
        return 1.0 / (0.5 if guess is None else guess)
    return 1.0 / float(detection)


def data_scale(data: CountData, detection: float | str | None = None) -> DataScale:
    """The scales default priors and per-size knots are set from.

    τ (time_scale) = median interval between consecutive surveyed times over all sites;
    c (count_scale) = median of the per-occasion largest counts (at least 1), times 1/p
    (p fixed, or for "estimate" the replicate guess of :func:`replicate_detection_guess`,
    0.5 without replicates); size_lo and size_hi = the smallest positive and the
    largest per-occasion count, times 1/p.

    Args:
        data: count data.
        detection: normalised detection setting.

    Returns:
        DataScale.
    """
    f = _size_factor(data, detection)
    gaps: list[float] = []
    occ: list[float] = []
    for s in data.series:
        gaps.extend(np.diff(s.surveyed_times).tolist())
        occ.extend(s.largest_counts.tolist())
    occ_a = np.asarray(occ, dtype=float)
    tau = float(np.median(gaps)) if gaps else 1.0
    pos = occ_a[occ_a > 0]
    lo = float(pos.min()) * f if pos.size else 1.0
    hi = max(float(occ_a.max()) * f, lo)
    c = max(1.0, float(np.median(occ_a)) * f)
    return DataScale(time_scale=tau, count_scale=c, size_lo=max(1.0, lo), size_hi=max(1.0, hi))


def default_cap(data: CountData, detection: float | str | None = None) -> int:
    """The default size cap N, well above the largest count.

    With M' = (largest count)/p (p = 1 for exact counts, the fixed p, or for "estimate"
    the replicate guess, 0.5 without replicates):

        N = ceil(max(M' + 3·sqrt(M') + 15, 1.2·M'))

    i.e. about three Poisson-like standard deviations plus 15 above the largest true
    size the data suggest (a regulated population's fluctuations scale as the square
    root of its size). Tight on purpose: the likelihood only follows paths between
    consecutive counts, and its cost grows with N (the push-forward continues each
    family's formula past the cap anyway). Every fit checks it: :func:`infer.fit.fit_counts`
    reports the posterior predictive mass near the cap and how much the log-likelihood
    of posterior draws moves when the cap is doubled, and says to raise the maximum
    size when either is not negligible.

    Args:
        data: count data.
        detection: normalised detection setting.

    Returns:
        the cap N (an int ≥ 20).
    """
    m = data.max_count * _size_factor(data, detection)
    return int(math.ceil(max(m + 3.0 * math.sqrt(m) + 15.0, 1.2 * m)))


# --------------------------------------------------------------------------- observations
def observation_table(data: CountData, detection: float | str | None = None) -> pd.DataFrame:
    """One row per pointwise log-likelihood term (the ``obs`` dimension for LOO).

    Exact counts: one per pair of consecutive surveyed times of a site; with a
    detection model: one per surveyed occasion after the site's first.

    Args:
        data: count data.
        detection: normalised detection setting (only None vs not matters).

    Returns:
        DataFrame with columns site, time_from, time_to, count_from, count_to (the
        largest replicate count at each end).
    """
    rows = []
    for s in data.series:
        t, c = s.surveyed_times, s.largest_counts
        for i in range(1, t.size):
            rows.append((s.site, float(t[i - 1]), float(t[i]), int(c[i - 1]), int(c[i])))
    return pd.DataFrame(rows, columns=["site", "time_from", "time_to", "count_from", "count_to"])


def check_exact_replicates(data: CountData) -> None:
    """Refuse replicate counts at one time that disagree when the counts are treated as exact.

    Raises:
        InputError: naming the site, time and the two counts.
    """
    for s in data.series:
        if s.counts.shape[1] < 2:
            continue
        lo = np.nanmin(np.where(np.isnan(s.counts), np.inf, s.counts), axis=1)
        hi = np.nanmax(np.where(np.isnan(s.counts), -np.inf, s.counts), axis=1)
        bad = np.flatnonzero(np.isfinite(lo) & (lo != hi))
        if bad.size:
            i = int(bad[0])
            raise InputError(
                f"site '{s.site}' has replicate counts {int(lo[i])} and {int(hi[i])} at time "
                f"{s.times[i]:g}, but the counts are treated as exact", source=data.source,
                column="count",
                hint="model counting error with detection='estimate' (--detection estimate) "
                     "or a fixed detection probability")


def check_no_return_from_zero(data: CountData, family: RateFamily) -> None:
    """Refuse exact counts that leave 0 when the family has no immigration (0 is absorbing).

    Raises:
        InputError: naming the site and the two times.
    """
    for s in data.series:
        t, c = s.surveyed_times, s.largest_counts
        bad = np.flatnonzero((c[:-1] == 0) & (c[1:] > 0))
        if bad.size:
            i = int(bad[0])
            raise InputError(
                f"site '{s.site}' is counted 0 at time {t[i]:g} and {int(c[i + 1])} at "
                f"{t[i + 1]:g}: without immigration size 0 is absorbing, so these exact counts "
                f"are impossible under the {family.name} family", source=data.source,
                column="count",
                hint="include immigration (drop --no-immigration, or immigration = true in [fit]; from "
                     "Python get_family(name, immigration=True)), or model counting error with a "
                     "detection probability (--detection)")
