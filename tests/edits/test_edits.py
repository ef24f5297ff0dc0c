"""Edits: validation, superseding, undo, and their effect on final positions."""

from __future__ import annotations

import json

import pyarrow.compute as pc
import pytest
from pyproj import Transformer
from sqlalchemy import select

from archive.deliver.final import final_positions, unacknowledged_flags
from archive.edits import decisions as ed
from archive.edits.log import list_edits
from archive.errors import UsageError
from archive.review.acknowledge import ack_flag
from archive.store.models import Edit, LedgerEvent
from archive.store.verify import verify_archive
from tests.support.builders import delivery_archive


@pytest.fixture
def setup(survey_arc, tmp_path):
    flags = ["", "far-from-plan;moved", "", "", "", "", "", ""]
    sid, final, run, _ = delivery_archive(survey_arc, tmp_path, flags=flags)
    return survey_arc, sid, final, run


def _row(table, line, point):
    m = pc.and_(pc.equal(table["line"], line), pc.equal(table["point"], point))
    rows = table.filter(m).to_pylist()
    return rows[0] if rows else None


def test_every_edit_is_ledgered_with_its_row(setup):
    arc, sid, _final, _run = setup
    e = ed.reject_station(arc, sid, 1001, 2003, reason="node found in a puddle")
    assert e.created_by == "tester" and e.created_at.tzinfo is not None
    with arc.session() as s:
        ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
    assert ev.action == "edit.reject-station" and f'"key":"{e.id}"' in ev.payload
    assert verify_archive(arc).ok


def test_refusals_have_clear_messages(setup):
    arc, sid, _final, _run = setup
    with pytest.raises(UsageError, match="needs a reason"):
        ed.reject_station(arc, sid, 1001, 2001, reason="  ")
    with pytest.raises(UsageError, match=r"unknown station 1009/2001.*not in the preplot"):
        ed.reject_station(arc, sid, 1009, 2001, reason="typo test")
    with pytest.raises(UsageError, match="no edit 999"):
        ed.undo(arc, sid, 999, reason="nothing")
    with pytest.raises(UsageError, match="unknown flag"):
        ack_flag(arc, sid, 1001, 2002, flag="wobbly", reason="x")
    with pytest.raises(UsageError, match="no check point at station 1001/2004"):
        ed.set_position(arc, sid, 1001, 2004, source="control", reason="x")
    with pytest.raises(UsageError, match="ends .* before it starts"):
        ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-12T00:00:00Z",
                        end="2024-03-11T00:00:00Z", reason="x")
    with pytest.raises(UsageError, match="start 'noon' is not an ISO 8601 date or time"):
        ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="noon",
                        end="2024-03-13T00:00:00Z", reason="x")
    # one rule for times everywhere (archive.times): no zone means UTC, an offset converts
    e = ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-12T00:00:00",
                        end="2024-03-12T03:00:00+02:00", reason="x")
    assert json.loads(e.payload)["start"] == "2024-03-12T00:00:00+00:00"
    assert json.loads(e.payload)["end"] == "2024-03-12T01:00:00+00:00"
    ed.undo(arc, sid, e.id, reason="test done")
    u = ed.undo(arc, sid, ed.reject_station(arc, sid, 1001, 2001, reason="a").id, reason="b")
    with pytest.raises(UsageError, match="itself an undo"):
        ed.undo(arc, sid, u.id, reason="c")


def test_supersede_and_undo(setup):
    arc, sid, _final, run = setup
    a = ed.set_position(arc, sid, 1001, 2001, source="given", easting=612000.5,
                        northing=3512000.25, reason="stake found by the crew")
    b = ed.set_position(arc, sid, 1001, 2001, source="preplot", reason="crew stake was wrong")
    assert b.supersedes == a.id
    live = list_edits(arc, sid)
    assert [e["id"] for e in live] == [b.id]
    with pytest.raises(UsageError, match=rf"edit {a.id} is no longer in force: edit {b.id} "
                                         r"\(set-position\) superseded it") as exc:
        ed.undo(arc, sid, a.id, reason="too late")
    assert exc.value.hint == "undo that edit instead"
    ed.undo(arc, sid, b.id, reason="back to the solver")
    assert list_edits(arc, sid) == []
    assert len(list_edits(arc, sid, all_edits=True)) == 3
    final = final_positions(arc, sid, run)
    assert _row(final, 1001, 2001)["source"] == "solver"


