"""GPS week number rollover: dates moved by whole 1024-week periods, with a note, or refused.

The GPS week number of the navigation message counts modulo 1024 (IS-GPS-200, 20.3.3.3.1.1):
a receiver whose firmware pins its week to a fixed epoch logs dates exactly 1024 weeks
(7168 days) early once the counter rolls over (21 August 1999, 6 April 2019).
"""

from __future__ import annotations

import datetime as dt

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest
from archive.seeds.nmea_write import write_nmea

from archive.ingest.nmea import parse_nmea
from archive.ingest.parse_file import parse_file
from archive.ingest.rollover import note_text
from archive.ingest.schema import conform_fixes

ROLL = np.timedelta64(7168, "D")  # 1024 weeks
H = "a" * 64


def log(start: str, n: int, seed: int = 1) -> bytes:
    rng = np.random.default_rng(seed)
    t = np.datetime64(start, "us") + np.arange(n) * np.timedelta64(1, "s")
    return write_nmea(t, 35.2 + rng.normal(0, 1e-5, n), -101.7 + rng.normal(0, 1e-5, n),
                      np.full(n, 900.0), np.full(n, -24.0), np.ones(n, int), np.full(n, 9),
                      np.full(n, 0.9), np.full(n, 1.6), np.full(n, 1.2))


def window(a: str, b: str) -> tuple[dt.datetime, dt.datetime]:
    return (dt.datetime.fromisoformat(a).replace(tzinfo=dt.UTC),
            dt.datetime.fromisoformat(b).replace(tzinfo=dt.UTC))


def test_dates_1024_weeks_before_the_rest_of_the_log_are_moved():
    # the receiver logs 1999 dates until it learns the true week, then 2019 dates
    early = str((np.datetime64("2019-04-07T00:00:00") - ROLL).astype("datetime64[s]"))
    data = log(early, 60) + log("2019-04-07T00:01:00", 60, seed=2)
    r = parse_nmea(data, node="KF-0001", raw_hash=H)
    t = r.fixes.column("time").to_pylist()
    assert t[0] == dt.datetime(2019, 4, 7, tzinfo=dt.UTC) and len(set(t)) == 120
    assert r.fixes.column("weeks_added").to_pylist() == [1024] * 60 + [0] * 60
    (note,) = r.notes
    assert note["kind"] == "week-rollover" and note["epochs"] == 60
    assert note["lines"] == [1, 178] and note["logged"] == ["1999-08-22", "1999-08-22"]
    assert "before the log's latest date 2019-04-07" in note["why"]
    assert note_text(note).startswith("60 epochs (lines 1-178) logged 1999-08-22 moved +1024 "
                                      "weeks to 2019-04-07")


def test_a_gap_that_is_not_whole_periods_is_left_alone():
    data = log("2023-01-10T00:00:00", 30) + log("2024-03-01T00:00:00", 30, seed=2)
    r = parse_nmea(data, node="KF-0001", raw_hash=H)
    assert r.notes == [] and pc.max(r.fixes.column("weeks_added")).as_py() == 0


def test_reference_window_moves_or_refuses():
    early = str((np.datetime64("2024-05-02T00:00:00") - ROLL).astype("datetime64[s]"))
    data = log(early, 40)
    moved = parse_nmea(data, node="KF-0001", raw_hash=H,
                       reference=window("2024-05-01", "2024-05-09"), reference_text="node X")
    assert moved.fixes.column("time")[0].as_py() == dt.datetime(2024, 5, 2, tzinfo=dt.UTC)
    assert moved.notes[0]["why"] == "before node X (2024-05-01..2024-05-09)"
    refused = parse_nmea(data, node="KF-0001", raw_hash=H,
                         reference=window("2040-01-01", "2040-01-05"))
    assert refused.n_fixes == 0 and refused.reject_counts() == {"rollover": 40}
    assert refused.notes[0]["kind"] == "week-rollover-refused"
    assert refused.n_accepted + refused.n_rejected + refused.n_ignored == refused.n_lines
    # inside the window: nothing to do
    same = parse_nmea(log("2024-05-02T00:00:00", 40), node="KF-0001", raw_hash=H,
                      reference=window("2024-05-01", "2024-05-09"))
    assert same.notes == []


@pytest.mark.parametrize("first,kind", [
    (str((np.datetime64("2024-05-02T00:00:00") - ROLL).astype("datetime64[s]")),
     "week-rollover"),
    ("2022-01-01T00:00:00", "week-rollover-refused"),  # 2.3 years early: no whole period
])
def test_streamed_and_in_memory_reading_agree(survey_arc, tmp_path, first, kind):
    path = tmp_path / "KF-0001.nmea"
    path.write_bytes(log(first, 400) + log("2024-05-02T00:10:00", 50, seed=3)[:-30])
    task = {"objects_url": survey_arc.objects_url, "path": str(path), "format": "nmea",
            "node": "KF-0001", "date": None, "profile_path": None, "sync": False,
            "reference": ["2024-05-01T00:00:00+00:00", "2024-05-09T00:00:00+00:00"],
            "reference_text": "the deployments of node KF-0001"}
    mem = parse_file(task)
    big = parse_file({**task, "small_file": 0})  # the path of large logs
    for res in (mem, big):
        assert res["ok"], res.get("error")
        assert [n["kind"] for n in res["notes"]] == [kind]
        assert res["n_fixes"] == (450 if kind == "week-rollover" else 50)
    keys = ("n_lines", "n_accepted", "n_rejected", "n_ignored", "n_fixes", "n_valid",
            "t_first", "t_last", "rejects", "ignored", "notes", "n_no_quality")
    assert {k: mem[k] for k in keys} == {k: big[k] for k in keys}
    a, b = (conform_fixes(pq.read_table(r["fixes"]["tmp"])) for r in (mem, big))
    for name in a.column_names:
        assert a.column(name).equals(b.column(name)), name
    ra, rb = pq.read_table(mem["rejects_obj"]["tmp"]), pq.read_table(big["rejects_obj"]["tmp"])
    assert ra.equals(rb)


def test_everything_refused_fails_the_file_saying_why(survey_arc, tmp_path):
    early = str((np.datetime64("2024-05-02T00:00:00") - ROLL).astype("datetime64[s]"))
    path = tmp_path / "KF-0001.nmea"
    path.write_bytes(log(early, 100))
    task = {"objects_url": survey_arc.objects_url, "path": str(path), "format": "nmea",
            "node": "KF-0001", "date": None, "profile_path": None, "sync": False,
            "reference": ["2040-01-01T00:00:00+00:00", "2040-01-05T00:00:00+00:00"],
            "reference_text": "the deployments of node KF-0001"}
    for small in (None, 0):
        res = parse_file(task if small is None else {**task, "small_file": small})
        assert not res["ok"] and "1024 GPS weeks" in res["error"]
        assert str(path) in res["error"]
