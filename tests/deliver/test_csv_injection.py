"""Field text never reaches a delivered CSV, GeoJSON or GeoPackage, a fixes export or the
report in a form a spreadsheet runs as a formula.

The rule checked is OWASP's (CSV Injection, owasp.org/www-community/attacks/CSV_Injection):
no cell may begin with ``=``, ``+``, ``-``, ``@``, tab (0x09) or carriage return (0x0D); a
cell that does is prefixed with a single quote, and every cell is quoted with inner double
quotes doubled. nodekeep neutralises on output (nothing is refused at load: a serial is kept
as logged, and the archive stays the record of what the field wrote). A plain number such
as ``-12.5`` is a number, not a formula, and is written as one.
"""

from __future__ import annotations

import csv
import io
import json
import sqlite3
from datetime import UTC, datetime
from html import escape

import pyarrow as pa
import pytest

from archive.deliver.csvfile import write_csv
from archive.deliver.gis import write_geojson, write_gpkg
from archive.ingest.read import write_fixes
from archive.qc import qc_of
from archive.qc.report import render_report
from archive.store.outfiles import spreadsheet_text
from tests.support.delivery_tables import context, final_table
from tests.support.qc_tables import run_data, small_fixture, synthetic_cloud

# The characters OWASP lists as the start of a formula (owasp.org, CSV Injection).
OWASP_START = ("=", "+", "-", "@", "\t", "\r")
HOSTILE = ["=1+2", "+SUM(A1:A9)", "-2+3", "@SUM(1,2)", "\tTAB", "\rCR", '=HYPERLINK("x";"y")',
           "N5007", "-17"]


def _evaluable(cell: str) -> bool:
    """True when a spreadsheet would read the cell as a formula (OWASP's list), a plain
    number excepted."""
    if not cell or cell[0] not in OWASP_START:
        return False
    try:
        float(cell)
    except ValueError:
        return True
    return False


def _hostile_table() -> pa.Table:
    t = final_table(len(HOSTILE))
    t = t.set_column(t.schema.get_field_index("node"), "node", pa.array(HOSTILE))
    heights = t.column("height").to_pylist()
    heights[0] = -12.5  # below the datum: a negative number, not text
    return t.set_column(t.schema.get_field_index("height"), "height", pa.array(heights))


def test_spreadsheet_text_rule():
    assert [spreadsheet_text(v) for v in HOSTILE] == [
        "'=1+2", "'+SUM(A1:A9)", "'-2+3", "'@SUM(1,2)", "'\tTAB", "'\rCR",
        "'=HYPERLINK(\"x\";\"y\")", "N5007", "-17"]
    assert spreadsheet_text("-12.5") == "-12.5" and spreadsheet_text("+3e2") == "+3e2"
    assert spreadsheet_text("") == "" and spreadsheet_text("'=already") == "'=already"


def test_csv_delivery_has_no_cell_a_spreadsheet_would_run():
    ctx = context(vertical_datum="=cmd|' /C calc'!A0")
    data = write_csv(_hostile_table(), ctx).decode("utf-8")
    rows = list(csv.reader(io.StringIO(data, newline="")))
    header, body = rows[0], rows[1:]
    assert all(not _evaluable(cell) for row in body for cell in row)
    nodes = [r[header.index("node")] for r in body]
    assert nodes == [spreadsheet_text(v) for v in HOSTILE]
    assert body[0][header.index("vertical_datum")] == "'=cmd|' /C calc'!A0"
    # a negative height stays an unquoted number in the file (numbers are not text)
    assert ",-12.5," in data.splitlines()[1]
    # every text value is quoted, inner quotes doubled (OWASP's second and third advice)
    assert '"\'=HYPERLINK(""x"";""y"")"' in data


def test_geojson_and_geopackage_attributes_are_neutralised(tmp_path):
    ctx = context()
    doc = json.loads(write_geojson(_hostile_table(), ctx))
    props = [f["properties"] for f in doc["features"]]
    assert [p["node"] for p in props] == [spreadsheet_text(v) for v in HOSTILE]
    assert all(not _evaluable(v) for p in props for v in p.values() if isinstance(v, str))
    assert props[0]["height"] == -12.5  # a number, as a number
    path = tmp_path / "r.gpkg"
    path.write_bytes(write_gpkg(_hostile_table(), ctx))
    db = sqlite3.connect(path)
    try:
        nodes = [r[0] for r in db.execute("SELECT node FROM receivers ORDER BY fid")]
    finally:
        db.close()
    assert nodes == [spreadsheet_text(v) for v in HOSTILE]


def test_fixes_export_is_neutralised(tmp_path):
    table = pa.table({"time": pa.array([datetime(2024, 3, 10, tzinfo=UTC)] * 2,
                                       pa.timestamp("us", tz="UTC")),
                      "node": pa.array(["=1+2", "N5001"]), "lat": pa.array([-31.7, 31.7])})
    out = write_fixes(table, tmp_path / "fixes.csv")
    rows = list(csv.DictReader(out.open(newline="", encoding="utf-8")))
    assert [r["node"] for r in rows] == ["'=1+2", "N5001"] and rows[0]["lat"] == "-31.7"


@pytest.mark.parametrize("serial", ["=1+2", "@SUM(1,2)", "-2+3"])
def test_report_review_list_shows_serials_as_text(serial):
    positions, control, stations = small_fixture()
    nodes = positions.column("node").to_pylist()
    nodes[2] = serial  # 1001/2003, flagged "moved": on the review list
    positions = positions.set_column(positions.schema.get_field_index("node"), "node",
                                     pa.array(nodes))
    data = run_data(positions, control, stations)
    page, _ = render_report(data, qc_of(data, tolerance=1.5),
                            lambda *_: synthetic_cloud(0.0, 0.0, n=50, seed=1), max_clouds=0,
                            generated_at=datetime(2024, 3, 12, tzinfo=UTC))
    assert f"<td>{escape(spreadsheet_text(serial))}</td>" in page
    assert f"<td>{escape(serial)}</td>" not in page