def test_final_positions_apply_edits(setup):
    arc, sid, final_in, run = setup
    pos = ed.set_position(arc, sid, 1001, 2001, source="control", reason="RTK shot on sensor")
    hgt = ed.set_height(arc, sid, 1001, 2001, source="given", height=401.25,
                        reason="levelled by the crew")
    ed.reject_station(arc, sid, 1001, 2003, reason="node in a cattle trough")
    ack = ack_flag(arc, sid, 1001, 2002, flag="moved", reason="moved 3 m by a cow, later "
                      "part is correct")
    final = final_positions(arc, sid, run)
    assert final.num_rows == final_in.num_rows - 1
    assert _row(final, 1001, 2003) is None
    r = _row(final, 1001, 2001)
    # check point = solver input easting + 0.4, northing - 0.2 (tests/deliver/builders.py)
    e0, n0 = _row(final_in, 1001, 2001)["easting"], _row(final_in, 1001, 2001)["northing"]
    assert r["easting"] == pytest.approx(e0 + 0.4, abs=1e-3)
    assert r["northing"] == pytest.approx(n0 - 0.2, abs=1e-3)
    assert r["sigma_e"] == pytest.approx(0.02) and r["r95"] is None
    assert r["height"] == 401.25 and r["height_source"] == "given"
    assert r["source"] == f"edit:{pos.id};edit:{hgt.id};node:deployed"
    # lat/lon follow the edited grid coordinates (pyproj reference)
    lon, lat = Transformer.from_crs(32614, 4326, always_xy=True).transform(r["easting"],
                                                                           r["northing"])
    assert (r["lon"], r["lat"]) == pytest.approx((lon, lat), abs=1e-10)
    f = _row(final, 1001, 2002)
    assert f["flags"] == "far-from-plan" and f["flags_acknowledged"] == "moved"
    assert f["source"] == "solver"  # an acknowledgement does not change values
    assert unacknowledged_flags(final) == {"far-from-plan": 1}
    # the edit records the occupation it names (node and logged window)
    assert json.loads(ack.payload) == {"flag": "moved", "occupation": {
        "node": "N5001", "deployed": "2024-03-10T00:00:00+00:00",
        "retrieved": "2024-03-14T12:00:00+00:00"}}
    # as of before the edits: the solver's values
    before = final_positions(arc, sid, run, as_of=pos.created_at.replace(year=2000))
    assert _row(before, 1001, 2001)["source"] == "solver"


def test_exclude_spans_accumulate(setup):
    arc, sid, _final, _run = setup
    a = ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-11T00:00:00Z",
                        end="2024-03-11T02:00:00Z", reason="carried by the crew")
    b = ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-12T00:00:00Z",
                        end="2024-03-12T01:00:00Z", reason="flooded")
    assert b.supersedes is None
    assert {e["id"] for e in list_edits(arc, sid)} == {a.id, b.id}
    with arc.session() as s:
        assert s.get(Edit, a.id).payload.startswith('{"end":"2024-03-11T02:00:00+00:00"')


def test_undo_of_an_undone_edit_says_what_to_do(setup):
    arc, sid, _final, _run = setup
    rej = ed.reject_station(arc, sid, 1001, 2001, reason="node in a puddle")
    u = ed.undo(arc, sid, rej.id, reason="puddle dried")
    with pytest.raises(UsageError, match=f"edit {rej.id} was already undone by edit {u.id}") as e:
        ed.undo(arc, sid, rej.id, reason="again")
    assert "new reject-station edit" in e.value.hint and "undo that" not in e.value.hint


def test_ack_of_a_flag_the_station_does_not_carry_is_refused(setup):
    arc, sid, _final, _run = setup
    # 1001/2002 carries far-from-plan;moved in the newest run (fixture), 1001/2001 none
    with pytest.raises(UsageError, match=r"1001/2002 index 1 does not carry flag 'short-span'.*"
                                         r"carries: far-from-plan, moved"):
        ack_flag(arc, sid, 1001, 2002, flag="short-span", reason="x")
    with pytest.raises(UsageError, match=r"1001/2001 index 1 does not carry flag 'moved'.*no flags"):
        ack_flag(arc, sid, 1001, 2001, flag="moved", reason="x")
    assert list_edits(arc, sid) == []
    assert ack_flag(arc, sid, 1001, 2002, flag="moved", reason="cow").kind == "ack-flag"


