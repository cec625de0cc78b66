"""Tests of the counts reader and the count data model: reading and checking counts tables.

The malformed inputs are written to files under pytest's tmp_path; each asserts the
exception type, the file name, the line (and data row), the column and a fragment of
the message. Line numbers are file lines as an editor shows them (header = line 1).
Expected values are worked out by hand from the inputs (common practice).
"""
from __future__ import annotations

import hashlib
import string
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import tallyfit.infer.count_table as table_mod
import tallyfit.inputs.counts_csv as csv_mod
from tallyfit.infer.counts import DEFAULT_SITE, MAX_EXACT_COUNT, CountData, SiteSeries, Transitions, iter_transitions
from tallyfit.inputs.counts_csv import load_counts
from tallyfit.runfolder.store import sha256_file
from tallyfit.infer.errors import CountsFileError, InputError

# --------------------------------------------------------------------------- malformed

# (id, file bytes, load_counts kwargs, expected line or None, expected data row or
#  None, expected column or None, message fragment)
MALFORMED: list[tuple[str, bytes, dict, int | None, int | None, str | None, str]] = [
    ("empty-file", b"", {}, None, None, None, "the file is empty"),
    ("blank-lines-only", b"\n  \n\t\n", {}, None, None, None, "the file is empty"),
    ("header-only", b"time,count\n", {}, 1, None, None, "no data rows"),
    ("header-then-blank-lines", b"time,count\n\n \n", {}, 1, None, None, "no data rows"),
    ("header-after-blank-lines", b"\n\ntime,count\n", {}, 3, None, None, "no data rows"),
    ("missing-count-column", b"time\n2001\n2002\n", {}, 1, None, None,
     "missing required column 'count' (found 'time')"),
    ("missing-time-column", b"site,count\nA,1\nA,2\n", {}, 1, None, None,
     "missing required column 'time' (found 'site', 'count')"),
    ("no-header-line", b"2001,3\n2002,4\n", {}, 1, None, None,
     "missing required columns 'time', 'count'"),
    ("wrong-case-header", b"Time,count\n2001,3\n2002,4\n", {}, 1, None, None,
     "rename 'Time' to 'time'"),
    ("semicolon-separated", b"time;count\n2001;3\n2002;4\n", {}, 1, None, None,
     "comma-separated"),
    ("unknown-column", b"time,count,weather\n2001,3,rain\n2002,4,sun\n", {}, 1, None,
     "weather", "allowed columns are time, count, site, survey"),
    ("duplicate-column", b"time,count,count\n2001,3,3\n2002,4,4\n", {}, 1, None, "count",
     "appears twice"),
    ("unnamed-column", b"time,count,\n2001,3,\n2002,4,\n", {}, 1, None, None,
     "column 3 of the header has no name"),
    ("site-column-not-found", b"time,count\n2001,3\n2002,4\n", {"site_column": "plot"}, 1,
     None, None, "site column 'plot' not found"),
    ("non-numeric-count", b"time,count\n2001,3\n2002,many\n", {}, 3, 2, "count",
     "count 'many' is not a number"),
    ("non-numeric-time", b"time,count\nspring,3\n2002,4\n", {}, 2, 1, "time",
     "time 'spring' is not a number"),
    ("date-as-time", b"time,count\n2001-05-01,3\n2002-05-01,4\n", {}, 2, 1, "time",
     "dates must be converted"),
    ("blank-time", b"time,count\n2001,3\n,4\n2003,5\n", {}, 3, 2, "time", "time is blank"),
    ("nan-count", b"time,count\n2001,3\n2002,nan\n2003,5\n", {}, 3, 2, "count",
     "count 'nan' is not a number"),
    ("NA-count", b"time,count\n2001,NA\n2002,4\n2003,5\n", {}, 2, 1, "count",
     "leave the cell empty"),
    ("inf-count", b"time,count\n2001,3\n2002,4\n2003,inf\n", {}, 4, 3, "count",
     "is not finite"),
    ("inf-time", b"time,count\n2001,3\n-Infinity,4\n", {}, 3, 2, "time", "is not finite"),
    ("huge-time", b"time,count\n2001,3\n1e400,4\n", {}, 3, 2, "time", "too large"),
    ("negative-count", b"time,count\n2001,3\n2002,-1\n", {}, 3, 2, "count",
     "count '-1' is negative"),
    ("fractional-count", b"time,count\n2001,3.5\n2002,4\n", {}, 2, 1, "count",
     "count '3.5' is not a whole number"),
    ("tiny-fraction-count", b"time,count\n2001,3\n2002,4.0000000000000000001\n", {}, 3, 2,
     "count", "not a whole number"),
    ("exponent-fraction-count", b"time,count\n2001,3\n2002,1e-3\n", {}, 3, 2, "count",
     "not a whole number"),
    ("count-above-max-count", b"time,count\n2001,3\n2002,250\n", {"max_count": 100}, 3, 2,
     "count", "above max_count=100"),
    ("count-beyond-int64", b"time,count\n2001,3\n2002,99999999999999999999\n", {}, 3, 2,
     "count", "too large for the machine"),
    ("count-beyond-float-exact", b"time,count\n2001,3\n2002,9007199254740993\n", {}, 3, 2,
     "count", "too large for the machine"),
    ("count-huge-exponent", b"time,count\n2001,1e30\n2002,3\n", {}, 2, 1, "count",
     "too large for the machine"),
    ("count-with-inner-space", b"time,count\n2001,1 000\n2002,3\n", {}, 2, 1, "count",
     "remove the spaces"),
    ("quoted-decimal-comma", b'time,count\n2001,"3,5"\n2002,3\n', {}, 2, 1, "count",
     "not a number"),
    ("true-as-count", b"time,count\n2001,true\n2002,3\n", {}, 2, 1, "count",
     "not a number"),
    ("duplicate-time-no-survey", b"time,count\n2001,3\n2002,4\n2001,5\n", {}, 4, 3, "time",
     "already has a row at time 2001 (line 2)"),
    ("duplicate-time-blank-count", b"time,count\n2001,3\n2002,4\n2002,\n", {}, 4, 3, "time",
     "already has a row at time 2002"),
    ("duplicate-time-equal-values", b"time,count\n2001,3\n2002,4\n2002.0,4\n", {}, 4, 3,
     "time", "already has a row at time 2002"),
    ("duplicate-site-time", b"site,time,count\nA,1,3\nB,1,4\nA,2,5\nB,2,6\nB,1,7\n", {}, 6,
     5, "time", "site 'B' already has a row at time 1 (line 3)"),
    ("duplicate-site-time-survey",
     b"site,time,survey,count\nA,1,a,3\nA,1,b,4\nA,2,a,5\nA,1,a,6\n", {}, 5, 4, "survey",
     "survey 'a' at time 1 site 'A' appears twice (also line 2)"),
    ("site-single-time", b"site,time,count\nA,1,3\nA,2,4\nB,1,5\n", {}, 4, 3, "count",
     "site 'B' has counts at only one time (1)"),
    ("site-one-count-one-blank", b"site,time,count\nA,1,3\nB,1,\nA,2,4\nB,2,6\n", {}, 5, 4,
     "count", "site 'B' has counts at only one time (2)"),
    ("single-site-all-blank", b"time,count\n2001,\n2002,\n", {}, 2, 1, "count",
     "has no counts"),
    ("single-row", b"time,count\n2001,4\n", {}, 2, 1, "count", "only one time"),
    ("blank-site", b"site,time,count\nA,1,3\n,2,4\nA,2,5\n", {}, 3, 2, "site",
     "site is blank"),
    ("blank-survey", b"time,survey,count\n1,a,3\n1, ,4\n2,a,5\n", {}, 3, 2, "survey",
     "survey is blank"),
    ("ragged-extra-field", b"time,count\n2001,3\n2002,4,5\n2003,6\n", {}, 3, 2, None,
     "this line has 3 fields but the header has 2"),
    ("ragged-trailing-comma", b"time,count\n2001,3\n2002,4\n2003,6,\n", {}, 4, 3, None,
     "this line has 3 fields but the header has 2"),
    ("unquoted-decimal-comma", b"time,count\n2001,3,5\n2002,4\n", {}, 2, 1, None,
     "has 3 fields"),
    ("short-row", b"time,count\n2001,3\n2002\n2003,5\n", {}, 3, 2, "count",
     "this line has 1 field but the header has 2"),
    ("short-row-survey", b"time,survey,count\n2001,a,3\n2002,a\n", {}, 3, 2, "count",
     "has 2 fields but the header has 3"),
    ("unclosed-quote", b'site,time,count\nA,1,3\n"B,2,4\nA,3,5\n', {}, 3, 2, None,
     "quotation mark"),
    ("text-after-quote", b'site,time,count\nA,1,3\n"B"x,2,4\n', {}, 3, 2, None,
     "quotation mark"),
    ("quote-spans-lines", b'site,time,count\nA,1,3\n"B\n",2,4\nA,3,5\n', {}, 3, 2, None,
     "runs over more than one line"),
    ("nul-byte", b"time,count\n2001,3\n2002,\x004\n", {}, 3, None, None, "NUL byte"),
    ("latin1-byte", "site,time,count\nA,1,3\nA,2,4\nS\u00e4vsj\u00f6,1,5\n".encode("latin-1"),
     {}, 4, None, None, "byte 0xE4 is not UTF-8"),
    ("random-binary", bytes(range(128, 256)) * 4, {}, 1, None, None, "not UTF-8"),
    ("utf16-file", "time,count\n2001,3\n2002,4\n".encode("utf-16"), {}, None, None, None,
     "UTF-16"),
    ("xlsx-workbook", b"PK\x03\x04\x14\x00\x06\x00" + b"\x00" * 20, {}, None, None, None,
     "spreadsheet workbook"),
    ("gzip-file", b"\x1f\x8b\x08\x00" + b"\x00" * 10, {}, None, None, None, "gzip"),
    ("control-character", b"time,count\n2001,3\n2002,\x014\n", {}, 3, None, None,
     "control character U+0001"),
    ("times-too-wide", b"time,count\n-1e308,3\n1e308,4\n", {}, 3, 2, "time",
     "too wide to hold"),
    # Line numbering survives blank lines, Windows and old Mac line endings, and a BOM.
    ("error-after-blank-lines", b"time,count\n2001,3\n\n\n2002,-1\n", {}, 5, 2, "count",
     "negative"),
    ("error-with-crlf", b"time,count\r\n2001,3\r\n2002,4\r\n2003,x\r\n", {}, 4, 3, "count",
     "not a number"),
    ("error-with-cr-only", b"time,count\r2001,3\r2002,4\r2003,x\r", {}, 4, 3, "count",
     "not a number"),
    ("error-with-bom", b"\xef\xbb\xbftime,count\n2001,3\n2002,3.25\n", {}, 3, 2, "count",
     "not a whole number"),
    ("ragged-after-blank-lines", b"time,count\n\n2001,3\n\n2002,4,4\n", {}, 5, 2, None,
     "has 3 fields"),
    ("nul-with-crlf", b"time,count\r\n2001,3\r\n2002,4\r\n\x00\r\n", {}, 4, None, None,
     "NUL byte"),
]


