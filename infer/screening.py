"""Screening before any model is built: counts no birth–death process of the family could
plausibly make, and fits too large or too slow for the machine.

Both answers come from the counts, the family's priors and the settings alone; nothing of
the size of the cap is allocated, so a typing slip (``5, 900000000, 4``) is stopped in a
second instead of filling the memory.

**Jumps.** For a census interval from n_0 to n_1 in time t, passage-time bounds give, for
any rates, an upper bound on the chance of a change at least that large:

* Up. The process must leave each level k = n_0..n_1−1 upwards, and the time it spends at k
  before its first birth there is Exp(λ_k), whatever else happens (the level's birth clock
  only runs while the process is at k). So the passage time to n_1 is stochastically larger
  than Σ_k Exp(λ_k); with λ_k ≤ λ*·k + ι on those levels that is the passage time of a pure
  birth process with immigration, whose increase from n_0 by time t is negative binomial
  with shape n_0 + ι/λ* and success probability e^{−λ* t} (Kendall 1948; Bailey 1964, The
  Elements of Stochastic Processes, ch. 8 — from memory). That bound ignores deaths; a
  second one sees deaths rising with density: each visit to n_0 climbs to n_1 before coming
  back with probability q = λ_{n_0}/(λ_{n_0} + μ_{n_0}) / Σ_{k<L} ρ_k, ρ_k = Π_{j=1..k}
  μ_{n_0+j}/λ_{n_0+j} (the gambler's-ruin formula of a birth–death chain: Karlin & Taylor
  1975, A First Course in Stochastic Processes, ch. 4 — from memory), and the visits by time
  t number at most 1 + (λ_{n_0} + μ_{n_0})·t on average, so P ≤ (1 + (λ_{n_0} + μ_{n_0})t)·q.
  The sum runs over L = min(n_1 − n_0, CLIMB_LEVELS) levels, which only enlarges the bound.
  The smaller of the two bounds is used (the second where the first is above 0.5 is not
  computed, nor beyond CLIMB_BUDGET levels and CLIMB_INTERVALS intervals, most suspect first,
  except where the first is below 0.1: a cost cut that can only keep a bound larger).
* Down. Likewise with the death clocks: P(N_t ≤ n_1) ≤ P(Binomial(n_0, e^{−μ* t}) ≤ n_1),
  μ* the largest per-capita death rate on levels n_1+1..n_0.

The rates are drawn from the fit's priors, except the parameters that place the process on
the size axis (SIZE_PARAMETERS: carrying capacity, Allee threshold), which the counts place:
those are drawn widely around the largest count. The largest per-capita rates are taken over a grid of levels (every level to 1024, then
geometric) including the grid points that bracket the interval. The bound is averaged over
JUMP_DRAWS draws from the priors, each interval with its own good or bad year (and covariate
effects) drawn as the model has them: that average bounds the prior chance of a change this
large. Below JUMP_LIMIT (1 in 1000: beyond the priors' 99.9%) the count is flagged. A count
that jumps and comes back the next interval is checked as a pair too (the product of the two
bounds per draw bounds the chance of both, by the Markov property and the monotone coupling
of birth–death processes in their start). With detection the true size before a rise may
exceed the count (n_0 is replaced by a generous bound on it) and falls are not checked (a
low count can be missed animals).

The memory and time a fit will need are estimated in :mod:`infer.cost`.
"""
from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from tallyfit.infer.counts import CountData, format_time
from tallyfit.infer.covariates import interval_design
from tallyfit.infer.errors import CountsFileError, InputError
from tallyfit.infer.families import RateFamily, get_family, scipy_prior
from tallyfit.infer.families.priors import MODEL_PRIORS, check_prior
from tallyfit.infer.observation import data_scale, normalise_detection
from tallyfit.infer.units import TimeUnit

__all__ = ["JUMP_LIMIT", "JUMP_DRAWS", "CLIMB_LEVELS", "CLIMB_BUDGET", "CLIMB_INTERVALS", "SIZE_PARAMETERS",
           "SIZE_SPREAD", "ImplausibleChange", "ImplausibleCountsError", "change_chances", "implausible_changes",
           "check_changes"]

