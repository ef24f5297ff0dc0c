"""Trace of a file, diff and where on hand-built runs (station traces and reproduce on a real
solve: test_solver_runs.py)."""

from __future__ import annotations

import json
from datetime import timedelta, timezone

import numpy as np
import pyarrow as pa
import pytest

from archive.deliver.deliveries import deliver
from archive.edits import decisions as ed
from archive.errors import UsageError
from archive.lineage.diff import compare_positions, diff_runs
from archive.lineage.trace import trace_file
from archive.lineage.where import where
from archive.times import parse_utc
from tests.support.builders import add_raw_file, delivery_archive, make_run, positions_table


@pytest.fixture
def delivered(survey_arc, tmp_path):
    sid, final, run, raw = delivery_archive(survey_arc, tmp_path)
    res = deliver(survey_arc, sid, None, "sps", tmp_path / "r.sps", "processing centre")
    return survey_arc, sid, final, run, raw, res


def test_trace_file_names_every_raw_file(delivered, tmp_path):
    arc, sid, _final, run, raw, res = delivered
    t = trace_file(arc, tmp_path / "r.sps")
    assert t["delivery"]["id"] == res.delivery_id and t["run"]["id"] == run.id
    names = sorted(r["name"] for r in t["raw_files"])
    assert names == sorted(raw)
    for r in t["raw_files"]:
        assert len(r["hash"]) == 64 and r["received_by"] == "tester"
        assert r["received_at"].tzinfo is not None
    assert t["run"]["params"]["estimate"]["method"] == "huber"
    assert t["run"]["code_version"] == "0.1.0"
    assert t["survey"]["crs"] == "EPSG:32614"


def test_trace_file_refuses_changed_file(delivered, tmp_path):
    arc, *_ = delivered
    changed = tmp_path / "r_changed.sps"
    changed.write_bytes((tmp_path / "r.sps").read_bytes() + b"\n")
    with pytest.raises(UsageError, match=r"matches no delivery.*changed after delivery"):
        trace_file(arc, changed)


def test_diff_runs_movement_summary_added_removed(survey_arc, tmp_path):
    sid, final, run_a, _ = delivery_archive(survey_arc, tmp_path, n=10)
    pos = positions_table(final)
    east = pos.column("easting").to_numpy().copy()
    shifts = np.linspace(0.0, 2.7, pos.num_rows)  # known movement per station
    east += shifts
    pos = pos.set_column(pos.schema.get_field_index("easting"), "easting",
                         pa.array(east))
    pos_b = pos.slice(1)  # first station removed in b
    f3 = add_raw_file(survey_arc, sid, "N5009", "N5009_h2.nmea", 31.7, -97.8)
    run_b = make_run(survey_arc, pos_b, [f3], label="reprocessed")
    d = diff_runs(survey_arc, run_a.id[:8], run_b.id[:8], threshold=1.6)
    moved = shifts[1:]
    # summary against numpy on the known shifts
    assert d["summary"]["n_common"] == 9
    assert d["summary"]["mean"] == pytest.approx(moved.mean(), abs=1e-9)
    assert d["summary"]["max"] == pytest.approx(moved.max(), abs=1e-9)
    assert d["summary"]["p95"] == pytest.approx(np.percentile(moved, 95), abs=1e-9)
    assert [round(b["moved"], 6) for b in d["beyond"]] == sorted(
        [round(float(x), 6) for x in moved if x > 1.6], reverse=True)
    assert d["removed"] == [{"line": 1001.0, "point": 2001.0, "index": 1, "node": "N5000"}]
    assert d["added"] == []
    back = compare_positions(pos_b, pos.slice(0), threshold=0.1)
    assert back["added"] == [{"line": 1001.0, "point": 2001.0, "index": 1, "node": "N5000"}]


def test_where_as_of_before_and_after_second_delivery(delivered, tmp_path):
    arc, sid, final, _run, _raw, first = delivered
    e = ed.set_position(arc, sid, 1001, 2002, source="given", easting=612370.0,
                        northing=3512346.0, reason="re-staked by the crew")
    second = deliver(arc, sid, None, "csv", tmp_path / "r2.csv", "processing centre")
    with arc.session() as s:
        from archive.store.models import Delivery

        t1 = s.get(Delivery, first.delivery_id).created_at
        t2 = s.get(Delivery, second.delivery_id).created_at
    now = where(arc, sid, 1001, 2002)
    assert now["delivered"]["id"] == second.delivery_id
    assert (now["delivered"]["easting"], now["delivered"]["source"]) == (
        612370.0, f"edit:{e.id};node:deployed")
    mid = where(arc, sid, 1001, 2002, as_of=t1 + (t2 - t1) / 2)
    assert mid["delivered"]["id"] == first.delivery_id
    assert mid["delivered"]["easting"] == final.column("easting")[1].as_py()
    assert mid["delivered"]["source"] == "solver"
    assert where(arc, sid, 1001, 2002, as_of=t1 - timedelta(seconds=1))["delivered"] is None
    assert now["n_occupations"] == 1 and len(now["occupations"][0]["history"]) == 2


