"""What ``reproduce`` reports when the recomputed table's digest differs from the recorded one.

The recomputation is replaced by a changed copy of the stored table, so each difference is
known; the expected distances are computed here with numpy's hypot, not by the code under test.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

import archive.solve.run as solve_run
from archive.lineage.reproduce import reproduce, table_differences
from archive.solve.run import run_positions
from tests.support.builders import delivery_archive
from tests.support.cli import invoke


@pytest.fixture
def stored(survey_arc, tmp_path):
    sid, _final, run, _ = delivery_archive(survey_arc, tmp_path)
    return survey_arc, sid, run, run_positions(survey_arc, run)


def _set(table: pa.Table, column: str, row: int, value) -> pa.Table:
    values = table[column].to_pylist()
    values[row] = value
    i = table.schema.get_field_index(column)
    return table.set_column(i, table.schema.field(i), pa.array(values, table.schema.field(i).type))


def _reproduce_with(monkeypatch, arc, sid, run, table):
    monkeypatch.setattr(solve_run, "recompute", lambda _arc, _run_id: table)
    return reproduce(arc, run.id, sid)


def test_height_only_difference_is_named_with_its_size(monkeypatch, stored):
    arc, sid, run, table = stored
    changed = _set(table, "height", 3, table["height"][3].as_py() + 0.25)
    r = _reproduce_with(monkeypatch, arc, sid, run, changed)
    assert r["identical"] is False
    d = r["differences"]
    assert d["columns"] == ["height"] and d["n_rows_differing"] == 1
    assert d["max_horizontal"] == 0.0 and d["max_vertical"] == pytest.approx(0.25, abs=1e-9)
    assert "height" in r["what_differs"]


def test_rows_not_delivered_are_compared_too(stored):
    _arc, _sid, _run, table = stored
    # station 1001/2002 delivered from a second part; the first part (not delivered) moves
    extra = table.slice(1, 1)
    extra = _set(_set(extra, "delivered", 0, False), "part", 0, 1)
    base = pa.concat_tables([table, extra])
    moved = _set(_set(extra, "easting", 0, extra["easting"][0].as_py() + 3.0),
                 "northing", 0, extra["northing"][0].as_py() - 4.0)
    recomputed = pa.concat_tables([table, moved])
    d = table_differences(base, recomputed)
    # 3-4-5 triangle: hypot(3, 4) = 5 (numpy reference)
    assert d["max_horizontal"] == pytest.approx(float(np.hypot(3.0, 4.0)), abs=1e-9)
    assert d["columns"] == ["easting", "northing"] and d["n_rows_differing"] == 1
    assert d["worst_station"]["line"] == 1001 and d["worst_station"]["point"] == 2002


def test_non_coordinate_and_row_count_differences_are_named(monkeypatch, stored, runner):
    arc, sid, run, table = stored
    r = _reproduce_with(monkeypatch, arc, sid, run, _set(table, "flags", 0, "moved"))
    assert r["differences"]["columns"] == ["flags"] and r["n_differing"] == 1
    assert r["max_difference"] == 0.0 and "column(s) flags" in r["what_differs"]
    fewer = table.filter(pc.not_equal(table["point"], 2003.0))
    r = _reproduce_with(monkeypatch, arc, sid, run, fewer)
    d = r["differences"]
    assert (d["rows_a"], d["rows_b"], d["only_a"], d["only_b"]) == (8, 6, 2, 0)
    assert d["n_rows_differing"] == 2 and d["columns"] == []
    assert "rows 8 recorded vs 6 recomputed" in r["what_differs"]
    meta = table.replace_schema_metadata({b"nodekeep.table": b"positions-other"})
    r = _reproduce_with(monkeypatch, arc, sid, run, meta)
    assert r["n_differing"] == 0 and "schemas differ" in r["what_differs"]
    res = invoke(runner, arc.root, "reproduce", run.id[:12])
    assert res.exit_code == 0, res.output
    assert "NOT identical" in res.output and "schemas differ" in res.output
    assert "0 row(s) differ" in res.output and "largest vertical difference 0 m" in res.output