#: A change whose prior chance (bounded above) is below this is flagged.
JUMP_LIMIT = 1e-3
#: Prior draws the bound is averaged over (fixed seed: the same counts give the same answer).
JUMP_DRAWS = 4000
#: Levels the climbing bound's gambler's-ruin sum runs over.
CLIMB_LEVELS = 256
#: Levels the climbing bound may sum over per batch of draws, over all intervals (a cost cut).
CLIMB_BUDGET = 20_000
#: ... and at most this many intervals per batch of draws.
CLIMB_INTERVALS = 200
#: Parameters that place the process on the size axis (where deaths overtake births). The
#: counts, not their default priors, place them; so the screen, which asks only whether the
#: priors' *rates* could make a change, draws them lognormal around the largest count with
#: σ = SIZE_SPREAD instead (a prior the user set for one is kept).
SIZE_PARAMETERS = ("carrying_capacity", "allee_threshold")
SIZE_SPREAD = 3.0
_SEED = 0x5C4EE9
_Z = float(stats.norm.ppf(0.999))


# --------------------------------------------------------------------------- jumps
@dataclass(frozen=True)
class ImplausibleChange:
    """A count the family's priors do not allow, with where it is.

    Attributes:
        site: the site (None when the counts have one site).
        time: the time of the flagged count.
        count: the flagged count.
        before_time, before_count: the count it changed from.
        after_time, after_count: for a jump that comes back, the next count (else None).
        chance: the bound on the prior chance of the change (or of both, for a pair).
        line: the line of the count in the file (or its 1-based row), None if unknown.
        row_kind: "line" or "row".
    """

    site: str | None
    time: float
    count: int
    before_time: float
    before_count: int
    after_time: float | None
    after_count: int | None
    chance: float
    line: int | None
    row_kind: str = "line"

    def describe(self, unit: TimeUnit | None = None) -> str:
        """One plain sentence about the change (``unit``: the time column's unit)."""
        unit = unit or TimeUnit("time unit", "")
        dt = self.time - self.before_time
        moved = "rise" if self.count > self.before_count else "fall"
        where = f"site '{self.site}', " if self.site is not None else ""
        text = (f"the count {self.count} ({where}time {format_time(self.time)}) is a {moved} from "
                f"{self.before_count} at time {format_time(self.before_time)} in {unit.count(dt)}")
        if self.after_count is not None:
            text += (f" that goes back to {self.after_count} at time {format_time(self.after_time)}")
        # a Monte Carlo average over JUMP_DRAWS prior draws: below 1e-5 it is only "far below"
        chance = "far below 1 in 100 000" if self.chance < 1e-5 else f"at most about {self.chance:.1g}"
        return text + f"; its chance under the priors is {chance}"


class ImplausibleCountsError(CountsFileError):
    """Counts no birth–death process of the family could plausibly make (e.g. a typing slip).

    Attributes:
        changes: every flagged :class:`ImplausibleChange`, in file order.
        (and source, line, row, column, hint from CountsFileError, for the first one)
    """

    def __init__(self, message: str, *, changes: Sequence[ImplausibleChange], **where: Any) -> None:
        super().__init__(message, **where)
        self.changes = list(changes)


def _resolved_priors(data: CountData, family: RateFamily, priors: Mapping[str, Any], detection: Any,
                     environment: Any) -> tuple[RateFamily, dict[str, dict[str, Any]]]:
    scale = data_scale(data, detection)
    fam = family.adapt(scale)
    own = {k: v for k, v in priors.items() if k in {s.name for s in fam.free_parameters}}
    resolved = fam.resolve_priors(own, scale)
    for name in SIZE_PARAMETERS:
        if name in resolved and name not in own:
            resolved[name] = {"dist": "lognormal", "mu": math.log(max(data.max_count, 1)), "sigma": SIZE_SPREAD}
    for key, on in (("environment_sd", environment.varying is not None), ("birth_effect", bool(environment.births)),
                    ("death_effect", bool(environment.deaths)), ("detection", detection == "estimate")):
        if on:
            support = "unit" if key == "detection" else ("real" if key.endswith("effect") else "positive")
            resolved[key] = check_prior(key, priors.get(key, MODEL_PRIORS[key]), support)
    return fam, resolved


def _level_grid(top: int) -> np.ndarray:
    small = np.arange(0, min(top, 1024) + 1)
    if top <= 1024:
        return small.astype(float)
    big = np.unique(np.round(np.geomspace(1024, top, 256)))
    return np.unique(np.concatenate([small, big])).astype(float)