def test_times_follow_one_rule():
    # archive.times: an --as-of date is the end of that day, UTC; no zone means UTC
    def as_of(v):
        return parse_utc(v, "--as-of", date_is_end=True)

    assert as_of("2025-06-30").isoformat() == "2025-06-30T23:59:59.999999+00:00"
    assert parse_utc("2025-06-30").isoformat() == "2025-06-30T00:00:00+00:00"
    assert as_of("2025-06-30T12:00:00Z").isoformat() == "2025-06-30T12:00:00+00:00"
    assert parse_utc("2025-06-30T12:00:00").isoformat() == "2025-06-30T12:00:00+00:00"
    with pytest.raises(UsageError, match="not an ISO 8601"):
        as_of("30/06/2025")


def test_as_of_offsets_are_converted_to_utc():
    # ISO 8601 offsets: 14:00+02:00 is 12:00 UTC (Python datetime reference arithmetic)
    got = parse_utc("2025-06-30T14:00:00+02:00")
    assert got.utcoffset() == timedelta(0) and got.isoformat() == "2025-06-30T12:00:00+00:00"
    assert parse_utc(got.astimezone(timezone(timedelta(hours=-5)))) == got
    assert parse_utc(got.astimezone(timezone(timedelta(hours=-5)))).utcoffset() == timedelta(0)


def test_where_refuses_an_unknown_station(delivered):
    arc, sid, *_ = delivered
    with pytest.raises(UsageError, match=r"unknown station 1009/2001.*not in the preplot"):
        where(arc, sid, 1009, 2001)


def test_diff_names_lost_positions_and_reassigned_records(survey_arc, tmp_path, runner):
    """A record that lost its position is not 'no movement', and a key that now holds
    another node is a re-assignment, not a common station."""
    from tests.support.cli import invoke

    sid, final, run_a, _ = delivery_archive(survey_arc, tmp_path, n=6)
    pos = positions_table(final)
    east = pos.column("easting").to_pylist()
    north = pos.column("northing").to_pylist()
    east[2] = north[2] = None  # 1001/2003: no position in the second run
    nodes = pos.column("node").to_pylist()
    nodes[4] = "N5999"  # 1002/2002: the serial put right in the log
    pos_b = pos.set_column(pos.schema.get_field_index("easting"), "easting", pa.array(east))
    pos_b = pos_b.set_column(pos.schema.get_field_index("northing"), "northing",
                             pa.array(north))
    pos_b = pos_b.set_column(pos.schema.get_field_index("node"), "node", pa.array(nodes))
    f3 = add_raw_file(survey_arc, sid, "N5999", "N5999_h2.nmea", 31.7, -97.8)
    run_b = make_run(survey_arc, pos_b, [f3], label="reprocessed")
    d = diff_runs(survey_arc, run_a.id, run_b.id, threshold=0.5)
    s = d["summary"]
    assert (s["n_common"], s["n_compared"], s["n_lost_position"], s["n_reassigned"]) == (
        6, 5, 1, 1)
    assert s["max"] == 0.0  # the five compared did not move
    assert d["lost_position"] == [{"line": 1001.0, "point": 2003.0, "index": 1,
                                   "node": "N5002"}]
    assert d["reassigned"] == [{"line": 1002.0, "point": 2002.0, "index": 1,
                                "node_a": "N5004", "node_b": "N5999",
                                "occupation_a": 1, "occupation_b": 1}]
    res = invoke(runner, survey_arc.root, "diff", run_a.id[:8], run_b.id[:8])
    assert res.exit_code == 0, res.stderr
    assert "6 occupations in both runs (paired by line, point and point index), 5 with a " \
           "position in both" in res.output
    assert "1 lost their position (none in the second run): 1001/2003" in res.output
    assert "1 re-assigned (another node or occupation): 1002/2002" in res.output
    assert "node N5004 -> N5999" in res.output
    res = invoke(runner, survey_arc.root, "diff", run_a.id[:8], run_b.id[:8], "--json")
    assert json.loads(res.output)["summary"]["n_lost_position"] == 1
