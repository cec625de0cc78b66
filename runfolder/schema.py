"""The run folder's contract: which files, and what each holds. Standard library only.

Both the writer (:mod:`tallyfit.runfolder.writer`) and every reader
(:mod:`tallyfit.runfolder.reader`, the audit, the report) use the names and the
encoders/decoders here, so a renamed key is one edit and a reader never guesses.

A run folder holds:

=================  ==============================================================
posterior.nc       ArviZ InferenceData: posterior, sample_stats, log_likelihood,
                   posterior_predictive, observed_data, prior (netCDF groups)
derived.nc         the push-forward Dataset (DERIVED_VARIABLES; structured attributes
                   below)
summary.json       SUMMARY_SECTIONS
summary.csv        one row per parameter and derived quantity (SUMMARY_CSV_COLUMNS)
report.html        the self-contained report (figures/ holds its PNG files)
counts.csv         the input data exactly as read
run.toml           RUN_TOML_SECTIONS: resolved settings, package versions, the seed and
                   cap, and SHA-256 of HASHED_FILES
=================  ==============================================================

Structured attributes of derived.nc are never free text to parse: the criterion E
category codes follow the CF conventions (``flag_values`` / ``flag_meanings``), and the
horizons, the generation time and the scenarios are JSON strings (ATTR_*).
"""
from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from typing import Any

__all__ = ["CAUTION", "SCHEMA_VERSION", "RUN_FILES", "HASHED_FILES", "FIGURES_DIR", "SUMMARY_SECTIONS",
           "PARAMETER_COLUMNS", "SUMMARY_CSV_COLUMNS", "RUN_TOML_SECTIONS", "DERIVED_DIMS",
           "DERIVED_VARIABLES", "ATTR_HORIZONS", "ATTR_GENERATION_TIME", "ATTR_SCENARIOS", "ATTR_TOL",
           "ATTR_CAP", "ATTR_FAMILY_TEXT", "ATTR_SETTINGS", "CATEGORY_VARIABLE", "PREDICTIVE_VARIABLE",
           "CELL_DIM", "CELL_SITE", "CELL_TIME", "CELL_REPLICATE", "LOGLIK_VARIABLE", "OBS_DIM", "OBS_SITE",
           "OBS_TIME", "MODELS_DIR", "WEIGHING_FILES", "WEIGHING_HASHED", "WEIGHING_SECTIONS",
           "WEIGHTS_COLUMNS", "WEIGHED_MODEL_COORD", "SchemaError", "category_attrs", "categories_from_attrs", "encode_json_attr",
           "decode_json_attr", "require_keys"]

#: The caution every summary.json and report carries (README says the same).
CAUTION = ("Results are model-based: they depend on the counts supplied and on the assumptions "
           "shown (rate family, priors, observation model, size cap). Listing, harvest and "
           "management decisions should follow the relevant authority's guidelines (for Red List "
           "assessments, the IUCN Red List Categories and Criteria and its guidelines) and "
           "qualified review.")

#: Bumped when a file's layout changes incompatibly; recorded in summary.json.
SCHEMA_VERSION = 3  # 3: the "environment" section (good and bad years, covariates), the forecast

#: Files every complete run folder holds.
RUN_FILES: tuple[str, ...] = ("posterior.nc", "derived.nc", "summary.csv", "summary.json", "report.html",
                              "counts.csv", "run.toml")
#: Files whose SHA-256 run.toml records (and the audit verifies).
HASHED_FILES: tuple[str, ...] = ("counts.csv", "posterior.nc")
#: Folder of the report's figures.
FIGURES_DIR = "figures"

#: summary.json: section -> what it holds.
SUMMARY_SECTIONS: dict[str, str] = {
    "schema_version": "SCHEMA_VERSION of the writer",
    "caution": "the caution every report carries",
    "data": "source, sites, n_counts, sha256, time_unit (singular noun), time_units (plural), time_unit_reason (a sentence)",
    "family": "name, formula, description (the family's formula and priors as text)",
    "settings": "the resolved run settings",
    "cap": "the size cap N",
    "starts": "{site: start size of the forecasts}",
    "parameters": "{label: {PARAMETER_COLUMNS}}",
    "derived": "credible_level and {scenario: push-forward summaries}",
    "diagnostics": "passed, failed (phrases), limits, divergences (per chain), bfmi (per chain)",
    "cap_check": "ok, message and the measurements behind them",
    "environment": "varying_years, covariates (births, deaths, future values), quadrature_check (or null)",
    "warnings": "sentences the user must read",
}
#: Columns of every parameter entry in summary.json (and the parameter rows of summary.csv).
PARAMETER_COLUMNS: tuple[str, ...] = ("mean", "sd", "q_lo", "q50", "q_hi", "mcse_mean", "mcse_sd",
                                      "ess_bulk", "ess_tail", "r_hat")
