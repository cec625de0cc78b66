"""Reading a counts file: bytes to checked CountData, with every problem located.

The reader is strict on purpose (DESIGN §3): a file that is not CSV text (a workbook,
a compressed file, UTF-16, binary data) is named as such; the text is split into records
by the standard library's ``csv`` module, which knows the line it is on, so a ragged
line, a broken quotation mark or a quoted value running over a line break is reported at
its line; the cells then go through the one table checker
(:mod:`tallyfit.infer.count_table`). Line numbers are those an editor shows (the header is
line 1 when the file has no leading blank lines); the *data row* counts data rows from 1
without the header, blank lines skipped.
"""
from __future__ import annotations

import csv
import hashlib
import os
import re
import unicodedata
from pathlib import Path

import pandas as pd

from tallyfit.chain.memory import available_bytes
from tallyfit.infer.count_table import Locator, frame_cells, gib, table_counts
from tallyfit.infer.counts import CountData
from tallyfit.infer.errors import CountsFileError, InputError

__all__ = ["load_counts"]

# Rough bytes of memory the reader needs per byte of file (Python string objects per cell,
# the record lists, the checked copies). Deliberately generous.
_READ_BYTES_PER_FILE_BYTE = 40
_LINE_BREAK = re.compile(r"\r\n|\r|\n")
# Control characters other than tab, line feed and carriage return, and the Unicode
# line/paragraph separators: never part of a counts table; a sign of binary data.
_CONTROL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f\x7f-\x9f\u2028\u2029]")
# Leading bytes of files that are not CSV text, with what to tell the user.
_SIGNATURES: tuple[tuple[bytes, str, str], ...] = (
    (b"PK\x03\x04", "looks like a spreadsheet workbook or zip archive, not CSV text",
     "export the sheet as CSV (comma-separated, UTF-8) and load that file"),
    (b"\xd0\xcf\x11\xe0", "looks like an old Excel workbook (.xls), not CSV text",
     "export the sheet as CSV (comma-separated, UTF-8) and load that file"),
    (b"\x1f\x8b", "is gzip-compressed", "decompress it first (gunzip)"),
    (b"\xff\xfe", "is UTF-16 text", "save it as UTF-8 ('CSV UTF-8' in a spreadsheet)"),
    (b"\xfe\xff", "is UTF-16 text", "save it as UTF-8 ('CSV UTF-8' in a spreadsheet)"),
    (b"%PDF", "is a PDF document, not CSV text", "export the table as CSV"),
)
_UTF8_HINT = "save the file as UTF-8 text ('CSV UTF-8' in a spreadsheet)"


def _line_of_offset(raw: bytes, pos: int) -> int:
    """1-based line number of byte `pos` (\\n, \\r\\n and \\r all end a line)."""
    head = raw[:pos]
    return head.count(b"\n") + head.count(b"\r") - head.count(b"\r\n") + 1


def _read_bytes(path: str | os.PathLike[str]) -> bytes:
    name = str(path)
    p = Path(path)
    try:
        if p.is_dir():
            raise InputError("is a folder, not a counts file", source=name,
                             hint="give the path of the CSV file")
        size = p.stat().st_size
    except OSError as exc:
        if isinstance(exc, FileNotFoundError):
            raise InputError("file not found", source=name,
                             hint="check the path (relative paths start from the "
                                  "current folder)") from None
        raise InputError(f"cannot read the file ({exc.strerror or exc})", source=name,
                         hint="check the path and the file's permissions") from None
    available = available_bytes()
    if size * _READ_BYTES_PER_FILE_BYTE > available:
        raise InputError(
            f"file is too large for the machine: reading {gib(size)} of CSV needs about "
            f"{gib(size * _READ_BYTES_PER_FILE_BYTE)} of memory, {gib(available)} is free",
            source=name, hint="split the file, e.g. one file per site (tallyfit batch)")
    try:
        return p.read_bytes()
    except OSError as exc:
        raise InputError(f"cannot read the file ({exc.strerror or exc})", source=name,
                         hint="check the path and the file's permissions") from None


def _decode(raw: bytes, name: str) -> str:
    """Bytes to text, refusing binary data with a located message."""
    for magic, what, hint in _SIGNATURES:
        if raw.startswith(magic):
            raise CountsFileError(f"this file {what}", source=name, hint=hint)
    nul = raw.find(b"\x00")
    if nul >= 0:
        raise CountsFileError("contains a NUL byte: this is binary data, not CSV text",
                              source=name, line=_line_of_offset(raw, nul),
                              hint="check that this is the counts file; " + _UTF8_HINT)
    try:
        text = raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        bad = raw[exc.start:exc.start + 1]
        raise CountsFileError(
            f"byte 0x{bad.hex().upper()} is not UTF-8 text (binary data or another "
            "encoding)", source=name, line=_line_of_offset(raw, exc.start),
            hint=_UTF8_HINT) from None
    m = _CONTROL.search(text)
    if m is not None:
        line = len(_LINE_BREAK.findall(text[:m.start()])) + 1
        code = f"U+{ord(m.group()):04X}"
        raise CountsFileError(
            f"contains the control character {code} ({unicodedata.name(m.group(), 'control')})"
            ": the file is binary or corrupt", source=name, line=line,
            hint="remove the character, or check that this is the counts file")
    return text

