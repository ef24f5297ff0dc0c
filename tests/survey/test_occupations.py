"""Occupation numbering: point indices in deployment order, stable across log versions.

The rule follows the SPS rev 2.1 meaning of the point index (from memory of the rev 2.1
description, see formats.md): index 1 for the first position of a point, the next value for
a re-laid point at another place; (line, point, index) must be unique in a file.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pyarrow as pa
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.errors import InputError
from archive.survey.deployments import number_occupations, read_deployments
from archive.survey.inputs import current_input, load_input
from archive.survey.occupations import (
    choose,
    number_log,
    occupation_summary,
    occupations_at,
    pick_one,
    with_occupations,
)

T0 = datetime(2025, 4, 7, 12, tzinfo=UTC)


def _log(rows: list[tuple[str, int, int, float, float | None]], index: list[int] | None = None
         ) -> pa.Table:
    """A deployment log from (node, line, point, deployed hours, retrieved hours) rows."""
    head = "node,line,point,deployed_utc,retrieved_utc" + (",index" if index else "")
    lines = [head]
    for i, (node, line, point, d, r) in enumerate(rows):
        dep = (T0 + timedelta(hours=d)).isoformat().replace("+00:00", "Z")
        ret = "" if r is None else (T0 + timedelta(hours=r)).isoformat().replace("+00:00", "Z")
        lines.append(f"{node},{line},{point},{dep},{ret}" + (f",{index[i]}" if index else ""))
    return read_deployments(("\n".join(lines) + "\n").encode(), "deployments.csv").table


def _numbers(table: pa.Table) -> dict[tuple[str, float, float], int]:
    d = table.to_pydict()
    return {(n, a, b): int(o) for n, a, b, o in
            zip(d["node"], d["line"], d["point"], d["occupation"], strict=True)}


def test_numbered_in_order_of_deployment_time():
    # the log lists the later occupation first: the order of the file does not matter
    t = with_occupations(_log([("N2", 1001, 5002, 30.0, 50.0), ("N1", 1001, 5002, 0.0, 20.0),
                               ("N3", 1001, 5002, 60.0, None), ("N4", 1001, 5003, 0.0, 20.0)]))
    assert _numbers(t) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 2,
                           ("N3", 1001.0, 5002.0): 3, ("N4", 1001.0, 5003.0): 1}
    assert occupation_summary(t) == {"occupations": 4, "reoccupied": 1, "max_index": 3}


def test_a_later_occupation_never_renumbers_earlier_ones():
    v1 = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0)]))
    v2, gone = number_log(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0),
                                ("N5", 1001, 5002, 60.0, 80.0)]), v1)
    assert gone == []
    assert _numbers(v2)[("N5", 1001.0, 5002.0)] == 3
    assert {k: v for k, v in _numbers(v2).items() if k[0] != "N5"} == _numbers(v1)


def test_a_corrected_log_keeps_every_index_already_given():
    v1 = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0)]))
    # the crew corrects a serial (N2 was N7), a time, and adds a forgotten earlier occupation
    v2, _ = number_log(_log([("N1", 1001, 5002, 0.5, 20.0), ("N7", 1001, 5002, 30.0, 51.0),
                             ("N9", 1001, 5002, -30.0, -5.0)]), v1)
    n = _numbers(v2)
    assert n[("N1", 1001.0, 5002.0)] == 1 and n[("N7", 1001.0, 5002.0)] == 2
    assert n[("N9", 1001.0, 5002.0)] == 3  # new, so it takes the next free index
    # without the previous version the same log is numbered by time alone
    assert _numbers(with_occupations(_log([("N1", 1001, 5002, 0.5, 20.0),
                                           ("N7", 1001, 5002, 30.0, 51.0),
                                           ("N9", 1001, 5002, -30.0, -5.0)]))) == {
        ("N9", 1001.0, 5002.0): 1, ("N1", 1001.0, 5002.0): 2, ("N7", 1001.0, 5002.0): 3}


def test_an_index_once_given_is_never_given_again():
    v1 = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0),
                                ("N3", 1001, 5002, 60.0, 80.0)]))
    # N3 (index 3) was a mistake and leaves the log; a later occupation must not take its 3
    v2, gone = number_log(_log([("N1", 1001, 5002, 0.0, 20.0),
                                ("N2", 1001, 5002, 30.0, 50.0)]), v1)
    assert [(g["node"], g["index"]) for g in gone] == [("N3", 3)]
    v3, gone3 = number_log(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0),
                                 ("N4", 1001, 5002, 90.0, 99.0)]), v2, gone)
    assert _numbers(v3)[("N4", 1001.0, 5002.0)] == 4 and gone3 == gone
    # N2 is removed, then restored in the next version: it gets its index 2 back
    v4, gone4 = number_log(_log([("N1", 1001, 5002, 0.0, 20.0),
                                 ("N4", 1001, 5002, 90.0, 99.0)]), v3, gone3)
    assert sorted((g["node"], g["index"]) for g in gone4) == [("N2", 2), ("N3", 3)]
    v5, gone5 = number_log(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0),
                                 ("N4", 1001, 5002, 90.0, 99.0),
                                 ("N5", 1001, 5002, 120.0, 130.0)]), v4, gone4)
    assert _numbers(v5) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 2,
                            ("N4", 1001.0, 5002.0): 4, ("N5", 1001.0, 5002.0): 5}
    assert [(g["node"], g["index"]) for g in gone5] == [("N3", 3)]


def test_a_later_occupation_keeps_clear_of_the_preplot_indices():
    from archive.survey.stations import read_stations

    preplot = read_stations(b"line,point,easting,northing,index\n1001,5002,583207,4062450,1\n"
                            b"1001,5002,583217,4062450,2\n", "p.csv", None).table
    # station index 1 occupied twice, station index 2 never laid out yet
    t, _ = number_log(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0)]),
                      preplot=preplot)
    assert _numbers(t) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 3}
    # later, index 2 is laid out: its first occupation keeps the preplot's index 2
    t2, _ = number_log(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0),
                             ("N3", 1001, 5002, 60.0, 80.0)], index=[1, 1, 2]), t,
                       preplot=preplot)
    assert _numbers(t2)[("N3", 1001.0, 5002.0)] == 2


def test_preplot_point_indices_combine_with_occupations():
    # the preplot holds 1001/5002 index 1 and index 2 (two planned positions of one point):
    # each station's first occupation keeps its own index, a later one takes the next index
    # above every index used at that line and point
    t = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 1.0, 20.0),
                               ("N3", 1001, 5002, 30.0, 50.0)], index=[1, 2, 1]))
    n = _numbers(t)
    assert n == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 2,
                 ("N3", 1001.0, 5002.0): 3}
    occ = occupations_at(t, 1001, 5002)
    assert [(o["index"], o["station_index"], o["node"]) for o in occ] == [
        (1, 1, "N1"), (2, 2, "N2"), (3, 1, "N3")]


@settings(max_examples=60, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 3), st.integers(0, 500), st.integers(1, 3)),
                min_size=1, max_size=40))
def test_keys_are_unique_whatever_the_log(records):
    rows = [(f"N{i}", 1001, 5000 + p, float(h), float(h) + 10.0)
            for i, (p, h, _) in enumerate(records)]
    t = with_occupations(_log(rows, index=[k for _, _, k in records]))
    keys = list(zip(t["line"].to_pylist(), t["point"].to_pylist(),
                    t["occupation"].to_pylist(), strict=True))
    assert len(set(keys)) == len(keys)
    # a later version (same log plus one record) keeps every index
    more, gone = number_log(_log(rows + [("NX", 1001, 5000, 900.0, 950.0)],
                                 index=[k for _, _, k in records] + [1]), t)
    assert gone == []
    assert more["occupation"].to_pylist()[:-1] == t["occupation"].to_pylist()


def test_choosing_one_occupation():
    t = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0)]))
    occ = occupations_at(t, 1001, 5002)
    assert [o["node"] for o in choose(occ, 2, None)] == ["N2"]
    assert pick_one(occ, 1001, 5002, None, "N1", what="reject")["index"] == 1
    from archive.errors import UsageError

    with pytest.raises(UsageError, match=r"occupied 2 times and reject must name one occupation: "
                                         r"index 1: node N1, .* index 2: node N2"):
        pick_one(occ, 1001, 5002, None, None, what="reject")
    with pytest.raises(UsageError, match="has no occupation with index 3"):
        pick_one(occ, 1001, 5002, 3, None, what="reject")


def test_loader_numbers_against_the_previous_version(survey_arc, tmp_path):
    from tests.support.builders import survey_id

    sid = survey_id(survey_arc)
    (tmp_path / "p.csv").write_text("line,point,easting,northing\n1001,5002,583207,4062450\n")
    load_input(survey_arc, sid, "stations", tmp_path / "p.csv")
    v1 = ("node,line,point,deployed_utc,retrieved_utc\n"
          "N1,1001,5002,2025-04-07T12:00:00Z,2025-04-08T08:00:00Z\n"
          "N2,1001,5002,2025-04-08T10:00:00Z,\n")
    (tmp_path / "d1.csv").write_text(v1)
    first = load_input(survey_arc, sid, "deployments", tmp_path / "d1.csv")
    assert first.meta["occupations"] == {"occupations": 2, "reoccupied": 1, "max_index": 2,
                                         "retired": []}
    # the next evening's log: the earlier occupation was forgotten until now
    (tmp_path / "d2.csv").write_text(v1.replace("N2,1001,5002,2025-04-08T10:00:00Z,",
                                                "N2,1001,5002,2025-04-08T10:00:00Z,"
                                                "2025-04-09T08:00:00Z")
                                     + "N0,1001,5002,2025-04-05T12:00:00Z,"
                                       "2025-04-06T08:00:00Z\n")
    second = load_input(survey_arc, sid, "deployments", tmp_path / "d2.csv")
    assert second.meta["occupations"]["numbered_after_version"] == 1
    _, table = current_input(survey_arc, sid, "deployments")
    assert _numbers(table) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 2,
                               ("N0", 1001.0, 5002.0): 3}
    # a record removed from the log is kept as retired with the version, index and all
    (tmp_path / "d3.csv").write_text("node,line,point,deployed_utc,retrieved_utc\n"
                                     "N1,1001,5002,2025-04-07T12:00:00Z,2025-04-08T08:00:00Z\n")
    third = load_input(survey_arc, sid, "deployments", tmp_path / "d3.csv")
    assert sorted((g["node"], g["index"]) for g in third.meta["occupations"]["retired"]) == [
        ("N0", 3), ("N2", 2)]


def test_a_station_occupied_beyond_the_sps_digit_is_a_warning_and_beyond_int8_refused():
    rows = [(f"N{i}", 1001, 5002, 30.0 * i, 30.0 * i + 20.0) for i in range(10)]
    from archive.survey.occupations import occupation_warnings

    t = with_occupations(_log(rows))
    w = occupation_warnings(t)
    assert [x["code"] for x in w] == ["index-beyond-sps"] and "point index 10" in w[0]["message"]
    many = _log([(f"N{i}", 1001, 5002, 30.0 * i, 30.0 * i + 20.0) for i in range(130)])
    with pytest.raises(InputError, match="more than 127 occupations"):
        number_occupations(many, "deployments.csv")
    assert np.all(np.diff(with_occupations(_log(rows))["occupation"].to_numpy()) == 1)


def test_an_index_a_later_part_was_delivered_under_is_never_an_occupations():
    # 1001/5002 was occupied once by N1, which moved: its later part was delivered as
    # index 2 (docs/delivery.md, moved parts). A later log adds N2 there, once with no
    # index column (it would be 2) and once naming index 2 outright; and a log where a
    # single record at 1001/5003 names the index 3 a later part holds there.
    v1 = with_occupations(_log([("N1", 1001, 5002, 0.0, 20.0)]))
    kept = [{"line": 1001.0, "point": 5002.0, "occupation": 1, "index": 2},
            {"line": 1001.0, "point": 5003.0, "occupation": 1, "index": 3}]
    rows = [("N1", 1001, 5002, 0.0, 20.0), ("N2", 1001, 5002, 30.0, 50.0)]
    for index in (None, [1, 2]):
        t, _ = number_log(_log(rows, index), v1, later_parts=kept)
        assert _numbers(t) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 3}
    t, _ = number_log(_log([("N5", 1001, 5003, 0.0, 20.0)], [3]), None, later_parts=kept)
    assert _numbers(t) == {("N5", 1001.0, 5003.0): 4}
    # without kept indices the numbering is the plain rule
    t, _ = number_log(_log(rows), v1)
    assert _numbers(t) == {("N1", 1001.0, 5002.0): 1, ("N2", 1001.0, 5002.0): 2}