#: Columns of summary.csv.
SUMMARY_CSV_COLUMNS: tuple[str, ...] = ("kind", "scenario", "quantity", "mean", "q_lo", "q50", "q_hi",
                                        "sd", "mcse_mean", "mcse_sd", "ess_bulk", "ess_tail", "r_hat")
#: run.toml sections.
RUN_TOML_SECTIONS: tuple[str, ...] = ("settings", "run", "versions", "hashes")

#: derived.nc: the dims, and each variable with its dims.
DERIVED_DIMS: tuple[str, ...] = ("scenario", "chain", "draw", "size", "site", "threshold", "horizon", "step")
_S = ("scenario", "chain", "draw")
DERIVED_VARIABLES: dict[str, tuple[str, ...]] = {
    "birth_per_capita": _S + ("size",),
    "death_per_capita": _S + ("size",),
    "immigration": _S,
    "stationary_exists": _S,
    "stationary_pmf": _S + ("size",),
    "stationary_mass_above_cap": _S,
    "stationary_mean": _S,
    "quasi_pmf": _S + ("size",),
    "quasi_decay_rate": _S,
    "quasi_mean": _S,
    "log10_mean_time_to_extinction": _S + ("site",),
    "extinction_probability": _S + ("site", "threshold", "horizon"),
    "extinction_error_bound": _S + ("site", "threshold", "horizon"),
    "extinction_probability_all_sites": _S + ("threshold", "horizon"),
    "iucn_category": _S,
    # the forecast of the next censuses: the posterior predictive distribution (averaged over draws)
    "forecast_pmf": ("scenario", "site", "step", "size"),
    "forecast_time": ("site", "step"),
}
#: The variable holding criterion E category codes (CF flag_values / flag_meanings).
CATEGORY_VARIABLE = "iucn_category"
#: derived.nc attributes (JSON strings where structured).
ATTR_HORIZONS = "criterion_e_horizons_json"      # {"CR": years, "EN": years, "VU": years}
ATTR_GENERATION_TIME = "generation_time_json"   # years, or null when not given
ATTR_SCENARIOS = "scenarios_json"               # [{name, harvest_rate, ..., description}]
ATTR_TOL = "tol"                                # solver tolerance (a number)
ATTR_CAP = "cap"                                # the size cap N (a number)

#: posterior.nc: attributes of the posterior group (JSON or plain text).
ATTR_FAMILY_TEXT = "tallyfit_family"            # the family's formula and priors, as text
ATTR_SETTINGS = "tallyfit_settings_json"        # the fit's resolved settings
#: posterior.nc: the observed counts and the posterior predictive counts share one layout:
#: a variable over one dim of cells, one cell per non-blank count, with coordinates along it.
PREDICTIVE_VARIABLE = "counts"
CELL_DIM = "count_cell"
CELL_SITE = "cell_site"
CELL_TIME = "cell_time"
CELL_REPLICATE = "cell_replicate"
#: posterior.nc: the pointwise log-likelihood, one term per transition.
LOGLIK_VARIABLE = "counts"
OBS_DIM = "obs"
OBS_SITE = "obs_site"
OBS_TIME = "obs_time"