def test_at_least_thirty_malformed_inputs() -> None:
    assert len(MALFORMED) >= 30
    assert len({case[0] for case in MALFORMED}) == len(MALFORMED)
    assert len({case[1] + repr(case[2]).encode() for case in MALFORMED}) == len(MALFORMED)


@pytest.mark.parametrize(("content", "kwargs", "line", "row", "column", "fragment"),
                         [case[1:] for case in MALFORMED], ids=[case[0] for case in MALFORMED])
def test_malformed_file(tmp_path: Path, content: bytes, kwargs: dict, line: int | None,
                        row: int | None, column: str | None, fragment: str) -> None:
    path = tmp_path / "survey_counts.csv"
    path.write_bytes(content)
    with pytest.raises(CountsFileError) as info:
        load_counts(path, **kwargs)
    err = info.value
    text = str(err)
    assert isinstance(err, InputError) and isinstance(err, ValueError)
    assert "survey_counts.csv" in text
    assert err.source == str(path)
    assert fragment in text
    assert err.hint, "every message says what to do"
    assert err.line == line
    assert err.row == row
    assert err.column == column
    if line is None:
        assert "line " not in text.split(": ", 1)[0]
    elif err.header:
        assert f"line {line} (header)" in text
    elif row is not None:
        assert f"line {line} (data row {row})" in text
    else:
        assert f"line {line}" in text
    if column is not None:
        assert f"column '{column}'" in text


