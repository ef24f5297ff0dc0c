"""Incremental deliveries: only the records new or changed since an earlier delivery, with
their reasons in the lineage, on a solved invented survey."""

from __future__ import annotations

import json
import math

import pyarrow as pa
import pytest

from archive.deliver.changes import compare_final, overlay
from archive.deliver.deliveries import deliver
from archive.deliver.final import final_positions
from archive.edits.decisions import reject_station, set_height, set_position, undo
from archive.errors import Refused, UsageError
from archive.lineage.where import where
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run
from tests.support.cli import invoke
from tests.support.delivery_tables import read_sps_r
from tests.support.scenarios import scenario_archive

PROCESSING = "Harrow Basin Energy processing centre"


@pytest.fixture(scope="module")
def solved(tmp_path_factory):
    base = tmp_path_factory.mktemp("changed")
    arc, sid, run_id, _sc = scenario_archive(base, seed=31, size="small", dem=True)
    rows = [r for r in run_occupations(arc, get_run(arc, sid, run_id)).to_pylist()
            if r["kind"] == "logged" and r["delivered"]]
    stations = []
    for r in rows:  # three different stations, each occupied once
        key = (r["line"], r["point"])
        if key not in [s[:2] for s in stations] and sum(
                1 for q in rows if (q["line"], q["point"]) == key) == 1:
            stations.append((r["line"], r["point"], int(r["occupation"]), r))
        if len(stations) == 3:
            break
    yield arc, sid, run_id, base, stations
    arc.close()


def test_incremental_delivery_writes_only_changes_with_reasons(solved):
    arc, sid, run_id, base, stations = solved
    (la, pa_, ia, ra), (lb, pb, ib, rb), (lc, pc_, ic, _rc) = stations
    rejected = reject_station(arc, sid, lc, pc_, ic, reason="node found in a puddle")
    first = deliver(arc, sid, run_id, "csv", base / "day1.csv", PROCESSING, allow_flags=True)
    n_first = first.n_records

    # the evening's work: a levelled height, a position from given coordinates 3 m east of
    # the solution, the rejected station restored
    set_height(arc, sid, la, pa_, ia, height=412.75, reason="levelled by the crew")
    set_position(arc, sid, lb, pb, ib, reason="re-surveyed with RTK", easting=rb["easting"] + 3.0,
                 northing=rb["northing"])
    undo(arc, sid, rejected.id, reason="the node was fine after all")

    second = deliver(arc, sid, run_id, "sps", base / "day2.sps", PROCESSING, allow_flags=True,
                     changed_since=first.delivery_id)
    rows = read_sps_r((base / "day2.sps").read_text())
    assert sorted((r["line"], r["point"], r["index"]) for r in rows) == sorted(
        [(la, pa_, ia), (lb, pb, ib), (lc, pc_, ic)])
    changes = {(c["line"], c["point"]): c for c in second.changes["records"]}
    assert changes[(la, pa_)]["reasons"] == ["height", "edited"]
    assert changes[(la, pa_)]["height_change_m"] == pytest.approx(
        abs(412.75 - ra["height"]), abs=1e-4)
    assert "position" in changes[(lb, pb)]["reasons"]
    assert changes[(lb, pb)]["shift_m"] == pytest.approx(3.0, abs=1e-6)
    assert changes[(lc, pc_)]["reasons"] == ["new"]
    assert second.changes["unchanged"] == n_first - 2  # a and b were in the first file

    lineage = json.loads((base / "day2.sps.lineage.json").read_text())
    assert lineage["changed_since"]["delivery"] == first.delivery_id
    assert lineage["delivery"]["n_records"] == 3
    counts = lineage["changed_since"]["counts"]
    assert (counts["new"], counts["position"], counts["edited"]) == (1, 1, 2)
    assert {(r["line"], r["point"]) for r in lineage["changed_since"]["records"]} == set(changes)

    # where names the incremental delivery for a record it carries, like any other
    found = where(arc, sid, la, pa_, ia)
    assert found["delivered"]["id"] == second.delivery_id
    assert found["delivered"]["height"] == pytest.approx(412.75)
    assert [h["id"] for h in found["occupations"][0]["history"]] == [first.delivery_id,
                                                                     second.delivery_id]

    # against the incremental delivery itself: nothing changed since (the chain is rebuilt,
    # not compared with the three records it wrote)
    with pytest.raises(Refused, match=f"nothing is new or changed since delivery "
                                      f"{second.delivery_id}"):
        deliver(arc, sid, run_id, "csv", base / "day3.csv", PROCESSING, allow_flags=True,
                changed_since=second.delivery_id)
    assert not (base / "day3.csv").exists()


def test_unknown_delivery_refused(solved):
    arc, sid, run_id, base, _ = solved
    with pytest.raises(UsageError, match="delivery 999 is not a delivery of this survey"):
        deliver(arc, sid, run_id, "csv", base / "x.csv", PROCESSING, allow_flags=True,
                changed_since=999)


