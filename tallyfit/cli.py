"""The ``tallyfit`` command line.

Exit codes: 0 ok; 1 a check failed (convergence diagnostics, audit); 2 bad input or
settings (the message names the file, row and column, or the setting); 3 an internal error
(a fault in tallyfit itself: the message asks for a report); 130 interrupted.
"""
from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path
from typing import Sequence

EXIT_OK, EXIT_CHECK, EXIT_INPUT, EXIT_INTERNAL, EXIT_INTERRUPT = 0, 1, 2, 3, 130
REPO = Path(__file__).resolve().parent.parent
DEMO_COUNTS = REPO / "example_counts" / "copper_tarn.csv"


def _parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="tallyfit", description=(
        "Fit birth–death processes to population head counts and turn the posterior into "
        "extinction risk, size distributions and criterion E categories."))
    p.add_argument("--quiet", action="store_true", help="no progress bars or progress messages")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def fit_options(sp: argparse.ArgumentParser) -> None:
        sp.add_argument("--config", type=Path, help="RUN.toml with [fit], [derive], [priors.*], [scenario.*] tables")
        sp.add_argument("--chains", type=int, help="MCMC chains (default 4)")
        sp.add_argument("--draws", type=int, help="draws kept per chain (default 1000)")
        sp.add_argument("--tune", type=int, help="tuning steps per chain (default 1000)")
        sp.add_argument("--seed", type=int, help="random seed (same seed, data and settings: same results)")
        sp.add_argument("--max-size", type=int, dest="max_size", help="size cap N (default: chosen from the data)")
        sp.add_argument("--detection", help='detection probability: a number in (0, 1], or "estimate" '
                                            "(needs replicate surveys); default: exact counts")
        sp.add_argument("--generation-time", type=float, dest="generation_time",
                        help="generation time in years, for the criterion E horizons")
        sp.add_argument("--varying-years", dest="varying_years",
                        choices=["none", "births", "births-and-deaths"],
                        help="good and bad years: each census interval's conditions move every animal's "
                             "births (or births and deaths) together; the year-to-year spread is estimated "
                             "(default none)")
        sp.add_argument("--time-unit", dest="time_unit",
                        help='what one unit of the time column is, e.g. "year" or "month" (default: '
                             "years when the times are calendar years, else a neutral \"time unit\")")
        sp.add_argument("--covariates", type=Path, dest="covariates_file",
                        help="covariate CSV (time, [site], one column per covariate); which covariates act "
                             "on births or deaths, and their future values, go in the --config file's "
                             "[covariates] table")
        sp.add_argument("--accept-jumps", dest="accept_jumps", action="store_true", default=None,
                        help="fit counts that change more than any birth–death process the priors allow "
                             "(by default such a count stops the run as a likely typing slip)")
        imm = sp.add_mutually_exclusive_group()
        imm.add_argument("--immigration", dest="immigration", action="store_true", default=None,
                         help="include an immigration rate (default)")
        imm.add_argument("--no-immigration", dest="immigration", action="store_false",
                         help="closed population: no immigration, so 0 is absorbing")
        sp.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)

    sp = sub.add_parser("demo", help="fit the bundled demo data and write a report")
    sp.add_argument("--out", type=Path, default=Path("demo_run"), help="run folder (default demo_run)")
    sp.add_argument("--seed", type=int, help="random seed")
    sp.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)

    sp = sub.add_parser("fit", help="fit a counts CSV and write a run folder with report")
    sp.add_argument("counts", type=Path, help="counts CSV: columns time, count [, site, survey]")
    sp.add_argument("--rates", help="rate family: linear, logistic, allee or per-size (default logistic)")
    sp.add_argument("--out", type=Path, required=True, help="run folder to write")
    fit_options(sp)

    sp = sub.add_parser("solve", help="derived quantities for given rates (no data)")
    sp.add_argument("rates", type=Path, help="RATES.toml: a family with [parameters] and cap, or birth/death arrays")
    sp.add_argument("--json", action="store_true", help="print JSON instead of text")
    sp.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)

    sp = sub.add_parser("simulate", help="exact simulated counts from given rates")
    sp.add_argument("rates", type=Path, help="RATES.toml (as for solve; 'start' is the size at time 0)")
    sp.add_argument("--times", type=float, nargs="+", required=True, help="census times")
    sp.add_argument("--out", type=Path, required=True, help="counts CSV to write")
    sp.add_argument("--sites", type=int, default=1, help="independent sites sharing the rates")
    sp.add_argument("--seed", type=int, default=None, help="random seed")
    sp.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)

    sp = sub.add_parser("batch", help="fit each site separately on Dask; one run folder per site")
    sp.add_argument("counts", type=Path, help="counts CSV with a site column")
    sp.add_argument("--by", default="site", help="the site column (default site)")
    sp.add_argument("--rates", help="rate family (default logistic)")
    sp.add_argument("--out", type=Path, required=True, help="folder for the site run folders and index.csv")
    sp.add_argument("--scheduler", help="address of a running Dask scheduler (default: a local cluster)")
    sp.add_argument("--workers", type=int, help="local cluster workers (default: the machine's cores)")
    fit_options(sp)

    sp = sub.add_parser("weigh", help="fit several models to one counts file and weigh them against each other "
                                      "(PSIS-LOO, stacking weights, the weighed extinction risk)")
    sp.add_argument("counts", type=Path, help="counts CSV: columns time, count [, site, survey]")
    sp.add_argument("--models", nargs="+", required=True, metavar="MODEL",
                    help="rate families to compare, each optionally with +years for good and bad years, e.g. "
                         "--models linear logistic logistic+years")
    sp.add_argument("--out", type=Path, required=True,
                    help="weighing folder: models/ (one run folder each), weights.csv, weighed.nc, report.html")
    sp.add_argument("--scheduler", help="address of a running Dask scheduler (default: a local cluster)")
    sp.add_argument("--workers", type=int, help="local cluster workers (default: the cores, at most one per model)")
    fit_options(sp)

    sp = sub.add_parser("audit", help="re-check a run folder; exit 1 if anything fails")
    sp.add_argument("run", type=Path, help="run folder")
    sp.add_argument("--quiet", action="store_true", default=argparse.SUPPRESS, help=argparse.SUPPRESS)
    return p


