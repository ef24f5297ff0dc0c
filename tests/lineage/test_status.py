"""``status`` on an invented survey harvested over two evenings: its numbers against the
scenario's own files (the deployment log read with pandas, the fix tables read with
pyarrow), not against the code under test."""

from __future__ import annotations

import json
import shutil

import pandas as pd
import pyarrow.compute as pc
import pytest
from sqlalchemy import select

from archive.deliver.deliveries import deliver
from archive.edits.decisions import set_height
from archive.ingest.load import load_fix_files
from archive.lineage.status import survey_status
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run, solve_survey
from archive.store.archive import Archive
from archive.store.models import RawFile
from archive.survey.inputs import load_input
from archive.survey.surveys import create_survey
from tests.support.cli import invoke

HELD = 3  # nodes still in the ground on the first evening
STRAY = "999999"  # a node whose log came in but that the deployment log never names


@pytest.fixture(scope="module")
def evening(tmp_path_factory):
    from archive.seeds.scenario import generate

    base = tmp_path_factory.mktemp("status")
    sc = generate(base / "scenario", seed=47, size="small")
    logs = sorted((sc.out_dir / "logs").iterdir())
    first, later = base / "first", base / "later"
    first.mkdir()
    later.mkdir()
    for p in logs[HELD:]:
        shutil.copy(p, first / p.name)
    for p in logs[:HELD]:
        shutil.copy(p, later / p.name)
    stray = logs[-1].read_bytes().split(b"\n", 5)[-1]  # another node's fixes, other bytes
    (first / f"{STRAY}.nmea").write_bytes(stray)

    arc = Archive.init(base / "archive", actor="tester")
    sid = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}",
                        vertical_datum=sc.vertical_datum).id
    load_input(arc, sid, "stations", sc.preplot)
    load_input(arc, sid, "deployments", sc.deployments)
    load_fix_files(arc, sid, [first])
    deployments = pd.read_csv(sc.deployments, dtype={"node": str})
    held = {p.stem for p in logs[:HELD]}
    yield arc, sid, base, later, deployments, held
    arc.close()


def _fixes_in_tables(arc: Archive, sid: int) -> int:
    with arc.session() as s:
        hashes = s.scalars(select(RawFile.fixes_hash).where(RawFile.survey_id == sid,
                                                            RawFile.fixes_hash.is_not(None))).all()
    return sum(arc.objects.read_table(h).num_rows for h in hashes)