def test_missing_file_and_folder(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="file not found"):
        load_counts(tmp_path / "nope.csv")
    with pytest.raises(InputError, match="is a folder"):
        load_counts(tmp_path)
    with pytest.raises(InputError, match="file path or a pandas DataFrame"):
        load_counts(42)  # type: ignore[arg-type]


def test_bad_arguments(tmp_path: Path) -> None:
    path = tmp_path / "c.csv"
    path.write_text("time,count\n1,2\n2,3\n")
    for bad in (-1, 2.5, True, "10"):
        with pytest.raises(InputError, match="max_count"):
            load_counts(path, max_count=bad)  # type: ignore[arg-type]
    for bad in ("", "time", "survey"):
        with pytest.raises(InputError, match="site_column"):
            load_counts(path, site_column=bad)


def test_file_too_large_for_memory(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "big.csv"
    path.write_text("time,count\n" + "".join(f"{t},{t % 7}\n" for t in range(2000)))
    monkeypatch.setattr(csv_mod, "available_bytes", lambda: 100_000)
    with pytest.raises(InputError, match="too large for the machine") as info:
        load_counts(path)
    assert "big.csv" in str(info.value)


def test_arrays_too_large_for_memory(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    # 300 replicate surveys at one time and 300 single surveys make a 301 x 300 array
    # per site: 90,300 cells * 24 bytes, more than half of the 2 MB "free" here.
    lines = ["time,survey,count"] + [f"0,s{j},1" for j in range(300)]
    lines += [f"{t},s0,2" for t in range(1, 301)]
    path = tmp_path / "wide.csv"
    path.write_text("\n".join(lines) + "\n")
    # The file itself passes the read check (40 bytes per byte of ~6 kB < 4 MB)...
    monkeypatch.setattr(table_mod, "available_bytes", lambda: 4_000_000)
    with pytest.raises(CountsFileError, match="data too large for the machine") as info:
        load_counts(path)
    assert info.value.column == "survey"
    assert info.value.line == 301  # the 300th replicate at time 0
    monkeypatch.setattr(table_mod, "available_bytes", lambda: 10 ** 12)
    assert load_counts(path).n_replicates == 300


# --------------------------------------------------------------------------- valid files

MULTI = (
    "site,time,survey,count\n"
    "Lark Moor,2003,1,12\n"
    "Lark Moor,2001,1,10\n"
    "Lark Moor,2001,2,11\n"
    "Owl Bank,2001,1,4\n"
    "Lark Moor,2002,1,\n"
    "Owl Bank,2004.5,1,7\n"
    "Owl Bank,2002,1,5\n"
    "Owl Bank,2002,2,6\n"
    "Lark Moor,2004,1,15\n"
)


def _write(tmp_path: Path, text: str | bytes, name: str = "counts.csv") -> Path:
    path = tmp_path / name
    path.write_bytes(text if isinstance(text, bytes) else text.encode("utf-8"))
    return path


def test_several_sites_replicates_gaps_unsorted(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, MULTI))
    assert d.sites == ["Lark Moor", "Owl Bank"]
    assert d.n_sites == 2 and len(d) == 2
    assert d.n_replicates == 2 and d.has_replicates and d.has_survey_column
    assert d.max_count == 15
    assert d.n_counts == 8  # 9 rows, one blank count
    lark, owl = d.series
    assert isinstance(lark, SiteSeries) and lark.site == "Lark Moor"
    np.testing.assert_array_equal(lark.times, [2001, 2002, 2003, 2004])
    np.testing.assert_array_equal(lark.counts, [[10, 11], [np.nan, np.nan], [12, np.nan],
                                                [15, np.nan]])
    # line numbers of each cell; 0 where no row exists
    np.testing.assert_array_equal(lark.rows, [[3, 4], [6, 0], [2, 0], [10, 0]])
    assert lark.surveys.tolist() == [["1", "2"], ["1", None], ["1", None], ["1", None]]
    np.testing.assert_array_equal(owl.times, [2001, 2002, 2004.5])
    np.testing.assert_array_equal(owl.counts, [[4, np.nan], [5, 6], [7, np.nan]])
    np.testing.assert_array_equal(owl.rows, [[5, 0], [8, 9], [7, 0]])
    assert d.site("Owl Bank") is owl
    with pytest.raises(KeyError, match="Lark Moor"):
        d.site("Nowhere")
    assert d.source.endswith("counts.csv")


def test_arrays_are_read_only(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, MULTI))
    s = d.series[0]
    for arr in (s.times, s.counts, s.rows):
        with pytest.raises(ValueError):
            arr[0] = 0
    d.sites.append("x")  # a copy: the data do not change
    assert d.sites == ["Lark Moor", "Owl Bank"]