def _say(args: argparse.Namespace, text: str) -> None:
    if not args.quiet:
        print(text, flush=True)


def _run_fit(args: argparse.Namespace, counts: Path, out: Path, base: "RunSettings | None" = None) -> int:
    from tallyfit.pipeline import run_pipeline

    settings = _settings_from_args(args, base)
    outcome = run_pipeline(counts, settings, out, progress=not args.quiet,
                           log=(lambda s: None) if args.quiet else (lambda s: print(s, flush=True)))
    for w in outcome.warnings:
        print(f"WARNING: {w}", file=sys.stderr)
    _say(args, f"report: {outcome.folder / 'report.html'}")
    ext = outcome.headline.get("extinction", {})
    if ext:
        _say(args, "posterior mean probability that every site is extinct within: " +
             ", ".join(f"{outcome.headline['time_unit'].count(float(h))} {p:.3g}" for h, p in ext.items()
                       if p is not None))
    iucn = outcome.headline.get("iucn", {})
    if iucn:
        _say(args, "criterion E category probabilities: " + ", ".join(f"{k} {v:.2f}" for k, v in iucn.items()))
    if not outcome.passed:
        print("tallyfit: convergence checks failed; see the report's diagnostics", file=sys.stderr)
        return EXIT_CHECK
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from tallyfit.inputs.settings import RunSettings
    from tallyfit.infer.scenarios import Scenario

    # A small isolated population in decline: extinction risk, criterion E and two remedies.
    base = RunSettings(rates="linear", immigration=False, generation_time=2.0, thresholds=(0, 5),
                       chains=4, draws=1000, tune=1000, seed=args.seed if args.seed is not None else 20261201,
                       horizons=(5.0, 10.0, 20.0, 50.0, 100.0),
                       scenarios=(Scenario("protect adults", death_factor=0.85,
                                           description="per-capita death rate cut by 15%"),
                                  Scenario("release 2/yr", added_immigration=2.0,
                                           description="two captive-bred adults released a year")))
    _say(args, f"demo: {DEMO_COUNTS.name} (invented data; see {DEMO_COUNTS.with_suffix('.toml').name})")
    args.seed = None  # already in the base settings
    return _run_fit(args, DEMO_COUNTS, args.out, base)