def test_compare_and_overlay_round_trip(solved):
    """Laying an incremental delivery's records over the earlier state gives the current
    final table, whatever changed; removed records go."""
    arc, sid, run_id, _base, _ = solved
    cur = final_positions(arc, sid, get_run(arc, sid, run_id))
    east = cur.column("easting").to_numpy().copy()
    east[::5] += 0.5
    old = cur.set_column(cur.schema.get_field_index("easting"), "easting", pa.array(east))
    old = old.slice(0, old.num_rows - 2)  # the last two records are new today
    ch = compare_final(old, cur, since=1)
    assert ch.table.num_rows == math.ceil((cur.num_rows - 2) / 5) + 2
    assert overlay(old, ch.table, []).equals(cur)
    # and a record dropped today is listed as removed
    gone = compare_final(cur, cur.slice(1), since=1)
    assert gone.table.num_rows == 0 and len(gone.removed) == 1


def test_cli_changed_since(solved, runner):
    arc, sid, run_id, base, stations = solved
    la, pa_, ia, _ = stations[0]
    res = invoke(runner, arc.root, "deliver", "--format", "csv", "--to", str(base / "c1.csv"),
                 "--recipient", PROCESSING, "--allow-flags", "--json")
    assert res.exit_code == 0, res.output
    d1 = json.loads(res.output)["delivery_id"]
    set_height(arc, sid, la, pa_, ia, height=399.5, reason="levelled again")
    res = invoke(runner, arc.root, "deliver", "--format", "csv", "--to", str(base / "c2.csv"),
                 "--recipient", PROCESSING, "--allow-flags", "--changed-since", str(d1))
    assert res.exit_code == 0, res.output
    assert f"only what changed since delivery {d1}: 1 record(s)" in res.output
    assert "height changed" in res.output
    assert len((base / "c2.csv").read_text().splitlines()) == 2  # header + the one record


def test_changes_since_a_merged_delivery_keep_its_mode(solved):
    arc, sid, run_id, base, _ = solved
    merged = deliver(arc, sid, run_id, "csv", base / "m1.csv", PROCESSING, allow_flags=True,
                     merge_occupations=True)
    with pytest.raises(UsageError, match="made with --merge-occupations"):
        deliver(arc, sid, run_id, "csv", base / "m2.csv", PROCESSING, allow_flags=True,
                changed_since=merged.delivery_id)
    assert not (base / "m2.csv").exists()
    with pytest.raises(Refused, match="nothing is new or changed"):  # same mode: same records
        deliver(arc, sid, run_id, "csv", base / "m3.csv", PROCESSING, allow_flags=True,
                changed_since=merged.delivery_id, merge_occupations=True)


def test_older_tables_and_grids_in_feet(solved):
    """A delivered table from before occupations had windows (no deployed/retrieved, two
    records under one key) compares without error; a grid in US survey feet is compared in
    metres (1 US ft = 1200/3937 m, the US survey foot's definition)."""
    arc, sid, run_id, _base, _ = solved
    cur = final_positions(arc, sid, get_run(arc, sid, run_id))
    old = cur.drop_columns(["deployed", "retrieved"])
    old = pa.concat_tables([old.slice(0, 1), old])  # a key twice, as older tables could
    ch = compare_final(old, cur, since=1)
    assert ch.table.num_rows == cur.num_rows  # every record: its window is new ("time")
    assert all(r["reasons"] == ["time"] for r in ch.records)
    east = cur.column("easting").to_numpy().copy()
    east[0] += 1.0  # one grid unit
    moved = cur.set_column(cur.schema.get_field_index("easting"), "easting", pa.array(east))
    us_foot = 1200 / 3937
    ch = compare_final(cur, moved, since=1, tolerance=0.31, unit_factor=us_foot)
    assert ch.table.num_rows == 0  # 0.3048 m is under 0.31 m
    ch = compare_final(cur, moved, since=1, tolerance=0.30, unit_factor=us_foot)
    assert ch.records[0]["shift_m"] == pytest.approx(us_foot, abs=1e-4)


def test_an_acknowledgement_is_a_change_said_as_such(solved, tmp_path):
    from archive.deliver.changes import describe
    from archive.review.acknowledge import ack_flag

    arc, sid, run_id, base, _stations = solved
    flagged = next(r for r in run_occupations(arc, get_run(arc, sid, run_id)).to_pylist()
                   if r["kind"] == "logged" and r["delivered"] and r["flags"]
                   and r["part"] == 0)
    flag = flagged["flags"].split(";")[0]
    first = deliver(arc, sid, run_id, "csv", tmp_path / "before.csv", PROCESSING,
                    allow_flags=True)
    ack_flag(arc, sid, flagged["line"], flagged["point"], int(flagged["occupation"]), flag=flag,
             reason="seen on the evening review")
    second = deliver(arc, sid, run_id, "csv", tmp_path / "after.csv", PROCESSING,
                     allow_flags=True, changed_since=first.delivery_id)
    [change] = [c for c in second.changes["records"]
                if (c["line"], c["point"]) == (flagged["line"], flagged["point"])]
    # the open flags lose the one acknowledged, which the acknowledged ones gain
    assert change["reasons"] == ["flags"]
    rest = ";".join(f for f in flagged["flags"].split(";") if f != flag)
    assert (change["flags_was"], change["flags"]) == (flagged["flags"], rest)
    assert (change["flags_acknowledged_was"] or "", change["flags_acknowledged"]) == ("", flag)
    assert describe(change).endswith(f"flags {flagged['flags']} -> {rest or '-'}, "
                                     f"acknowledged - -> {flag}")