def test_default_single_site_and_kinds_of_whole_number(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, "time,count\n3,+4\n1,007\n2,3.0\n4,3e2\n5,0.0500e2\n"
                                     "6,0\n7,-0\n"))
    assert d.sites == [DEFAULT_SITE]
    assert not d.has_replicates and not d.has_survey_column and d.n_replicates == 1
    s = d.series[0]
    np.testing.assert_array_equal(s.times, [1, 2, 3, 4, 5, 6, 7])
    np.testing.assert_array_equal(s.counts[:, 0], [7, 3, 4, 300, 5, 0, 0])
    assert s.surveys.tolist() == [[None]] * 7


def test_largest_exact_count_and_max_count_boundary(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, f"time,count\n1,{MAX_EXACT_COUNT}\n2,5\n"))
    assert d.max_count == 2 ** 53
    d = load_counts(_write(tmp_path, "time,count\n1,100\n2,5\n"), max_count=100)
    assert d.max_count == 100


PLAIN = "site,time,count\nA,1,3\nA,2,\nA,3.5,4\nB,1,0\nB,2,2\n"
VARIANTS = {
    "crlf": PLAIN.replace("\n", "\r\n"),
    "cr-only": PLAIN.replace("\n", "\r"),
    "bom": "\ufeff" + PLAIN,
    "bom-crlf": "\ufeff" + PLAIN.replace("\n", "\r\n"),
    "whitespace": "  site , time ,count\t\nA , 1,  3 \n A,2 , \nA,3.5,4\n\nB,\t1,0\nB , 2 , 2\n\n\n",
    "quoted": '"site","time","count"\n"A","1","3"\nA,2,""\n"A", "3.5",4\nB,1,0\nB,2,2\n',
    "no-final-newline": PLAIN.rstrip("\n"),
    "blank-lines": "\n" + PLAIN.replace("\n", "\n\n"),
}