def _settings_from_args(args: argparse.Namespace, base: "RunSettings | None" = None) -> "RunSettings":
    from tallyfit.inputs.settings import load_settings
    from tallyfit.infer.errors import InputError

    settings = load_settings(getattr(args, "config", None), base)
    detection = getattr(args, "detection", None)
    if detection is not None and detection != "estimate":
        try:
            detection = float(detection)
        except ValueError:
            raise InputError(f'--detection must be a number in (0, 1] or "estimate", got {detection!r}') from None
    return settings.with_options(rates=getattr(args, "rates", None), chains=getattr(args, "chains", None),
                                 draws=getattr(args, "draws", None), tune=getattr(args, "tune", None),
                                 seed=getattr(args, "seed", None), max_size=getattr(args, "max_size", None),
                                 detection=detection, immigration=getattr(args, "immigration", None),
                                 generation_time=getattr(args, "generation_time", None),
                                 varying_years=(None if getattr(args, "varying_years", None) is None
                                                else args.varying_years.replace("-", "_")),
                                 time_unit=getattr(args, "time_unit", None),
                                 accept_jumps=getattr(args, "accept_jumps", None),
                                 covariates_file=(None if getattr(args, "covariates_file", None) is None
                                                  else str(args.covariates_file.resolve())))


def _cmd_batch(args: argparse.Namespace) -> int:
    from tallyfit.batch import run_batch

    settings = _settings_from_args(args)
    index = run_batch(args.counts, settings, args.out, by=args.by, scheduler=args.scheduler,
                      n_workers=args.workers, log=(lambda s: None) if args.quiet else print)
    _say(args, index.to_string(index=False))
    _say(args, f"index: {args.out / 'index.csv'}")
    failed = index[index["status"] == "failed"]
    not_converged = index[(index["status"] == "ok") & (index["diagnostics_passed"] == False)]  # noqa: E712
    if len(failed):
        print(f"tallyfit: {len(failed)} site(s) failed: " + ", ".join(map(str, failed["site"])), file=sys.stderr)
    if len(failed) or len(not_converged):
        return EXIT_CHECK
    return EXIT_OK


def _cmd_weigh(args: argparse.Namespace) -> int:
    from tallyfit.weigh import parse_models, run_weighing

    settings = _settings_from_args(args)
    years = "births" if settings.varying_years == "none" else settings.varying_years
    models = parse_models(args.models, years)
    outcome = run_weighing(args.counts, settings.with_options(varying_years="none"), args.out, models,
                           scheduler=args.scheduler, n_workers=args.workers,
                           log=(lambda s: None) if args.quiet else (lambda s: print(s, flush=True)))
    shown = outcome.table[["model", "status", "elpd_loo", "se", "elpd_diff", "weight", "max_pareto_k",
                           "diagnostics_passed"]]
    _say(args, shown.to_string(index=False))
    _say(args, outcome.sentence)
    for w in outcome.warnings:
        print(f"WARNING: {w}", file=sys.stderr)
    _say(args, f"report: {outcome.folder / 'report.html'}")
    if not outcome.passed:
        print("tallyfit: not every model fitted and passed its checks; see the report", file=sys.stderr)
        return EXIT_CHECK
    return EXIT_OK


