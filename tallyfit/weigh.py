"""Several models, one counts file: ``tallyfit weigh COUNTS --models linear logistic logistic+years``.

Each model is fitted into its own run folder under OUT/models/ (in parallel, on a Dask
cluster like ``batch``; a rerun fits only the models whose folder is missing or was
fitted with other settings or data). The models are then compared by PSIS-LOO with
stacking weights (:mod:`tallyfit.infer.comparison`), their push-forward draws are
combined in proportion to the weights, and the comparison files and report are written
(:mod:`tallyfit.runfolder.weighing`).
"""
from __future__ import annotations

import json
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from tallyfit.batch import is_complete, run_fits
from tallyfit.infer.comparison import loo_table, model_dependence, weighed_draws
from tallyfit.infer.criterion_e import CATEGORIES
from tallyfit.infer.errors import InputError
from tallyfit.infer.families import get_family
from tallyfit.infer.pushforward import summarise
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.inputs.settings import RunSettings
from tallyfit.runfolder import schema as S
from tallyfit.runfolder.reader import open_run, read_run_toml
from tallyfit.runfolder.store import claim_folder, sha256_file, toml_value
from tallyfit.runfolder.weighing import WeighingRecord, write_weighing

__all__ = ["ModelChoice", "WeighingOutcome", "parse_models", "run_weighing", "YEARS_SUFFIX"]

#: The suffix of a model token that adds good and bad years (``logistic+years``).
YEARS_SUFFIX = "+years"


@dataclass(frozen=True)
class ModelChoice:
    """One model to fit: a rate family, with or without good and bad years.

    Attributes:
        label: the name shown in tables ("logistic", "logistic+years").
        rates: the rate family.
        varying_years: "none", "births" or "births_and_deaths".
    """

    label: str
    rates: str
    varying_years: str

    @property
    def folder_name(self) -> str:
        """The model's run folder name under models/ ("logistic-years")."""
        return re.sub(r"[^A-Za-z0-9_-]+", "-", self.label).strip("-")


@dataclass
class WeighingOutcome:
    """What a finished weighing reports back.

    Attributes:
        folder: the weighing folder.
        table: weights.csv as written.
        sentence: how much the answer depends on the model.
        passed: every model fitted and passed its convergence checks.
        warnings: sentences the user must see.
    """

    folder: Path
    table: pd.DataFrame
    sentence: str
    passed: bool
    warnings: list[str] = field(default_factory=list)


def parse_models(tokens: Sequence[str], years: str = "births") -> list[ModelChoice]:
    """The models named on the command line.

    Args:
        tokens: e.g. ["linear", "logistic", "logistic+years"]; FAMILY or FAMILY+years.
        years: which rates vary between good and bad years in the "+years" models
            ("births" or "births_and_deaths").

    Returns:
        one ModelChoice per token, in order.

    Raises:
        InputError: fewer than two models, an unknown family, or a model named twice.
    """
    if len(tokens) < 2:
        raise InputError(f"weigh needs at least two models to compare, got {len(tokens)}", source="--models",
                         hint="e.g. --models linear logistic logistic+years")
    out: list[ModelChoice] = []
    for token in tokens:
        rates, plus = (token[: -len(YEARS_SUFFIX)], True) if token.endswith(YEARS_SUFFIX) else (token, False)
        try:
            get_family(rates)
        except InputError as exc:
            raise InputError(f"model {token!r}: {exc}", source="--models",
                             hint=f"a model is a rate family, optionally with {YEARS_SUFFIX} for good and bad "
                                  "years: linear, logistic, allee or per-size") from None
        choice = ModelChoice(token, rates, years if plus else "none")
        if any(c.label == token for c in out):
            raise InputError(f"model {token!r} is named twice", source="--models")
        out.append(choice)
    return out


