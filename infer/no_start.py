"""Why no starting point is finite, in plain words: which terms are −inf, which transitions the
likelihood cannot give a probability to, and what to change (a family, a prior, the cap).

Used by :func:`infer.start.find_start` when every candidate fails.
"""
from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np

from tallyfit.infer.errors import InputError
from tallyfit.infer.model import CountModel
from tallyfit.infer.observation import observation_table

if TYPE_CHECKING:
    from tallyfit.infer.start import DataStart

__all__ = ["no_start_error"]


def _named_values(cm: CountModel, point: dict[str, np.ndarray]) -> Any:
    """A one-draw posterior (xarray Dataset) of every free variable and Deterministic at ``point``."""
    import xarray as xr

    model = cm.model
    names = [v.name for v in model.free_RVs] + [v.name for v in model.deterministics]
    outs = model.replace_rvs_by_values([model[n] for n in names])
    values = model.compile_fn(outs, inputs=model.value_vars, on_unused_input="ignore")(point)
    dims = model.named_vars_to_dims
    data = {n: (("chain", "draw") + tuple(dims.get(n) or ()), np.asarray(v, dtype=float)[None, None])
            for n, v in zip(names, values)}
    coords = {k: list(v) for k, v in model.coords.items() if any(k in spec[0] for spec in data.values())}
    return xr.Dataset(data, coords={"chain": [0], "draw": [0], **coords})


def _likelihood_trouble(cm: CountModel, point: dict[str, np.ndarray]) -> str:
    """Why the count likelihood is −inf at ``point``, in the likelihood's own words, or which transitions."""
    from tallyfit.chain.errors import RateError
    from tallyfit.infer.draws import site_draws
    from tallyfit.infer.likelihood import MAX_STEPS, REFUSED_ERRORS, PreparedCounts

    post, obs, parts = _named_values(cm, point), observation_table(cm.data, cm.detection), []
    fast = ("the rates are too fast for the census intervals ({}): typically deaths far above births where the "
            "counts are, e.g. a carrying capacity far below them")

    def values(name: str) -> np.ndarray:
        return np.asarray(post[name].values, dtype=float).reshape(-1) if name in post else np.zeros(0)

    for counts, site, spec in cm.likelihood_groups():
        birth, death = (r[0] for r in cm.family.numpy_rates(site_draws(post, cm.family, site, pooled=cm.pooling),
                                                             cm.sizes))
        longest = max((float(np.max(np.diff(s.surveyed_times))) for s in cm.data.series
                       if s.surveyed_times.size > 1 and site in (None, s.site)), default=0.0)
        top = max(float(np.max(birth[:-1] + death[:-1])), float(death[-1]))   # as the guarded Op tests it
        if not math.isfinite(top) or top * longest > MAX_STEPS:
            parts.append(fast.format(f"births plus deaths reach {top:.3g} per time unit over sizes 0..{cm.cap}: "
                                     f"{top * longest:.2g} steps for an interval of {longest:g}, limit {MAX_STEPS:.2g}"))
            continue
        prepared = PreparedCounts(*counts, environment=spec) if isinstance(counts, tuple) else \
            PreparedCounts(counts, None, environment=spec)
        try:
            res = (prepared.evaluate_environment(birth, death, float(values("environment_sd").sum()),
                                                 values("birth_effect"), values("death_effect"), 1e-10, False)
                   if spec is not None else
                   prepared.evaluate(birth, death, float(values("detection")[0]) if cm.detection == "estimate"
                                     else cm.detection, 1e-10, False))
        except RateError as exc:
            parts.append(fast.format(exc))
            continue
        except REFUSED_ERRORS as exc:   # the likelihood's own words, without its general hint
            parts.append(str(exc).split(" — ")[0] or type(exc).__name__)
            continue
        rows = obs if site is None else obs[obs.site == site].reset_index(drop=True)
        bad = np.flatnonzero(~np.isfinite(np.concatenate(res.pointwise)))
        parts += [f"site {rows.site[i]!r}, time {rows.time_from[i]:g} → {rows.time_to[i]:g}: count {rows.count_from[i]} "
                  f"→ {rows.count_to[i]} has probability 0 in double precision" for i in bad[:3]]
    parts = list(dict.fromkeys(parts))   # pooled sites often fail alike
    return "; ".join(parts[:2] + ([f"{len(parts) - 2} more"] if len(parts) > 2 else [])) or "it is not finite"


def no_start_error(cm: CountModel, data: "DataStart", from_counts: dict[str, np.ndarray],
                    evaluated: list[tuple[str, dict[str, np.ndarray], dict[str, float]]]) -> InputError:
    """The InputError when no start candidate is finite.

    Args:
        cm: the built model.
        data: the start from the counts (:class:`infer.start.DataStart`).
        from_counts: that start as a point of the sampler's variables.
        evaluated: (label, point, terms) of every candidate tried.

    Returns:
        InputError naming what was tried, which terms are −inf, why, and what to change.
    """
    tried = [f"{label} ({', '.join(f'{k} {v:g}' for k, v in terms.items() if not math.isfinite(v)) or 'gradient not finite'})"
             for label, _, terms in evaluated[:2]]
    if len(evaluated) > 2:
        tried.append(f"{len(evaluated) - 2} variants near them")
    shown = ", ".join(f"{k} {np.asarray(v).round(4).tolist()}" for k, v in data.parameters.items()
                      if np.ndim(v) == 0)
    text = ("no starting point gives the model a finite log density, so sampling cannot begin; tried "
            + "; ".join(tried) + ".")
    counts_terms = evaluated[0][2]
    if not math.isfinite(counts_terms.get("count_loglik", 0.0)):
        text += (f" At the start from the counts ({shown}) " + _likelihood_trouble(cm, from_counts) + ".")
    bad_priors = sorted({k for _, _, t in evaluated for k, v in t.items()
                         if k != "count_loglik" and not math.isfinite(v)})
    if bad_priors:
        text += " Not finite as well: " + ", ".join(bad_priors) + "."

    def off(item: tuple[str, tuple[float, float]]) -> float:   # how far the prior moved the estimate
        return abs(math.log(max(item[1][1], 1e-300) / max(item[1][0], 1e-300)))

    far = [item for item in sorted(data.clipped.items(), key=off, reverse=True) if off(item) > math.log(2)][:2]
    change = [f"the prior of {k} (priors.{k} in the --config file), which keeps it at {v:.4g} while the counts "
              f"suggest about {e:.4g}" for k, (e, v) in far]
    change += ["the rate family (--rates)", "let good and bad years (--varying-years births) or counting error "
               "(--detection) explain jumps larger than births and deaths can", f"the maximum size (--max-size, now {cm.cap})"]
    return InputError(text, source="starting point", hint="change " + ", or ".join(change))