@pytest.mark.parametrize("text", list(VARIANTS.values()), ids=list(VARIANTS))
def test_formatting_variants_read_the_same(tmp_path: Path, text: str) -> None:
    ref = load_counts(_write(tmp_path, PLAIN, "plain.csv"))
    d = load_counts(_write(tmp_path, text))
    assert d.sites == ref.sites == ["A", "B"]
    for a, b in zip(d.series, ref.series):
        np.testing.assert_array_equal(a.times, b.times)
        np.testing.assert_array_equal(a.counts, b.counts)
    pd.testing.assert_frame_equal(d.table.reset_index(drop=True),
                                  ref.table.reset_index(drop=True))


def test_rows_are_file_lines_with_blank_lines(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, VARIANTS["blank-lines"]))
    # header on line 2, data on lines 4, 6, 8, 10, 12
    assert d.table.index.tolist() == [4, 6, 8, 10, 12]
    np.testing.assert_array_equal(d.series[0].rows[:, 0], [4, 6, 8])


def test_quoted_site_with_comma(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, 'site,time,count\n"North, Bay",1,3\n"North, Bay",2,5\n'))
    assert d.sites == ["North, Bay"]


def test_custom_site_column(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, "plot,time,count\np1,1,3\np1,2,4\np2,1,1\np2,2,1\n"),
                    site_column="plot")
    assert d.sites == ["p1", "p2"]
    assert list(d.table.columns) == ["site", "time", "count"]
    with pytest.raises(CountsFileError, match="unknown column 'plot'"):
        load_counts(_write(tmp_path, "plot,time,count\np1,1,3\np1,2,4\n"))


def test_table_is_data_as_read(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, MULTI))
    t = d.table
    assert t.index.name == "line"
    assert t.index.tolist() == list(range(2, 11))
    assert list(t.columns) == ["site", "time", "survey", "count"]
    assert t["site"].tolist()[:3] == ["Lark Moor"] * 3
    assert t["time"].tolist()[:3] == [2003.0, 2001.0, 2001.0]
    assert str(t["count"].dtype) == "Int64"
    assert t["count"].isna().tolist() == [False] * 4 + [True] + [False] * 4
    t.loc[2, "count"] = 99  # a copy
    assert d.table.loc[2, "count"] == 12