def _cmd_audit(args: argparse.Namespace) -> int:
    from tallyfit.runfolder.audit import audit_run

    res = audit_run(args.run)
    marks = {True: "ok  ", False: "FAIL", None: "n/a "}
    for c in res.checks:
        mark = marks[c.passed] if c.blocking or c.passed is not False else "warn"
        _say(args, f"{mark} {c.name}: {c.detail} ({c.source})")
    if not res.passed:
        problems = [f"{c.name}: {c.detail}" for c in res.failed]
        problems += [f"{c.name}: could not be checked ({c.detail})" for c in res.not_made if c.blocking]
        print("tallyfit: audit failed:\n  " + "\n  ".join(problems), file=sys.stderr)
        return EXIT_CHECK
    _say(args, "audit passed")
    return EXIT_OK


def _cmd_solve(args: argparse.Namespace) -> int:
    from tallyfit.inputs.rates_file import load_rates_file
    from tallyfit.solve import solve_rates

    spec = load_rates_file(args.rates)
    result = solve_rates(spec)
    if args.json:
        print(json.dumps(result, indent=2))
    else:
        for key, value in result.items():
            print(f"{key}: {value}")
    return EXIT_OK


def _cmd_simulate(args: argparse.Namespace) -> int:
    from tallyfit.inputs.rates_file import load_rates_file
    from tallyfit.solve import simulate_counts

    spec = load_rates_file(args.rates)
    table = simulate_counts(spec, args.times, sites=args.sites, seed=args.seed)
    from tallyfit.runfolder.store import write_atomic

    args.out.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(args.out, table.to_csv(index=False))
    _say(args, f"wrote {len(table)} counts to {args.out}")
    return EXIT_OK


def _os_error_message(exc: OSError) -> str:
    """What went wrong with the disk or a folder, naming the file and what to do.

    Args:
        exc: the error (its ``filename`` the file or folder concerned, when known).

    Returns:
        one sentence for the user.
    """
    import errno

    where = exc.filename if exc.filename is not None else "a file"
    if exc.errno in (errno.ENOSPC, errno.EDQUOT):
        what, todo = "the disk is full (no space left on device)", "free some space or choose another --out"
    elif exc.errno in (errno.EACCES, errno.EPERM):
        what, todo = "permission denied", "choose a folder you may write to (--out) or change its permissions"
    elif exc.errno == errno.EROFS:
        what, todo = "the file system is read-only", "choose a folder on a writable disk (--out)"
    else:
        what, todo = exc.strerror or str(exc), "check the disk and the folder"
    return (f"cannot write or read {where}: {what}; nothing partial was left behind and an earlier run folder "
            f"there is unchanged — {todo}")


COMMANDS = {"demo": _cmd_demo, "fit": lambda a: _run_fit(a, a.counts, a.out), "solve": _cmd_solve,
            "simulate": _cmd_simulate, "audit": _cmd_audit, "batch": _cmd_batch,
            "weigh": _cmd_weigh}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``tallyfit`` console script; returns the exit code."""
    args = _parser().parse_args(argv)
    from tallyfit.infer.errors import InputError
    from tallyfit.runfolder.reader import RunFolderError

    try:
        return COMMANDS[args.command](args)
    except (InputError, RunFolderError) as exc:  # RunFolderError: a damaged run folder, named with its file
        print(f"tallyfit: error: {exc}", file=sys.stderr)
        return EXIT_INPUT
    except OSError as exc:  # the disk or the folder, not tallyfit: say which file and why
        print(f"tallyfit: error: {_os_error_message(exc)}", file=sys.stderr)
        return EXIT_INPUT
    except KeyboardInterrupt:
        print("tallyfit: interrupted; nothing was written (any earlier run folder is unchanged)", file=sys.stderr)
        return EXIT_INTERRUPT
    except Exception as exc:  # a fault in tallyfit itself: no traceback for the user, a note to report it
        print(f"tallyfit: internal error ({type(exc).__name__}: {exc}). This is a fault in tallyfit, not in "
              "your data; please report it with the command you ran (set TALLYFIT_DEBUG=1 to see the "
              "traceback)", file=sys.stderr)
        if os.environ.get("TALLYFIT_DEBUG"):
            raise
        return EXIT_INTERNAL


if __name__ == "__main__":
    sys.exit(main())
