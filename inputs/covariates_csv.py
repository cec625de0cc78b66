"""Reading a covariate table: time, optional site, and one numeric column per covariate.

Strict like the counts reader: every cell must be a finite number (no blanks: a covariate
the model uses must be known for every interval it acts on), a (site, time) appears once,
and anything else stops with the file, line and column named.
"""
from __future__ import annotations

import csv
import io
import math
import os
from pathlib import Path

import numpy as np

from tallyfit.infer.covariates import Covariates
from tallyfit.infer.errors import InputError

__all__ = ["load_covariates"]


def _number(text: str, source: str, line: int, column: str) -> float:
    try:
        value = float(text.strip())
    except ValueError:
        raise InputError(f"{text.strip()!r} is not a number", source=source, row=line, column=column,
                         hint="write every covariate value as a plain number (a 0/1 for yes/no)") from None
    if not math.isfinite(value):
        raise InputError(f"{text.strip()!r} is not a finite number", source=source, row=line, column=column)
    return value


def load_covariates(path: str | os.PathLike[str]) -> Covariates:
    """Read and check a covariate CSV file.

    Args:
        path: the file (UTF-8, comma-separated, header first: ``time``, optional ``site``,
            then one column per covariate).

    Returns:
        Covariates.

    Raises:
        InputError: the file cannot be read; no time column or no covariate column; a
            duplicate or unnamed column; a ragged line; a blank, non-numeric or
            non-finite value; a (site, time) given twice. ``row`` is the line number in
            the file (the header is line 1).
    """
    source = str(path)
    try:
        text = Path(path).read_bytes().decode("utf-8-sig")
    except OSError as exc:
        raise InputError(f"cannot read the covariate file ({exc.strerror})", source=source,
                         hint="check the path given in [covariates] file or --covariates") from None
    except UnicodeDecodeError:
        raise InputError("the covariate file is not UTF-8 text", source=source,
                         hint="save it as 'CSV UTF-8'") from None
    reader = csv.reader(io.StringIO(text))
    try:
        header = [h.strip() for h in next(reader)]
    except StopIteration:
        raise InputError("the covariate file is empty", source=source) from None
    if "time" not in header:
        raise InputError("the covariate file has no 'time' column", source=source, row=1,
                         hint="the first line must be a header such as 'time,site,rainfall'")
    if len(set(header)) != len(header) or "" in header:
        raise InputError("every column needs a name of its own", source=source, row=1)
    names = tuple(h for h in header if h not in ("time", "site"))
    if not names:
        raise InputError("the covariate file has no covariate column", source=source, row=1)
    i_time, i_site = header.index("time"), (header.index("site") if "site" in header else None)
    idx = [header.index(n) for n in names]
    values: dict[tuple[str | None, float], np.ndarray] = {}
    for fields in reader:
        line = reader.line_num
        if not any(f.strip() for f in fields):
            continue
        if len(fields) != len(header):
            raise InputError(f"this line has {len(fields)} fields but the header has {len(header)}",
                             source=source, row=line)
        site = fields[i_site].strip() if i_site is not None else None
        if site == "":
            raise InputError("the site is blank", source=source, row=line, column="site")
        time = _number(fields[i_time], source, line, "time")
        key = (site, time)
        if key in values:
            raise InputError(f"time {time:g}{'' if site is None else f' of site {site!r}'} appears twice",
                             source=source, row=line, column="time")
        row = []
        for j, name in zip(idx, names):
            if not fields[j].strip():
                raise InputError("the value is blank", source=source, row=line, column=name,
                                 hint="give every covariate a value at every time it is used")
            row.append(_number(fields[j], source, line, name))
        values[key] = np.asarray(row)
    if not values:
        raise InputError("the covariate file has a header but no data rows", source=source)
    return Covariates(names=names, values=values, source=source)