def test_sha256_of_raw_bytes(tmp_path: Path) -> None:
    raw = ("\ufeff" + PLAIN.replace("\n", "\r\n")).encode()
    path = _write(tmp_path, raw)
    d = load_counts(path)
    assert d.sha256 == hashlib.sha256(raw).hexdigest() == sha256_file(path)
    assert load_counts(d.to_frame()).sha256 is None
    with pytest.raises(InputError, match="file not found"):
        load_counts(tmp_path / "missing.csv")


# --------------------------------------------------------------------------- round trip


def _same_counts(a: CountData, b: CountData) -> None:
    assert a.sites == b.sites
    assert a.n_replicates == b.n_replicates
    assert a.has_survey_column == b.has_survey_column
    for x, y in zip(a.series, b.series):
        np.testing.assert_array_equal(x.times, y.times)
        np.testing.assert_array_equal(x.counts, y.counts)
        assert x.surveys.tolist() == y.surveys.tolist()
        np.testing.assert_array_equal(x.rows > 0, y.rows > 0)


def test_to_frame_round_trip(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, MULTI))
    frame = d.to_frame()
    assert list(frame.columns) == ["site", "time", "survey", "count"]
    assert len(frame) == 9  # one per source row, blank count included
    assert frame["time"].is_monotonic_increasing is False  # sorted within site only
    again = load_counts(frame)
    _same_counts(d, again)
    assert again.source == "<DataFrame>"
    # through a CSV file too
    out = tmp_path / "again.csv"
    frame.to_csv(out, index=False)
    _same_counts(d, load_counts(out))
    pd.testing.assert_frame_equal(load_counts(out).to_frame(), frame)


def test_to_frame_without_survey_column(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, PLAIN))
    frame = d.to_frame()
    assert list(frame.columns) == ["site", "time", "count"]
    assert frame["count"].tolist()[:3] == [3, pd.NA, 4]
    _same_counts(d, load_counts(frame))


# --------------------------------------------------------------------------- DataFrames


def test_dataframe_source() -> None:
    frame = pd.DataFrame({"time": [2.0, 1.0, 3.0], "count": [4, 3, np.nan]})
    d = load_counts(frame)
    np.testing.assert_array_equal(d.series[0].counts[:, 0], [3, 4, np.nan])
    assert d.table.index.name == "row"
    np.testing.assert_array_equal(d.series[0].rows[:, 0], [2, 1, 3])


@pytest.mark.parametrize(("frame", "row", "column", "fragment"), [
    (pd.DataFrame({"time": [1, 2], "count": [1, 2.5]}), 2, "count", "not a whole number"),
    (pd.DataFrame({"time": [1, 2], "count": [True, 2]}), 1, "count", "true/false"),
    (pd.DataFrame({"time": [1, np.nan], "count": [1, 2]}), 2, "time", "time is blank"),
    (pd.DataFrame({"time": [1, 2], "count": [1, np.inf]}), 2, "count", "not finite"),
    (pd.DataFrame({"time": [1, 2], "count": [1, -3]}), 2, "count", "negative"),
    (pd.DataFrame({"time": [1, 1], "count": [1, 2]}), 2, "time", "already has a row"),
    (pd.DataFrame({"time": ["a", 2], "count": [1, 2]}), 1, "time", "not a number"),
    (pd.DataFrame({"time": [1, 2], "count": [1, 2], 3: [0, 0]}), None, None, "not a string"),
    (pd.DataFrame({"time": [], "count": []}), None, None, "no data rows"),
    (pd.DataFrame(), None, None, "found no columns"),
])
def test_malformed_dataframe(frame: pd.DataFrame, row: int | None, column: str | None,
                             fragment: str) -> None:
    with pytest.raises(CountsFileError) as info:
        load_counts(frame)
    err = info.value
    assert "<DataFrame>" in str(err) and fragment in str(err)
    assert err.row == row and err.column == column and err.line is None
    if row is not None:
        assert f"row {row}, column '{column}'" in str(err)


# --------------------------------------------------------------------------- arrays