class _RangeMax:
    """Maxima over index ranges of each row of a (draws, levels) array (a sparse table)."""

    def __init__(self, a: np.ndarray) -> None:
        self.table = [a]
        k = 1
        while 2 * k <= a.shape[1]:
            prev = self.table[-1]
            self.table.append(np.maximum(prev[:, :-k], prev[:, k:]))
            k *= 2

    def __call__(self, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
        """Row maxima over columns lo..hi (inclusive), shape (draws, len(lo))."""
        width = hi - lo + 1
        k = np.floor(np.log2(width)).astype(int)
        out = np.empty((self.table[0].shape[0], lo.size))
        for j in np.unique(k):
            sel = k == j
            t = self.table[j]
            out[:, sel] = np.maximum(t[:, lo[sel]], t[:, hi[sel] - 2 ** j + 1])
        return out


def change_chances(data: CountData, family: str | RateFamily, *, priors: Mapping[str, Any] | None = None,
                   detection: Any = None, environment: Any = None) -> pd.DataFrame:
    """For every census interval, the bound on the prior chance of a change at least as large.

    Args:
        data: the counts.
        family: a RateFamily or registry name (with its immigration option).
        priors: {parameter: prior spec} overrides, as for the fit.
        detection: None (exact counts), a fixed probability or "estimate".
        environment: good and bad years and covariates (``infer.model.Environment``; None: none).

    Returns:
        one row per interval, site by site in time order: site, before_time, time,
        before_count, count, line (of the count at ``time``; None if unknown), row_kind,
        checked ("rise", "fall" or "" when not checked), chance (the module docstring's bound
        averaged over the prior draws; 1 when not checked), back_chance (for a change the
        next interval undoes, the bound on both together; NaN otherwise).

    Raises:
        InputError: bad priors, detection or covariates (as the model builder would).
    """
    from tallyfit.infer.model import NO_ENVIRONMENT

    environment = NO_ENVIRONMENT if environment is None else environment
    det = normalise_detection(detection)
    fam, resolved = _resolved_priors(data, get_family(family), dict(priors or {}), det, environment)
    p_low = (1.0 if det is None else float(det) if det != "estimate"
             else float(scipy_prior(resolved["detection"]).ppf(0.001)))

    # the intervals, site by site: counts, times, lines
    t0, t1, n0, n1, site_of, line_of, kind_of, first = [], [], [], [], [], [], [], []
    for s in data.series:
        times, counts, rows = s.observed("max")
        if times.size < 2:
            continue
        first.append(len(t0))
        t0 += list(times[:-1]); t1 += list(times[1:])
        n0 += list(counts[:-1]); n1 += list(counts[1:])
        site_of += [str(s.site)] * (times.size - 1)
        line_of += [int(r) if r > 0 else None for r in rows[1:]]
        kind_of += [s.row_kind] * (times.size - 1)
    if not t0:
        return pd.DataFrame(columns=["site", "before_time", "time", "before_count", "count", "line", "row_kind",
                                     "checked", "chance", "back_chance"])
    t0a, t1a = np.asarray(t0, float), np.asarray(t1, float)
    dt = t1a - t0a
    a0, a1 = np.asarray(n0, float), np.asarray(n1, float)
    up = a1 > a0
    down = a1 < a0
    if p_low < 1.0:   # a generous bound on the true size behind a count (Binomial(n, p) missed animals)
        a0 = np.where(up, np.ceil((a0 + 3.1 * np.sqrt(a0) + 5.0) / p_low), a0)
        down[:] = False
        up = a1 > a0
    T = dt.size
    grid = _level_grid(int(max(a0.max(), a1.max(), 1)))
    gsizes = np.maximum(grid, 1.0)
    # grid indices bracketing each interval's levels: rises n_0..n_1−1, falls n_1+1..n_0
    lo_level = np.where(up, a0, a1 + 1)
    hi_level = np.where(up, a1 - 1, a0)
    lo_idx = np.clip(np.searchsorted(grid, lo_level, side="right") - 1, 0, grid.size - 1)
    hi_idx = np.clip(np.searchsorted(grid, hi_level, side="left"), 0, grid.size - 1)
    hi_idx = np.maximum(hi_idx, lo_idx)

    # covariate rows per interval, in the same site-by-site order as the intervals above
    surveyed = [s for s in data.series if s.surveyed_times.size >= 2]
    births_x = (interval_design(surveyed, environment.covariates, environment.births, what="births")
                if environment.births else None)
    deaths_x = (interval_design(surveyed, environment.covariates, environment.deaths, what="deaths")
                if environment.deaths else None)

    rng = np.random.default_rng(_SEED)
    total = np.zeros(T)
    pair_total = np.zeros(T)  # pair (i, i+1), same site, opposite directions
    same_site = np.zeros(T, dtype=bool)
    same_site[:-1] = np.asarray(site_of[:-1]) == np.asarray(site_of[1:])
    back = same_site & np.concatenate([(up[:-1] & down[1:]) | (down[:-1] & up[1:]), [False]])
    chunk = 500
    done = 0
    while done < JUMP_DRAWS:
        m = min(chunk, JUMP_DRAWS - done)
        done += m
        draws = fam.draw_prior(resolved, m, rng)
        b, d = fam.numpy_rates(draws, grid)
        iota = b[:, 0].copy() if fam.immigration else np.zeros(m)
        with np.errstate(divide="ignore", invalid="ignore"):
            pc_b = np.where(grid[None, :] >= 1, (b - iota[:, None]) / gsizes[None, :], 0.0)
            pc_d = np.where(grid[None, :] >= 1, d / gsizes[None, :], 0.0)
        lam = _RangeMax(np.nan_to_num(pc_b, nan=np.inf))(lo_idx, hi_idx)
        mu = _RangeMax(np.nan_to_num(pc_d, nan=np.inf))(lo_idx, hi_idx)
        # each interval's year and covariates, as the model scales per-capita rates
        log_b = np.zeros((m, T))
        log_d = np.zeros((m, T))
        if environment.varying is not None:
            sd = np.asarray(scipy_prior(resolved["environment_sd"]).rvs(size=m, random_state=rng), float)
            eps = sd[:, None] * rng.standard_normal((m, T))
            log_b += eps - 0.5 * sd[:, None] ** 2
            if environment.varying == "births_and_deaths":
                log_d += -eps - 0.5 * sd[:, None] ** 2
        for x, key, target in ((births_x, "birth_effect", log_b), (deaths_x, "death_effect", log_d)):
            if x is not None:
                beta = np.asarray(scipy_prior(resolved[key]).rvs(size=(m, x.shape[1]), random_state=rng), float)
                target += beta @ x.T
        # a floor on λ* only enlarges the bound (more births); it keeps the negative binomial's
        # limit (Poisson immigrants) in floating point
        lam = np.maximum(lam * np.exp(log_b), 1e-6 / dt[None, :])
        mu = np.maximum(mu * np.exp(log_d), 1e-300)
        bound = np.ones((m, T))
        with np.errstate(all="ignore"):
            if up.any():
                r = a0[None, up] + iota[:, None] / lam[:, up]
                bound[:, up] = stats.nbinom.sf(a1[None, up] - a0[None, up] - 1, r, np.exp(-lam[:, up] * dt[None, up]))
                # the climbing bound where the first is not already small (below 0.5), most suspect
                # first, within CLIMB_BUDGET levels (always where it is below 0.1)
                mean = bound.mean(axis=0)
                rises = np.flatnonzero(up)[np.argsort(mean[up], kind="stable")]
                spent = np.cumsum(np.minimum(a1[rises] - a0[rises], CLIMB_LEVELS))
                within = (spent <= CLIMB_BUDGET) & (np.arange(rises.size) < CLIMB_INTERVALS) & (mean[rises] < 0.5)
                for i in rises[within | (mean[rises] < 0.1)]:
                    bound[:, i] = np.minimum(bound[:, i], _climb(fam, draws, int(a0[i]), int(a1[i]), float(dt[i]),
                                                                 log_b[:, i], log_d[:, i]))
            if down.any():
                bound[:, down] = stats.binom.cdf(a1[None, down], a0[None, down], np.exp(-mu[:, down] * dt[None, down]))
        bound = np.nan_to_num(bound, nan=1.0)
        total += bound.sum(axis=0)
        pair_total[:-1] += (bound[:, :-1] * bound[:, 1:]).sum(axis=0)
    chance = total / JUMP_DRAWS
    pair = pair_total / JUMP_DRAWS

    return pd.DataFrame({"site": site_of, "before_time": t0a, "time": t1a, "before_count": np.asarray(n0, int),
                         "count": np.asarray(n1, int), "line": line_of, "row_kind": kind_of,
                         "checked": np.where(up, "rise", np.where(down, "fall", "")),
                         "chance": np.where(up | down, chance, 1.0), "back_chance": np.where(back, pair, np.nan)})


def implausible_changes(data: CountData, family: str | RateFamily, *, priors: Mapping[str, Any] | None = None,
                        detection: Any = None, environment: Any = None) -> list[ImplausibleChange]:
    """Counts whose change from the previous count the family's priors do not allow: a chance
    (:func:`change_chances`) below JUMP_LIMIT, alone or with the next interval that undoes it.

    Args:
        data, family, priors, detection, environment: as :func:`change_chances`.

    Returns:
        the flagged changes, site by site in time order (empty when every change is plausible).

    Raises:
        InputError: as :func:`change_chances`.
    """
    table = change_chances(data, family, priors=priors, detection=detection, environment=environment)
    alone = (table["chance"] < JUMP_LIMIT).to_numpy()
    both = (table["back_chance"] < JUMP_LIMIT).to_numpy()
    out = []
    i = 0
    while i < len(table):
        # a change flagged alone, else one flagged with the next interval that undoes it (which
        # is then not reported again)
        as_pair = both[i] and not alone[i] and not (i + 1 < len(table) and alone[i + 1])
        if alone[i] or as_pair:
            row = table.iloc[i]
            nxt = table.iloc[i + 1] if as_pair else None
            out.append(ImplausibleChange(
                site=str(row["site"]) if data.n_sites > 1 else None, time=float(row["time"]),
                count=int(row["count"]), before_time=float(row["before_time"]),
                before_count=int(row["before_count"]), after_time=float(nxt["time"]) if as_pair else None,
                after_count=int(nxt["count"]) if as_pair else None,
                chance=float(row["back_chance"] if as_pair else row["chance"]),
                line=None if row["line"] is None or pd.isna(row["line"]) else int(row["line"]),
                row_kind=str(row["row_kind"])))
        i += 2 if as_pair else 1
    return out


def _climb(fam: RateFamily, draws: Mapping[str, np.ndarray], n0: int, n1: int, dt: float,
           log_b: np.ndarray, log_d: np.ndarray) -> np.ndarray:
    """Per draw, (1 + (λ_{n_0} + μ_{n_0})·t)·q: the bound on climbing from n_0 to n_1 in time t
    (module docstring), with this interval's year and covariates scaling the per-capita rates."""
    L = min(n1 - n0, CLIMB_LEVELS)
    levels = np.arange(n0, n0 + L + 1, dtype=float)
    b, d = fam.numpy_rates(draws, levels)
    iota = b[:, :1] if fam.immigration else 0.0
    # the environment scales per-capita births, never immigration (infer.likelihood.environment)
    b = iota + (b - iota) * np.exp(log_b)[:, None]
    d = d * np.exp(log_d)[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        step = np.nan_to_num(np.log(d[:, 1:L]) - np.log(b[:, 1:L]), nan=np.inf)    # log μ_j/λ_j, j = n_0+1..
        log_rho = np.concatenate([np.zeros((b.shape[0], 1)), np.cumsum(step, axis=1)], axis=1)
        top = np.max(log_rho, axis=1, keepdims=True)   # ρ_0 = 1, so top ≥ 0 is finite or +inf
        log_sum = top[:, 0] + np.log(np.sum(np.exp(log_rho - np.where(np.isfinite(top), top, 0.0)), axis=1))
        leave_up = b[:, 0] / (b[:, 0] + d[:, 0])
        out = (1.0 + (b[:, 0] + d[:, 0]) * dt) * leave_up * np.exp(-log_sum)
    return np.clip(np.nan_to_num(out, nan=1.0), 0.0, 1.0)


def check_changes(data: CountData, family: str | RateFamily, *, priors: Mapping[str, Any] | None = None,
                  detection: Any = None, environment: Any = None, accept: bool = False,
                  unit: TimeUnit | None = None) -> list[ImplausibleChange]:
    """Refuse counts the family's priors do not allow, unless they are accepted deliberately.

    Args:
        data, family, priors, detection, environment: as :func:`implausible_changes`.
        accept: accept flagged counts (``--accept-jumps``); they are returned for the record.
        unit: the time column's unit, for the message.

    Returns:
        the flagged changes (empty unless ``accept``).

    Raises:
        ImplausibleCountsError: flagged counts and ``accept`` is False; names the file, the line
            and column of the first and lists up to five.
        InputError: as :func:`implausible_changes`.
    """
    found = implausible_changes(data, family, priors=priors, detection=detection, environment=environment)
    if not found or accept:
        return found
    fam = get_family(family)
    first = found[0]
    listed = "; ".join(c.describe(unit) + (f" ({c.row_kind} {c.line})" if c.line and k else "")
                       for k, c in enumerate(found[:5]))
    more = f" (and {len(found) - 5} more)" if len(found) > 5 else ""
    message = (f"{listed}{more}. No birth–death process of the {fam.name} family with rates its priors allow "
               f"(beyond their 99.9%) makes such a change in that time, so this looks like a typing slip — extra "
               "or missing digits, a misplaced decimal point, a count from another site")
    hint = ("correct the count; if it is right, accept it deliberately with --accept-jumps ([fit] "
            "accept_jumps = true), or widen the priors of the rates in [priors]")
    where: dict[str, Any] = {"line": first.line} if first.row_kind == "line" else {"row": first.line}
    raise ImplausibleCountsError(message, changes=found, source=str(data.source), column="count", hint=hint,
                                 **where)