def test_status_over_two_evenings(evening, runner):
    arc, sid, base, later, deployments, held = evening
    first_run = solve_survey(arc, sid).run_id

    st = survey_status(arc, sid)
    n_logs = len(list((base / "first").iterdir()))
    assert st.loaded["n_logs"] == n_logs and st.loaded["n_nodes"] == n_logs
    assert st.loaded["n_fixes"] == _fixes_in_tables(arc, sid)
    expected_awaiting = deployments[deployments["node"].isin(held)]
    assert st.awaiting_harvest["deployments"] == len(expected_awaiting)
    assert {d["node"] for d in st.awaiting_harvest["list"]} == held
    assert [n["node"] for n in st.nodes_without_deployment["list"]] == [STRAY]
    with arc.session() as s:  # its log and fix counts, as the catalog has them
        stray_rows = s.scalars(select(RawFile).where(RawFile.node == STRAY)).all()
    assert st.nodes_without_deployment["list"][0]["n_logs"] == len(stray_rows) > 0
    assert st.nodes_without_deployment["list"][0]["n_fixes"] == sum(
        r.n_fixes for r in stray_rows) > 0
    assert st.run["id"] == first_run and st.run["up_to_date"]
    assert st.delivery is None and "nothing delivered yet" in st.notes
    # review counts are stations (occupations: both parts of a moved node are one) whose
    # delivered record carries a flag, none decided yet
    occ = run_occupations(arc, get_run(arc, sid, first_run))
    flagged = occ.filter(pc.and_(pc.and_(occ["delivered"], pc.equal(occ["kind"], "logged")),
                                 pc.not_equal(occ["flags"], "")))
    stations = {(r["line"], r["point"], r["occupation"])
                for r in flagged.select(["line", "point", "occupation"]).to_pylist()}
    assert st.review["n_waiting"] == len(stations) > 0 and st.review["n_decided"] == 0

    # the first evening's delivery holds back what is still in the ground
    day1 = deliver(arc, sid, first_run, "csv", base / "day1.csv",
                   "Harrow Basin Energy processing", allow_flags=True)
    assert {a["node"] for a in day1.awaiting} == held

    # the second evening: the rest is harvested
    load_fix_files(arc, sid, [later])
    st = survey_status(arc, sid)
    assert st.awaiting_harvest["deployments"] == 0
    assert not st.run["up_to_date"]
    assert f"{HELD} log(s) loaded since" in st.run["inputs_changed"]

    run_id = solve_survey(arc, sid).run_id
    st = survey_status(arc, sid)
    assert st.delivery["since"]["new"] == len(expected_awaiting)
    # the evening's incremental delivery: what was held back yesterday comes as new records
    day2 = deliver(arc, sid, run_id, "csv", base / "day2.csv", "Harrow Basin Energy processing",
                   allow_flags=True, changed_since=day1.delivery_id)
    new = {(c["node"], c["line"], c["point"]) for c in day2.changes["records"]
           if c["reasons"] == ["new"]}
    assert new == {(str(r.node), float(r.line), float(r.point))
                   for r in expected_awaiting.itertuples()}
    res = deliver(arc, sid, run_id, "csv", base / "day.csv", "Harrow Basin Energy processing",
                  allow_flags=True)
    row = next(r for r in run_occupations(arc, get_run(arc, sid, run_id)).to_pylist()
               if r["kind"] == "logged" and r["delivered"])
    set_height(arc, sid, row["line"], row["point"], int(row["occupation"]), height=455.0,
               reason="levelled by the crew")
    st = survey_status(arc, sid)
    assert st.run["up_to_date"]
    since = st.delivery["since"]
    assert st.delivery["id"] == res.delivery_id
    assert (since["records"], since["height"], since["edited"], since["new"],
            since["moved"]) == (1, 1, 1, 0, 0)
    assert since["unchanged"] == res.n_records - 1

    out = invoke(runner, arc.root, "status", "--json")
    assert out.exit_code == 0, out.output
    doc = json.loads(out.output)
    assert doc["delivery"]["since"]["edited"] == 1
    assert doc["nodes_without_deployment"]["nodes"] == 1
    text = invoke(runner, arc.root, "status").output
    assert "0 deployment(s) of 0 node(s) awaiting harvest" in text
    assert f"1 logged node(s) without a deployment: {STRAY}" in text
    assert f"--changed-since {res.delivery_id}' writes those 1 record(s)" in text


def test_status_counts_on_both_catalogs(any_arc, tmp_path):
    """The catalog counts and harvest state agree on SQLite and PostgreSQL (times come back
    as text from one and as timestamps from the other)."""
    from archive.seeds.scenario import generate

    sc = generate(tmp_path / "scenario", seed=53, size="small")
    logs = sorted((sc.out_dir / "logs").iterdir())[:5]
    sid = create_survey(any_arc, sc.survey_name, f"EPSG:{sc.epsg}").id
    load_input(any_arc, sid, "stations", sc.preplot)
    load_input(any_arc, sid, "deployments", sc.deployments)
    load_fix_files(any_arc, sid, logs, workers=1)
    st = survey_status(any_arc, sid)
    deployments = pd.read_csv(sc.deployments, dtype={"node": str})
    loaded = {p.stem for p in logs}
    assert st.loaded["n_logs"] == 5 and st.loaded["n_fixes"] == _fixes_in_tables(any_arc, sid)
    assert st.awaiting_harvest["deployments"] == int((~deployments["node"].isin(loaded)).sum())
    assert st.nodes_without_deployment["nodes"] == 0
    assert st.run is None and "no run yet: 'nodekeep solve' makes one" in st.notes