def _file_cells(raw: bytes, name: str) -> tuple[list[list[str]], list[str], Locator]:
    """File bytes to header names and records of cells (each with its line), by the csv module."""
    text = _decode(raw, name)
    kept = [(i + 1, line) for i, line in enumerate(_LINE_BREAK.split(text)) if line.strip()]
    if not kept:
        raise CountsFileError("the file is empty", source=name,
                              hint="a counts file needs a header line 'time,count' and one line per survey")
    line_numbers = [n for n, _ in kept]
    lines = [line for _, line in kept]
    # strict: a quote must be closed and followed by a comma; the reader pulls in the next
    # line when a quoted value runs on, which its line counter shows
    reader = csv.reader(iter(lines), delimiter=",", quotechar='"', doublequote=True,
                        skipinitialspace=True, strict=True)
    records: list[list[str]] = []
    while True:
        k = reader.line_num  # index of the line the next record starts on
        try:
            rec = next(reader)
        except StopIteration:
            break
        except csv.Error:
            raise CountsFileError("a quotation mark on this line is not closed, or is followed by text",
                                  source=name, line=line_numbers[k], row=k if k > 0 else None, header=(k == 0),
                                  hint='put the whole value in double quotes, e.g. "North, Bay"; write a quote '
                                       'inside a quoted value as ""') from None
        if reader.line_num - k > 1:
            raise CountsFileError("a quoted value runs over more than one line", source=name,
                                  line=line_numbers[k], row=k if k > 0 else None, header=(k == 0),
                                  hint="close the quotation mark on this line")
        if records and len(rec) > len(records[0]):
            raise CountsFileError(f"this line has {len(rec)} fields but the header has {len(records[0])}",
                                  source=name, line=line_numbers[k], row=k, hint=(
                                      "remove the extra commas (a trailing comma?), or put values that contain "
                                      "commas in double quotes"))
        records.append(rec)
    names = [c.strip() for c in records[0]]
    locator = Locator(name, kind="file", lines=line_numbers[1:], header_line=line_numbers[0])
    return records[1:], names, locator


def load_counts(source: str | os.PathLike[str] | pd.DataFrame, *, site_column: str = "site",
                max_count: int | None = None) -> CountData:
    """Read and check a counts table.

    Args:
        source: path of a CSV file (UTF-8, comma-separated, header line first; a BOM,
            Windows or old Mac line endings, blank lines and spaces around values are
            fine), or a pandas DataFrame with the same columns (NaN/None = blank).
        site_column: name of the column that holds the site. With the default "site"
            the column is optional (absent: one site called "site"); another name must
            exist in the table.
        max_count: optional upper limit; a larger count is refused.

    Returns:
        CountData with one SiteSeries per site, times sorted, replicates side by side.

    Raises:
        CountsFileError (an InputError): anything malformed — empty file or header
            only; missing, unknown, duplicate or unnamed columns; ragged lines; broken
            quotes; binary data (NUL or control bytes, non-UTF-8 text, workbooks);
            blank or non-numeric or non-finite times; non-numeric, NaN/inf, negative,
            fractional counts, counts above `max_count` or above what float64 holds
            exactly ("too large for the machine"); blank site or survey ids; a repeated
            (site, time) without a survey column or a repeated (site, time, survey); a
            site with counts at fewer than two times; data needing more memory than is
            free. Messages name the file, line (and data row), column and a fix.
        InputError: the file cannot be opened, or bad `site_column` / `max_count`.
    """
    if isinstance(source, pd.DataFrame):
        name = "<DataFrame>"
        records, names = frame_cells(source, name)
        return table_counts(names, records, Locator(name, kind="frame"), site_column=site_column,
                            max_count=max_count, sha256=None)
    if not isinstance(source, (str, os.PathLike)):
        raise InputError(f"source must be a file path or a pandas DataFrame, not "
                         f"{type(source).__name__}", source="source")
    name = str(source)
    raw = _read_bytes(source)
    digest = hashlib.sha256(raw).hexdigest()
    records_f, names, locator = _file_cells(raw, name)
    return table_counts(names, records_f, locator, site_column=site_column, max_count=max_count,
                        sha256=digest)
