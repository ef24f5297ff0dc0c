"""SPS rev 2.1 point records read column by column.

Layout: SEG SPS format rev 2.1 (Jan 2006), point record layout; the same columns are read by
Seismic Unix's getSPSfield (sugeom). The S record is a sample from the rev 2.1 record
description (its H26 self-description block); the R record is a synthetic round-trip vector
(computed, laid out by the spec).
"""

from __future__ import annotations

import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.errors import InputError
from archive.survey.sps import read_sps

S_SAMPLE = "S   3762.00   3961.00  1A2     7.2   0    64.8 454773.4 3008241.9  -0.2177042821"
R_SAMPLE = "R   1001.00   2001.00  1G1   0 0.0   0 0   0.0 500123.4 6123456.7 123.4123123456"


def header(rid: str, desc: str, data: str) -> str:
    """An H record: id in columns 1-4, description 5-32, data from column 33."""
    return f"{rid:<4}{desc:<28}{data}"


HAND_WRITTEN = "\r\n".join([
    header("H00", "SPS format version num.", "SPS V2.1"),
    header("H01", "Description of survey area", "Kestrel Flats 3D"),
    header("H03", "Client", "Harrow Basin Energy"),
    header("H26", "", "receivers of line 1001, hand-written test file"),
    R_SAMPLE,
    # R: line 1001.5, point 2002, index 2, no code, blank elevation/day/time
    "R" + f"{1001.5:10.2f}" + f"{2002:10.2f}" + "  " + "2" + "  " + " " * 20 +
    f"{500148.4:9.1f}" + f"{6123456.7:10.1f}",
    "",
    S_SAMPLE,
    "X" + " " * 10 + "relation record, not read here",
]) + "\r\n"


def test_sample_records_column_by_column(tmp_path):
    assert len(S_SAMPLE) == 80 and len(R_SAMPLE) == 80
    f = read_sps(HAND_WRITTEN.encode("ascii"), "hand.sps")
    rows = f.points.to_pylist()
    assert [r["kind"] for r in rows] == ["R", "R", "S"]
    r, r2, s = rows
    # SPS rev 2.1 point record layout, synthetic R vector: line 1001.00 (cols 2-11), point 2001.00
    # (12-21), index 1 (24), code G1 (25-26), E 500123.4 (47-55), N 6123456.7 (56-65),
    # elevation 123.4 (66-71)
    assert (r["line"], r["point"], r["index"], r["code"]) == (1001.0, 2001.0, 1, "G1")
    assert (r["easting"], r["northing"], r["elevation"]) == (500123.4, 6123456.7, 123.4)
    assert r["src_line"] == 5
    # a record with blank optional columns: elevation null, code null, index from column 24
    assert (r2["line"], r2["point"], r2["index"], r2["code"]) == (1001.5, 2002.0, 2, None)
    assert r2["elevation"] is None and r2["easting"] == 500148.4 and r2["src_line"] == 6
    # S sample of the SPS rev 2.1 record description: line 3762.00, point 3961.00, index 1, code A2,
    # E 454773.4, N 3008241.9, elevation -0.2
    assert (s["line"], s["point"], s["index"], s["code"]) == (3762.0, 3961.0, 1, "A2")
    assert (s["easting"], s["northing"], s["elevation"]) == (454773.4, 3008241.9, -0.2)
    assert s["src_line"] == 8
    assert f.receivers().num_rows == 2 and f.sources().num_rows == 1
    assert f.ignored == {"X": 1}


def test_header_records_kept_in_order():
    f = read_sps(HAND_WRITTEN.encode("ascii"), "hand.sps")
    assert f.headers == [
        ("H00", "SPS format version num.", "SPS V2.1"),
        ("H01", "Description of survey area", "Kestrel Flats 3D"),
        ("H03", "Client", "Harrow Basin Energy"),
        ("H26", "", "receivers of line 1001, hand-written test file"),
    ]
    assert f.revision == "SPS V2.1"


def _with(record: str, first: int, last: int, text: str) -> str:
    """Replace columns first..last (1-based) of a record."""
    assert len(text) == last - first + 1
    return record[:first - 1] + text + record[last:]


@pytest.mark.parametrize(
    ("first", "last", "text", "columns", "expected"),
    [
        (47, 55, " 5001x3.4", "47-55", "map grid easting"),
        (56, 65, "          ", "56-65", "map grid northing"),
        (2, 11, "   abc.00 ", "2-11", "line name"),
        (24, 24, "x", "24", "point index"),
        (22, 23, "7 ", "22-23", "blank columns"),
        (66, 71, " 12.3.", "66-71", "surface elevation"),
        (75, 80, "256199", "75-80", "time of day"),
        (27, 30, " 1.5", "27-30", "static correction"),
    ],
)
def test_malformed_record_names_file_line_columns(first, last, text, columns, expected):
    bad = _with(R_SAMPLE, first, last, text)
    data = "\n".join([header("H00", "SPS format version num.", "SPS V2.1"), R_SAMPLE, bad, bad])
    with pytest.raises(InputError) as err:
        read_sps(data.encode(), "preplot.sps")
    e = err.value
    assert (e.path, e.line, e.columns) == ("preplot.sps", 3, columns)
    assert expected in e.expected
    assert str(e).startswith("preplot.sps:3: ") and "1 more malformed records" in str(e)


def test_other_refusals():
    with pytest.raises(InputError, match=r"x\.sps:2: unknown record type 'Q'"):
        read_sps(f"{R_SAMPLE}\nQ something\n".encode(), "x.sps")
    with pytest.raises(InputError, match=r"x\.sps:1: the record is 81 columns long"):
        read_sps((R_SAMPLE + "9\n").encode(), "x.sps")
    rev0 = header("H00", "SPS format version num.", "SPS001,07.10.1993")
    with pytest.raises(InputError, match="rev 0"):
        read_sps(f"{rev0}\n{R_SAMPLE}\n".encode(), "old.sps")
    with pytest.raises(InputError, match="empty"):
        read_sps(b"", "e.sps")


@settings(max_examples=150, deadline=None)
@given(st.binary(max_size=400))
def test_garbage_never_crashes(data):
    # every outcome is a table or an InputError, never another exception
    try:
        f = read_sps(data, "junk.sps")
    except InputError as exc:
        assert str(exc).startswith("junk.sps")
        return
    n_lines = len(data.split(b"\n")) - (1 if data.endswith(b"\n") else 0)
    assert f.points.num_rows <= n_lines
    assert all(math.isfinite(v) for v in f.points["easting"].to_pylist())