def test_single_from_arrays() -> None:
    d = CountData.single([3.0, 1.0, 2.0], [7, 5, np.nan], site="Tarn")
    assert d.sites == ["Tarn"] and d.source == "<arrays>"
    np.testing.assert_array_equal(d.series[0].times, [1, 2, 3])
    np.testing.assert_array_equal(d.series[0].counts[:, 0], [5, np.nan, 7])
    r = CountData.single([1, 2], [[4, 5], [6, np.nan]])
    assert r.n_replicates == 2 and r.has_replicates
    np.testing.assert_array_equal(r.series[0].counts, [[4, 5], [6, np.nan]])


@pytest.mark.parametrize(("times", "counts", "where", "fragment"), [
    ([1, 2, 3], [4, -5, 6], "counts[1]", "negative"),
    ([1, 2, 3], [4, 5.5, 6], "counts[1]", "not a whole number"),
    ([1, 2, 2], [4, 5, 6], "times[2]", "already has a row"),
    ([1, np.nan], [4, 5], "times[1]", "time is blank"),
    ([1, 2], [[4, 5], [6, np.inf]], "counts[1, 1]", "not finite"),
    ([1, 2], [4, np.nan], "counts[0]", "only one time"),
])
def test_single_from_arrays_errors(times: list, counts: list, where: str,
                                   fragment: str) -> None:
    with pytest.raises(CountsFileError) as info:
        CountData.single(times, counts)
    assert f"<arrays>, {where}: " in str(info.value) and fragment in str(info.value)


def test_single_shape_errors() -> None:
    with pytest.raises(InputError, match="2 times but times has 3"):
        CountData.single([1, 2, 3], [1, 2])
    with pytest.raises(InputError, match="1-D"):
        CountData.single([[1, 2]], [1, 2])
    with pytest.raises(InputError, match="numeric"):
        CountData.single(["a", "b"], [1, 2])


# --------------------------------------------------------------------------- transitions


def test_iter_transitions_spans_gaps(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, "site,time,count\nA,4,9\nA,1,5\nA,2,\nA,3,7\n"
                                     "B,0,1\nB,10,2\n"))
    out = dict(iter_transitions(d))
    assert list(out) == ["A", "B"]
    t0, t1, n0, n1 = out["A"]
    np.testing.assert_array_equal(t0, [1, 3])
    np.testing.assert_array_equal(t1, [3, 4])
    np.testing.assert_array_equal(n0, [5, 7])
    np.testing.assert_array_equal(n1, [7, 9])
    assert n0.dtype == np.int64
    assert isinstance(out["B"], Transitions)
    np.testing.assert_array_equal(out["B"].dt, [10])


def test_iter_transitions_with_replicates(tmp_path: Path) -> None:
    d = load_counts(_write(tmp_path, MULTI))
    with pytest.raises(CountsFileError) as info:
        list(iter_transitions(d))
    assert info.value.line == 4 and "2 counts at time 2001" in str(info.value)
    out = dict(iter_transitions(d, replicates="max"))
    np.testing.assert_array_equal(out["Lark Moor"].t0, [2001, 2003])
    np.testing.assert_array_equal(out["Lark Moor"].n0, [11, 12])
    np.testing.assert_array_equal(out["Lark Moor"].n1, [12, 15])
    np.testing.assert_array_equal(out["Owl Bank"].n1, [6, 7])
    times, counts, rows = d.site("Owl Bank").observed("max")
    np.testing.assert_array_equal(rows, [5, 9, 7])
    with pytest.raises(InputError, match="replicates"):
        list(iter_transitions(d, replicates="mean"))


# --------------------------------------------------------------------------- fuzzing

FUZZ = settings(max_examples=60, deadline=None,
                suppress_health_check=[HealthCheck.function_scoped_fixture,
                                       HealthCheck.too_slow])


def _load_or_input_error(path: Path) -> CountData | None:
    try:
        return load_counts(path)
    except InputError as err:
        assert str(err)
        return None


@FUZZ
@given(st.binary(max_size=300))
def test_fuzz_random_bytes(tmp_path: Path, raw: bytes) -> None:
    path = tmp_path / "fuzz.csv"
    path.write_bytes(raw)
    _load_or_input_error(path)


CSV_ALPHABET = st.sampled_from(list("0123456789,,,,\n\n\n\r\"-+.eE \tAbx") +
                               ["time", "count", "site", "survey", "nan", "inf", "\ufeff",
                                "\x00", "\u00e9", "\u2028", "1e999", "99999999999999999999"])


