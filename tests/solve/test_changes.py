"""The daily loop's questions, answered from the catalog and the runs' result keys: what
awaits harvest, which logged nodes have no deployment, what changed since a run.

Expected values come from the crew's own files (the deployment log CSV and the log file
names), not from the functions' own rules."""

from __future__ import annotations

import csv

import pyarrow.compute as pc
import pytest

from archive.ingest.load import load_fix_files
from archive.solve.changes import changed_stations, deployment_keys, inputs_changed_since
from archive.solve.run import solve_survey
from archive.survey.status import harvest_status
from tests.support.scenarios import harvest_in_progress

pytestmark = pytest.mark.slow


def test_status_and_changes_through_a_harvest(tmp_path, db_url):
    arc, sid, sc, loaded, waiting = harvest_in_progress(tmp_path, seed=23, every=3,
                                                        db_url=db_url)
    with sc.deployments.open(newline="") as f:
        log = list(csv.DictReader(f))
    out_nodes = {p.stem for p in waiting}

    st = harvest_status(arc, sid)
    assert {(a["line"], a["point"], a["node"]) for a in st["awaiting"]} == {
        (float(r["line"]), float(r["point"]), r["node"]) for r in log if r["node"] in out_nodes}
    assert st["counts"]["n_logs"] == len(loaded)
    assert st["counts"]["n_nodes"] == len({p.stem for p in loaded})
    assert st["counts"]["n_deployments"] == len(log)
    assert st["nodes_without_deployment"] == []
    assert st["counts"]["n_awaiting"] == len(st["awaiting"])
    assert st["counts"]["n_awaiting_nodes"] == len({a["node"] for a in st["awaiting"]})
    few = harvest_status(arc, sid, limit=2)  # a screen's list: the first ones, same counts
    assert few["awaiting"] == st["awaiting"][:2] and few["counts"] == st["counts"]

    first = solve_survey(arc, sid)
    assert inputs_changed_since(arc, sid)["changed"] is False
    keys = deployment_keys(arc, sid)
    assert set(keys["solved_by"].to_pylist()) == {first.run_id}
    assert keys["key"].null_count == 0

    # one more node comes in, and a log of a serial the deployment log does not know
    stray = tmp_path / "stray"
    stray.mkdir()
    lines = waiting[0].read_bytes().splitlines(keepends=True)
    (stray / "999999.nmea").write_bytes(b"".join(lines[: len(lines) // 2]))  # other bytes
    load_fix_files(arc, sid, [waiting[0], stray / "999999.nmea"], workers=1)
    st = harvest_status(arc, sid)
    assert waiting[0].stem not in {a["node"] for a in st["awaiting"]}
    assert [o["node"] for o in st["nodes_without_deployment"]] == ["999999"]
    ch = inputs_changed_since(arc, sid, first.run_id)
    assert ch["changed"] is True
    assert ch["nodes"] == {"changed": [waiting[0].stem], "added": ["999999"], "removed": []}

    second = solve_survey(arc, sid)
    moved_on = changed_stations(arc, sid, first.run_id, second.run_id)
    # the node harvested (and the stray one, should it sit at a station) changed, no other
    assert waiting[0].stem in moved_on["node"].to_pylist()
    assert set(moved_on["node"].to_pylist()) <= {waiting[0].stem, "999999"}
    assert pc.all(pc.equal(moved_on["solved_by"], second.run_id)).as_py()
    arc.close()
