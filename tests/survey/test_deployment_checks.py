"""Deployment log checks: each problem found with its line; strict refuses; mapping."""

from __future__ import annotations

import pytest

from archive.errors import InputError, Refused, UsageError
from archive.survey.inputs import current_input, list_inputs, load_input, survey_for

# common practice, no source: a node serial, a station, and the deployment window in UTC.
STATIONS = ("line,point,easting,northing\n"
            "1001,2001,612000,3890000\n1001,2002,612025,3890000\n1001,2003,612050,3890000\n")
HEAD = "node,line,point,deployed_utc,retrieved_utc\n"


def load(arc, tmp_path, text, name="dep.csv", **opts):
    p = tmp_path / name
    p.write_text(text)
    return load_input(arc, survey_for(arc).id, "deployments", p, **opts)


@pytest.fixture
def arc_pre(survey_arc, tmp_path):
    """The survey with a three-station preplot loaded."""
    p = tmp_path / "pre.csv"
    p.write_text(STATIONS)
    load_input(survey_arc, survey_for(survey_arc).id, "stations", p)
    return survey_arc


def codes(res):
    return [(w["line"], w["code"]) for w in res.warnings]


def test_clean_log_has_no_warnings(arc_pre, tmp_path):
    arc = arc_pre
    res = load(arc, tmp_path, HEAD +
               "KF-0001,1001,2001,2024-05-01T06:00:00Z,2024-05-05T06:00:00Z\n"
               # redeployed at the exact time it was retrieved: half-open windows, no overlap
               "KF-0001,1001,2002,2024-05-05T06:00:00Z,\n"
               "KF-0002,1001,2001,2024-05-05T06:00:00Z,2024-05-07T00:00:00Z\n", strict=True)
    assert res.warnings == []
    t = res.table
    assert t["retrieved"][1].as_py() is None  # still in the ground
    assert t["deployed"][0].as_py().isoformat() == "2024-05-01T06:00:00+00:00"


def test_unknown_station(arc_pre, tmp_path):
    arc = arc_pre
    res = load(arc, tmp_path, HEAD + "KF-0001,1001,2009,2024-05-01T06:00:00Z,\n")
    assert codes(res) == [(2, "unknown-station")]
    assert "line 1001 point 2009" in res.warnings[0]["message"]


def test_retrieved_before_deployed(arc_pre, tmp_path):
    arc = arc_pre
    res = load(arc, tmp_path, HEAD + "KF-0001,1001,2001,2024-05-03T06:00:00Z,2024-05-01T06:00:00Z\n")
    assert codes(res) == [(2, "retrieved-before-deployed")]


def test_overlapping_deployments_of_one_node(arc_pre, tmp_path):
    arc = arc_pre
    res = load(arc, tmp_path, HEAD +
               "KF-0001,1001,2001,2024-05-01T00:00:00Z,2024-05-10T00:00:00Z\n"
               "KF-0001,1001,2002,2024-05-02T00:00:00Z,2024-05-03T00:00:00Z\n"
               # overlaps line 2 (still open), not line 3 which ended before it started
               "KF-0001,1001,2003,2024-05-04T00:00:00Z,2024-05-05T00:00:00Z\n")
    assert codes(res) == [(3, "overlap"), (4, "overlap")]
    assert res.warnings[1]["message"].endswith("overlaps the one on line 2")
    assert "KF-0001" in res.warnings[0]["message"]


def test_station_occupied_by_two_nodes(arc_pre, tmp_path):
    arc = arc_pre
    res = load(arc, tmp_path, HEAD +
               "KF-0007,1001,2003,2024-05-01T00:00:00Z,\n"
               "KF-0008,1001,2003,2024-06-01T00:00:00Z,2024-06-02T00:00:00Z\n")
    assert codes(res) == [(3, "station-occupied")]
    assert "1001/2003" in res.warnings[0]["message"]


