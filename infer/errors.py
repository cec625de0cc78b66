"""Errors raised by tallyfit's data handling and inference.

Every error names what the user gave (file, row, column, setting) and what to do,
so the command line can print it without a traceback and exit with status 2.
"""
from __future__ import annotations


class InputError(ValueError):
    """Bad input from the user: a counts file, a settings file or an argument.

    Attributes:
        source: file name or argument the problem is in (or None).
        row: 1-based data row (not counting the header), or None.
        column: column name, or None.
        hint: what the user can do about it.
    """

    def __init__(self, message: str, *, source: str | None = None, row: int | None = None,
                 column: str | None = None, hint: str | None = None) -> None:
        self.source = source
        self.row = row
        self.column = column
        self.hint = hint
        where = []
        if source is not None:
            where.append(str(source))
        if row is not None:
            where.append(f"row {row}")
        if column is not None:
            where.append(f"column '{column}'")
        text = (": ".join([", ".join(where), message]) if where else message)
        if hint:
            text += f" — {hint}"
        super().__init__(text)


class CapTooSmallError(InputError):
    """A count (or a hidden size the likelihood needs) exceeds the size cap N."""


class CountsFileError(InputError):
    """A malformed counts table (a CSV file, a DataFrame or arrays), located precisely.

    The message names the place twice over so nobody has to guess the convention:
    ``counts.csv, line 5 (data row 4), column 'count': ...`` — *line* is the line
    number in the file as an editor shows it (the header is line 1 when the file has
    no leading blank lines), *data row* counts data rows from 1 without the header
    (InputError's ``row``). For a DataFrame only ``row`` is given (its 1-based
    position); for arrays a ``location`` such as ``counts[3, 1]``.

    Attributes:
        line: line number in the file (1-based, header included), or None.
        header: True when the problem is in the header line.
        location: free-text place for sources without lines (arrays), or None.
        (and source, row, column, hint from InputError)
    """

    def __init__(self, message: str, *, source: str | None = None, line: int | None = None,
                 row: int | None = None, column: str | None = None, hint: str | None = None,
                 header: bool = False, location: str | None = None) -> None:
        super().__init__(message, source=source, row=row, column=column, hint=hint)
        self.line = line
        self.header = header
        self.location = location
        where = []
        if source is not None:
            where.append(str(source))
        if location is not None:
            where.append(location)
        elif line is not None:
            if header:
                where.append(f"line {line} (header)")
            elif row is not None:
                where.append(f"line {line} (data row {row})")
            else:
                where.append(f"line {line}")
        elif row is not None:
            where.append(f"row {row}")
        if column is not None:
            where.append(f"column '{column}'")
        text = (": ".join([", ".join(where), message]) if where else message)
        if hint:
            text += f" — {hint}"
        self.args = (text,)


class CountValueError(InputError):
    """Times or counts handed to the likelihood are not usable (not sorted, negative,
    not whole numbers, shapes that do not match).

    Attributes:
        site: index of the series (0-based), or None.
        time: the offending survey time, or None.
        (and source, row, column, hint from InputError)
    """

    def __init__(self, message: str, *, site: int | None = None, time: float | None = None,
                 hint: str | None = None) -> None:
        self.site = site
        self.time = time
        super().__init__(message, hint=hint)


class ReplicateMismatchError(CountValueError):
    """Exact counts (no detection model) but replicate surveys at one time disagree."""


class LikelihoodUnderflowError(InputError):
    """A transition that is possible has a probability too small for double precision
    (or too small to bound at the requested tolerance), even on the whole size range.

    Attributes:
        site: index of the series, or None.
        time: end time of the transition, or None.
        start, end: the counts (or None with a detection model).
    """

    def __init__(self, message: str, *, site: int | None = None, time: float | None = None,
                 start: int | None = None, end: int | None = None) -> None:
        self.site = site
        self.time = time
        self.start = start
        self.end = end
        super().__init__(message, hint="check the rates (a far-off parameter value) or the counts "
                                       "(a typing error); a detection model absorbs counting error")


class SamplerError(RuntimeError):
    """The sampler failed for a reason that is not in the user's data or settings: an internal
    error (the command line exits with status 3), reported in plain words, never a traceback.

    Attributes:
        cause: the underlying error's type and the first line of its message.
        hint: what may get the run through meanwhile.
    """

    def __init__(self, message: str, *, cause: str = "", hint: str | None = None) -> None:
        self.cause = cause
        self.hint = hint
        super().__init__(message + (f" — {hint}" if hint else ""))