@FUZZ
@given(st.lists(CSV_ALPHABET, max_size=60).map("".join))
def test_fuzz_csv_like_text(tmp_path: Path, text: str) -> None:
    path = tmp_path / "fuzz.csv"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    _load_or_input_error(path)
    path.write_bytes(("time,count\n" + text).encode("utf-8"))
    _load_or_input_error(path)


@FUZZ
@given(st.text(max_size=200))
def test_fuzz_random_text(tmp_path: Path, text: str) -> None:
    path = tmp_path / "fuzz.csv"
    path.write_bytes(text.encode("utf-8", "surrogatepass"))
    _load_or_input_error(path)


CELL = st.one_of(st.none(), st.booleans(), st.integers(-10, 2 ** 70),
                 st.floats(allow_nan=True, allow_infinity=True),
                 st.text(alphabet=string.printable, max_size=8))


@FUZZ
@given(st.lists(st.tuples(CELL, CELL, st.sampled_from(["a", "b", None])), max_size=8))
def test_fuzz_dataframes(rows: list) -> None:
    frame = pd.DataFrame(rows, columns=["time", "count", "site"]) if rows else \
        pd.DataFrame({"time": [], "count": []})
    try:
        load_counts(frame)
    except InputError:
        pass


@st.composite
def valid_tables(draw: st.DrawFn) -> tuple[dict, str]:
    """A random valid counts table, its truth and a randomly formatted CSV text."""
    n_sites = draw(st.integers(1, 3))
    truth: dict[str, dict[float, list[int | None]]] = {}
    rows = []
    replicated = draw(st.booleans())
    for k in range(n_sites):
        site = f"S{k}" if draw(st.booleans()) else f"Site, {k}"
        times = draw(st.lists(st.integers(-50, 3000), min_size=2, max_size=6, unique=True))
        per: dict[float, list[int | None]] = {}
        for i, t in enumerate(times):
            n_rep = draw(st.integers(1, 3)) if replicated else 1
            values = [draw(st.one_of(st.none(), st.integers(0, 10 ** 6)))
                      for _ in range(n_rep)]
            if i < 2:  # two surveyed times per site at least
                values[0] = draw(st.integers(0, 10 ** 6))
            per[float(t) / 4] = values
            rows += [(site, float(t) / 4, j, v) for j, v in enumerate(values)]
        truth[site] = per
    order = draw(st.permutations(range(len(rows))))
    eol = draw(st.sampled_from(["\n", "\r\n", "\r"]))
    pad = draw(st.sampled_from(["", " ", "\t "]))
    bom = draw(st.sampled_from(["", "\ufeff"]))
    header = ["site", "time", "survey", "count"] if replicated else ["site", "time", "count"]
    lines = [",".join(pad + h + pad for h in header)]
    for i in order:
        site, t, j, v = rows[i]
        cells = [f'"{site}"', f"{pad}{t!r}", f"r{j}", "" if v is None else f"{pad}{v}{pad}"]
        if not replicated:
            cells.pop(2)
        lines.append(",".join(cells))
    return truth, bom + eol.join(lines) + draw(st.sampled_from(["", eol, eol * 3]))


@settings(FUZZ, max_examples=30)
@given(valid_tables())
def test_fuzz_valid_tables_read_back_exactly(tmp_path: Path, case: tuple[dict, str]) -> None:
    truth, text = case
    path = tmp_path / "valid.csv"
    path.write_bytes(text.encode("utf-8"))
    d = load_counts(path)
    assert sorted(d.sites) == sorted(truth)
    for s in d.series:
        per = truth[s.site]
        np.testing.assert_array_equal(s.times, sorted(per))
        for i, t in enumerate(s.times):
            got = {s.surveys[i, j]: s.counts[i, j] for j in range(d.n_replicates)
                   if s.rows[i, j] > 0}
            want = per[float(t)]
            assert len(got) == len(want)
            for j, v in enumerate(want):
                key = f"r{j}" if d.has_survey_column else None
                value = got[key] if d.has_survey_column else list(got.values())[0]
                assert (np.isnan(value) if v is None else value == v)
    _same_counts(d, load_counts(d.to_frame()))