def test_strict_refuses_and_default_records(arc_pre, tmp_path):
    arc = arc_pre
    bad = HEAD + "KF-0001,1001,2009,2024-05-01T06:00:00Z,\n"
    with pytest.raises(Refused, match=r"dep\.csv:2: deployment at line 1001 point 2009"):
        load(arc, tmp_path, bad, strict=True)
    assert current_input(arc, survey_for(arc).id, "deployments") is None
    load(arc, tmp_path, bad)
    row = list_inputs(arc, survey_for(arc).id)[-1]
    assert row["kind"] == "deployments" and row["n_warnings"] == 1
    assert row["warnings"][0]["line"] == 2


def test_column_mapping_and_time_zones(arc_pre, tmp_path):
    arc = arc_pre
    text = ("Serial,Line,Station,Laid,Picked\n"
            "KF-0042,1001,2002,2024-05-01 06:00:00,2024-05-02T08:00:00-05:00\n")
    res = load(arc, tmp_path, text,
               columns="node=Serial,line=Line,point=Station,deployed_utc=Laid,retrieved_utc=Picked")
    t = res.table
    assert t["node"].to_pylist() == ["KF-0042"]
    assert t["deployed"][0].as_py().isoformat() == "2024-05-01T06:00:00+00:00"  # no offset: UTC
    assert t["retrieved"][0].as_py().isoformat() == "2024-05-02T13:00:00+00:00"
    assert res.meta["columns"]["node"] == "Serial"
    with pytest.raises(UsageError, match="unknown field 'serial'"):
        load(arc, tmp_path, text, columns="serial=Serial")
    with pytest.raises(InputError, match=r"missing column\(s\) Laid \(for deployed_utc\)"):
        load(arc, tmp_path, HEAD, columns="deployed_utc=Laid")


def test_unreadable_time_names_line_and_column(arc_pre, tmp_path):
    arc = arc_pre
    with pytest.raises(InputError) as err:
        load(arc, tmp_path, HEAD + "KF-0001,1001,2001,2024-05-01T06:00:00Z,\n"
                                   "KF-0002,1001,2002,05/01/24 6am,\n")
    e = err.value
    assert (e.line, e.columns) == (3, "deployed_utc") and "ISO 8601" in e.expected
    with pytest.raises(InputError, match="node serial is empty"):
        load(arc, tmp_path, HEAD + ",1001,2001,2024-05-01T06:00:00Z,\n")


def test_without_a_preplot_the_station_check_is_reported(survey_arc, tmp_path):
    res = load(survey_arc, tmp_path, HEAD + "KF-0001,1001,2001,2024-05-01T06:00:00Z,\n")
    assert codes(res) == [(None, "no-stations")]


def test_a_record_repeated_field_for_field_is_kept_once(arc_pre, tmp_path):
    # A row copied twice (an export glitch, a paste) is one occupation: loaded as two, the
    # station would be solved and delivered twice under two indices.
    rows = ["KF-0001,1001,2001,2024-05-01T06:00:00Z,2024-05-05T06:00:00Z\n",
            "KF-0002,1001,2002,2024-05-01T06:10:00Z,\n"]
    res = load(arc_pre, tmp_path, HEAD + rows[0] + rows[1] + rows[0] + rows[1] + rows[1])
    assert codes(res) == [(4, "repeated-record"), (5, "repeated-record"),
                          (6, "repeated-record")]
    assert [w["message"].split(" field")[0] for w in res.warnings] == [
        "this record repeats the one on line 2", "this record repeats the one on line 3",
        "this record repeats the one on line 3"]
    t = res.table
    assert t.num_rows == 2 and t["src_line"].to_pylist() == [2, 3]
    assert t["occupation"].to_pylist() == [1, 1]
    # the same node at the same station later, or with another retrieval, is not a repeat
    res = load(arc_pre, tmp_path, HEAD + rows[0]
               + "KF-0001,1001,2001,2024-05-01T06:00:00Z,2024-05-05T07:00:00Z\n", name="b.csv")
    assert "repeated-record" not in {w["code"] for w in res.warnings}
    assert res.table.num_rows == 2
    with pytest.raises(Refused, match="repeats the one on line 2"):
        load(arc_pre, tmp_path, HEAD + rows[0] + rows[0], name="c.csv", strict=True)