def test_ack_before_any_run_says_solve_first(survey_arc, tmp_path):
    from tests.support.builders import load_stations, survey_id
    from tests.support.delivery_tables import final_table

    load_stations(survey_arc, tmp_path, final_table(4))
    with pytest.raises(UsageError, match="no solution run yet") as e:
        ack_flag(survey_arc, survey_id(survey_arc), 1001, 2001, flag="moved", reason="x")
    assert "solve first" in e.value.hint


def test_exclude_that_could_have_no_effect_is_refused(setup):
    arc, sid, _final, _run = setup
    # deployments (builders.load_stations): N5000 at 1001/2001 from 2024-03-10 to 03-14 12:00
    with pytest.raises(UsageError, match=r"node N5003 was never deployed at station 1001/2001; "
                                         r"occupations there: index 1: node N5000, "
                                         r"2024-03-10T00:00:00Z to 2024-03-14T12:00:00Z"):
        ed.exclude_span(arc, sid, 1001, 2001, node="N5003", start="2024-03-11T00:00:00Z",
                        end="2024-03-11T02:00:00Z", reason="wrong node")
    with pytest.raises(UsageError, match=r"overlaps no deployment of node N5000 at station "
                                         r"1001/2001; occupations there: index 1: node N5000, "
                                         r"2024-03-10"):
        ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-14T12:00:00Z",
                        end="2024-03-15T00:00:00Z", reason="after retrieval")
    assert list_edits(arc, sid) == []
    # touching the window by one microsecond is an overlap (half-open [deployed, retrieved))
    ok = ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-09T00:00:00Z",
                         end="2024-03-10T00:00:00.000001Z", reason="carried at deployment")
    assert ok.kind == "exclude-span"
    # the last node is still deployed: any span after its deployment overlaps
    assert ed.exclude_span(arc, sid, 1002, 2004, node="N5007", start="2025-01-01T00:00:00Z",
                           end="2025-01-02T00:00:00Z", reason="late").kind == "exclude-span"


def test_an_edit_names_one_occupation_on_both_backends(any_survey_arc, tmp_path):
    """A station laid out twice: an edit without --index/--node is refused with the list of
    occupations; with one it lands on that occupation only (SQLite and PostgreSQL)."""
    from archive.survey.inputs import load_input
    from tests.support.builders import survey_id

    arc = any_survey_arc
    sid = survey_id(arc)
    (tmp_path / "p.csv").write_text("line,point,easting,northing,index\n"
                                    "1001,2002,612370,3512345,1\n"
                                    "1001,2002,612380,3512345,2\n")  # index 2 never laid
    load_input(arc, sid, "stations", tmp_path / "p.csv")
    (tmp_path / "d.csv").write_text(
        "node,line,point,deployed_utc,retrieved_utc\n"
        "N5001,1001,2002,2024-03-10T00:00:00Z,2024-03-12T00:00:00Z\n"
        "N5009,1001,2002,2024-03-12T03:00:00Z,\n")
    load_input(arc, sid, "deployments", tmp_path / "d.csv")
    with pytest.raises(UsageError, match=r"station 1001/2002 was occupied 2 times and reject "
                                         r"must name one occupation: index 1: node N5001, "
                                         r"2024-03-10T00:00:00Z to 2024-03-12T00:00:00Z; "
                                         r"index 3: node N5009, 2024-03-12T03:00:00Z to "
                                         r"still deployed"):
        ed.reject_station(arc, sid, 1001, 2002, reason="flooded")
    e = ed.reject_station(arc, sid, 1001, 2002, node="N5009", reason="flooded")
    assert json.loads(e.payload)["occupation"]["node"] == "N5009"
    h = ed.set_height(arc, sid, 1001, 2002, 1, height=401.0, reason="levelled")
    assert h.point_index == 1
    # the second occupation of index 1 kept clear of the preplot's index 2 (it is 3), so the
    # never-deployed station 1001/2002 index 2 can still be edited under its own index
    assert e.point_index == 3
    p = ed.set_position(arc, sid, 1001, 2002, 2, source="preplot", reason="not laid out")
    assert p.point_index == 2 and json.loads(p.payload)["easting"] == 612380.0
    assert [(x["kind"], x["index"]) for x in list_edits(arc, sid)] == [
        ("reject-station", 3), ("set-height", 1), ("set-position", 2)]
    assert verify_archive(arc).ok