#: A weighing folder (``tallyfit weigh``): several models fitted to one counts file, compared.
#: MODELS_DIR/<label>/ holds each model's complete run folder; WEIGHING_FILES are written
#: last, weighing.json after the others (it records their SHA-256), so a folder without a
#: readable weighing.json is not a finished weighing.
MODELS_DIR = "models"
WEIGHING_FILES: tuple[str, ...] = ("weights.csv", "weighed.nc", "report.html", "weighing.json")
#: Files whose SHA-256 weighing.json records.
WEIGHING_HASHED: tuple[str, ...] = ("weights.csv", "weighed.nc")
#: weighing.json: section -> what it holds.
WEIGHING_SECTIONS: dict[str, str] = {
    "schema_version": "SCHEMA_VERSION of the writer",
    "caution": "the caution every report carries",
    "data": "source, sha256, sites, n_counts, time_unit, time_units",
    "settings": "the run settings shared by every model",
    "models": "{label: {family, varying_years, folder (relative), status, detail, diagnostics_passed, "
              "baseline (the model's summary.json derived entry of the baseline scenario)}}",
    "weights": "{label: stacking weight} of the compared models",
    "weighed": "summaries of the weighed draws, as summary.json's derived section",
    "dependence": "sentence (how much the answer depends on the model) and the numbers behind it",
    "warnings": "sentences the user must read",
    "hashes": "{file: SHA-256} of WEIGHING_HASHED",
}
#: weights.csv columns, one row per model asked for (compared or not).
WEIGHTS_COLUMNS: tuple[str, ...] = ("model", "family", "varying_years", "status", "detail", "rank", "elpd_loo",
                                    "se", "elpd_diff", "dse", "p_loo", "weight", "max_pareto_k",
                                    "n_pareto_k_above_0_7", "diagnostics_passed", "folder")
#: weighed.nc: the per-draw variables of DERIVED_VARIABLES (draws resampled by weight) and,
#: along ``draw``, the coordinate naming the model each draw came from.
WEIGHED_MODEL_COORD = "model"


class SchemaError(ValueError):
    """A run-folder file does not follow this schema.

    Attributes:
        file: the file's name (e.g. "summary.json").
        key: the key, variable or attribute concerned.
        reason: what is wrong.
    """

    def __init__(self, file: str, key: str, reason: str) -> None:
        self.file = file
        self.key = key
        self.reason = reason
        super().__init__(f"{file}: {key}: {reason}")


def require_keys(doc: Any, keys: Sequence[str], file: str, where: str = "") -> Mapping[str, Any]:
    """Check that ``doc`` is a mapping holding every key.

    Args:
        doc: the decoded value.
        keys: keys it must hold.
        file: file name for the message.
        where: dotted path of ``doc`` inside the file ("" for the top).

    Returns:
        ``doc``.

    Raises:
        SchemaError: not a mapping, or a key missing (the first one is named).
    """
    if not isinstance(doc, Mapping):
        raise SchemaError(file, where or "(top)", f"expected a table, found {type(doc).__name__}")
    for key in keys:
        if key not in doc:
            raise SchemaError(file, f"{where}.{key}" if where else key, "missing")
    return doc


def encode_json_attr(value: Any) -> str:
    """A netCDF attribute value holding structured data (JSON text)."""
    return json.dumps(value, sort_keys=True, allow_nan=False)


def decode_json_attr(attrs: Mapping[str, Any], name: str, file: str) -> Any:
    """The structured value of an attribute written by :func:`encode_json_attr`.

    Raises:
        SchemaError: the attribute is missing or is not valid JSON.
    """
    if name not in attrs:
        raise SchemaError(file, name, "attribute missing")
    try:
        return json.loads(str(attrs[name]))
    except json.JSONDecodeError as exc:
        raise SchemaError(file, name, f"not valid JSON ({exc})") from None


def category_attrs(categories: Sequence[str], source: str) -> dict[str, Any]:
    """CF flag attributes of a category-code variable: codes 0..n-1 and their names.

    CF flag_meanings are blank-separated words, so blanks inside a name become "_".

    Args:
        categories: category names in code order.
        source: the standard the categories come from.

    Returns:
        {"flag_values": [...], "flag_meanings": "...", "source": source}.
    """
    return {"flag_values": list(range(len(categories))),
            "flag_meanings": " ".join(c.replace(" ", "_") for c in categories), "source": source}


def categories_from_attrs(attrs: Mapping[str, Any], file: str) -> list[str]:
    """Category names in code order from :func:`category_attrs`'s attributes.

    Raises:
        SchemaError: flag attributes missing or inconsistent.
    """
    if "flag_values" not in attrs or "flag_meanings" not in attrs:
        raise SchemaError(file, CATEGORY_VARIABLE, "flag_values / flag_meanings attributes missing")
    values = [int(v) for v in list(_as_list(attrs["flag_values"]))]
    names = str(attrs["flag_meanings"]).split()
    if values != list(range(len(names))):
        raise SchemaError(file, CATEGORY_VARIABLE, f"flag_values {values} do not number flag_meanings {names}")
    return [n.replace("_", " ") for n in names]


def _as_list(value: Any) -> list[Any]:
    if hasattr(value, "tolist"):
        value = value.tolist()
    return list(value) if isinstance(value, (list, tuple)) else [value]