def _same_fit(folder: Path, settings: RunSettings, digest: str) -> bool:
    """True when ``folder`` is a complete run of these settings on these counts."""
    if not is_complete(folder):
        return False
    doc = read_run_toml(folder)
    if doc is None or doc["hashes"].get("counts.csv") != digest:
        return False
    done = {k: v for k, v in doc["settings"].items() if k not in ("cap", "cap_rule")}
    return json.dumps(done, sort_keys=True) == json.dumps(toml_value(settings.as_dict()), sort_keys=True)


def _risk_key(summary: dict[str, Any]) -> tuple[str, str]:
    """The headline risk: every site extinct (threshold 0, else the lowest), at 100 time units
    if asked for, else at the longest horizon."""
    ext = summary["extinction_probability_all_sites"]
    thr = "threshold=0" if "threshold=0" in ext else sorted(ext, key=lambda t: float(t.split("=")[1]))[0]
    hs = ext[thr]
    h = "100" if "100" in hs else max(hs, key=float)
    return thr, h


def run_weighing(counts: str | Path, settings: RunSettings, out: str | Path, models: Sequence[ModelChoice], *,
                 scheduler: str | None = None, n_workers: int | None = None,
                 log: Callable[[str], None] = print,
                 report: Callable[[Path], Any] | None = None) -> WeighingOutcome:
    """Fit every model to the counts, compare them and write the weighing folder.

    Args:
        counts: counts CSV (every model is fitted to all of it).
        settings: run settings shared by the models (their family and good-and-bad-years
            setting come from ``models``).
        out: the weighing folder.
        models: the models (at least two).
        scheduler: address of a running Dask scheduler; default a LocalCluster.
        n_workers: LocalCluster workers (default: the cores, at most one per model).
        log: progress messages.
        report: builds the comparison report in a folder (default the one in
            :mod:`tallyfit.reports`).

    Returns:
        WeighingOutcome.

    Raises:
        InputError: bad counts or settings, or fewer than two models could be fitted
            (their reasons are in the message; the models' folders that were written stay).
        FolderInUseError: another weighing is writing ``out``.
    """
    if report is None:
        from tallyfit.reports.weighing import build_weighing_report as report
    data = load_counts(counts)  # refuse bad counts before any model is started
    out = Path(out)
    digest = sha256_file(counts)
    with claim_folder(out, log=log):
        plan = {m.label: replace(settings, rates=m.rates, varying_years=m.varying_years) for m in models}
        folders = {m.label: out / S.MODELS_DIR / m.folder_name for m in models}
        rows: dict[str, dict[str, Any]] = {}
        todo = {}
        for m in models:
            if _same_fit(folders[m.label], plan[m.label], digest):
                rows[m.label] = {"status": "ok", "detail": "already fitted (delete the folder to refit)"}
            else:
                todo[m.label] = (str(counts), plan[m.label], str(folders[m.label]))
        log(f"{len(models)} model(s): {len(todo)} to fit, {len(models) - len(todo)} already fitted")

        def done(label: str, row: dict[str, Any]) -> None:
            rows[label] = row
            log(f"model {label}: {row['status']}" + (f" ({row['detail']})" if row["status"] != "ok" else ""))

        run_fits(todo, scheduler=scheduler, n_workers=n_workers, on_result=done)
        runs = {m.label: open_run(folders[m.label]) for m in models if rows[m.label]["status"] == "ok"}
        if len(runs) < 2:
            failed = "; ".join(f"{k}: {r['detail']}" for k, r in rows.items() if r["status"] != "ok")
            raise InputError(f"fewer than two models could be fitted, so there is nothing to compare ({failed})",
                             source=str(counts))
        table = loo_table({k: rf.idata for k, rf in runs.items()})
        weights = {k: float(table.loc[k, "weight"]) for k in runs}
        first = next(iter(runs.values()))
        n_draws = first.derived.sizes["chain"] * first.derived.sizes["draw"]
        weighed = weighed_draws({k: rf.derived for k, rf in runs.items()}, weights, n_draws=n_draws,
                                seed=settings.seed)
        weighed.attrs.update(first.derived.attrs)
        weighed.attrs[S.ATTR_CAP] = max(rf.cap for rf in runs.values())
        level = first.credible_level
        weighed_summary = summarise(weighed, level=level)
        baselines = {k: rf.summary_section("derived")[rf.baseline] for k, rf in runs.items()}
        unit = first.summary_section("data") or {}
        thr, h = _risk_key(baselines[next(iter(runs))])
        w_risk = weighed_summary[first.baseline]["extinction_probability_all_sites"][thr][h]
        what = (f"the probability that {'every site is' if len(data.sites) > 1 else 'the population is'} "
                + ("extinct" if thr == "threshold=0" else f"at or below {thr.split('=')[1]}")
                + f" within {h} {unit.get('time_units', 'time units')}")
        dependence = model_dependence(
            weights, {k: b["extinction_probability_all_sites"][thr][h]["mean"] for k, b in baselines.items()},
            {k: max(CATEGORIES, key=lambda c: b["iucn_category_probability"][c]) for k, b in baselines.items()},
            weighed_risk=(w_risk["mean"], w_risk["q_lo"], w_risk["q_hi"]), what=what, level=level)
        dependence.update(threshold=thr, horizon=h, what=what)

        warnings: list[str] = []
        records = []
        for m in models:
            row = rows[m.label]
            rec: dict[str, Any] = {"model": m.label, "family": m.rates, "varying_years": m.varying_years,
                                   "status": row["status"], "detail": row.get("detail", ""),
                                   "folder": f"{S.MODELS_DIR}/{m.folder_name}"}
            if m.label in runs:
                rf = runs[m.label]
                diag = rf.summary_section("diagnostics") or {}
                rec.update({c: table.loc[m.label, c] for c in ("rank", "elpd_loo", "se", "elpd_diff", "dse",
                                                               "p_loo", "weight", "max_pareto_k",
                                                               "n_pareto_k_above_0_7")})
                rec["diagnostics_passed"] = bool(diag.get("passed", False))
                if not rec["diagnostics_passed"]:
                    warnings.append(f"model {m.label}: convergence checks failed ({'; '.join(diag.get('failed', []))}); "
                                    "its LOO estimate and weight are not reliable — refit it with more draws")
                if rec["n_pareto_k_above_0_7"] > 0:
                    warnings.append(f"model {m.label}: {rec['n_pareto_k_above_0_7']} observation(s) with Pareto k "
                                    f"above 0.7 (largest {rec['max_pareto_k']:.2f}), so its PSIS-LOO estimate is "
                                    "unreliable (Vehtari, Gelman & Gabry 2017)")
            else:
                warnings.append(f"model {m.label} could not be fitted and is not compared: {row.get('detail', '')}")
            records.append(rec)
        frame = pd.DataFrame(records, columns=list(S.WEIGHTS_COLUMNS))
        sections = {
            "data": {"source": str(counts), "sha256": digest, "sites": list(data.sites),
                     "n_counts": int(data.n_counts), "time_unit": unit.get("time_unit", "time unit"),
                     "time_units": unit.get("time_units", "time units")},
            "settings": {k: v for k, v in settings.as_dict().items() if k not in ("rates", "varying_years")},
            "models": {rec["model"]: {"family": rec["family"], "varying_years": rec["varying_years"],
                                      "folder": rec["folder"], "status": rec["status"], "detail": rec["detail"],
                                      "diagnostics_passed": rec["diagnostics_passed"]
                                      if rec["diagnostics_passed"] is not None else None,
                                      "baseline": baselines.get(rec["model"])} for rec in records},
            "weights": weights, "weighed": weighed_summary, "dependence": dependence, "warnings": warnings,
        }
        write_weighing(out, WeighingRecord(table=frame, weighed=weighed, sections=sections), report=report)
    passed = all(r["status"] == "ok" for r in rows.values()) and bool(frame["diagnostics_passed"].fillna(False).all())
    return WeighingOutcome(out, frame, dependence["sentence"], passed, warnings)
