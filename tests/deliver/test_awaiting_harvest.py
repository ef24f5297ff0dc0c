"""A survey half harvested: deployments whose node's log is not loaded yet await harvest.

They are not solved and not flagged, a delivery succeeds without any edit and holds them
back (it says how many and which, and its lineage manifest lists them); once their logs are
loaded the next solve positions them and the next delivery includes them. That a node's
fixes can only be read out once it is picked up (harvested) is common practice, no source.
"""

from __future__ import annotations

import csv
import json
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pytest

from archive.ingest.load import load_fix_files
from archive.solve.run import get_run, run_positions, solve_survey
from tests.support.cli import invoke
from tests.support.scenarios import harvest_in_progress

pytestmark = pytest.mark.slow


def _deployed(deployments: Path) -> set[tuple[float, float, str]]:
    """(line, point, node) of every record, read straight from the crew's deployment log."""
    with deployments.open(newline="") as f:
        return {(float(r["line"]), float(r["point"]), r["node"]) for r in csv.DictReader(f)}


def _csv_records(path: Path) -> set[tuple[float, float, str]]:
    """(line, point, node) of every record of a delivered CSV."""
    with path.open(newline="") as f:
        rows = [r for r in f if not r.startswith("#")]
    return {(float(r["line"]), float(r["point"]), r["node"]) for r in csv.DictReader(rows)}


def test_half_harvested_survey_delivers_and_holds_back(tmp_path, runner):
    arc, sid, sc, loaded, waiting = harvest_in_progress(tmp_path, seed=5)
    out_nodes = {p.stem for p in waiting}
    expect_wait = {d for d in _deployed(sc.deployments) if d[2] in out_nodes}
    assert out_nodes and expect_wait

    run = solve_survey(arc, sid)
    pos = run_positions(arc, get_run(arc, sid, run.run_id))
    wait = pos.filter(pc.equal(pos["kind"], "awaiting"))
    r = invoke(runner, arc.root, "solve")  # the same run: the command says what awaits
    assert f"awaiting harvest {wait.num_rows} deployment(s)" in r.output
    assert set(wait["node"].to_pylist()) == out_nodes
    assert set(zip(wait["line"].to_pylist(), wait["point"].to_pylist(),
                   wait["node"].to_pylist(), strict=True)) == expect_wait
    # not solved, not flagged (no 'unoccupied'), never delivered
    assert wait["easting"].null_count == wait.num_rows
    assert set(wait["flags"].to_pylist()) == {""}
    assert not any(wait["delivered"].to_pylist())
    assert "unoccupied" not in run.flag_counts

    out = tmp_path / "first.csv"
    r = invoke(runner, arc.root, "deliver", "--format", "csv", "--to", str(out),
               "--recipient", "Harrow Basin Energy", "--allow-flags", "--json")
    assert r.exit_code == 0, r.stderr
    d = json.loads(r.output)
    assert d["n_awaiting"] == wait.num_rows
    assert {(a["line"], a["point"], a["node"]) for a in d["awaiting"]} == expect_wait
    assert _csv_records(out).isdisjoint(expect_wait)
    lineage = json.loads(Path(str(out) + ".lineage.json").read_text())
    assert lineage["awaiting_harvest"]["count"] == wait.num_rows
    assert {(a["line"], a["point"], a["node"])
            for a in lineage["awaiting_harvest"]["deployments"]} == expect_wait
    r = invoke(runner, arc.root, "deliver", "--format", "csv", "--to", str(out), "--force",
               "--recipient", "Harrow Basin Energy", "--allow-flags")
    assert r.exit_code == 0, r.stderr
    assert f"held back {wait.num_rows} deployment(s) awaiting harvest" in r.output

    # the rest of the nodes come in: the next solve positions them, the delivery has them
    load_fix_files(arc, sid, waiting, workers=1)
    again = solve_survey(arc, sid)
    pos2 = run_positions(arc, get_run(arc, sid, again.run_id))
    assert "awaiting" not in pos2["kind"].to_pylist()
    out2 = tmp_path / "second.csv"
    r = invoke(runner, arc.root, "deliver", "--format", "csv", "--to", str(out2),
               "--recipient", "Harrow Basin Energy", "--allow-flags", "--json")
    assert r.exit_code == 0, r.stderr
    assert json.loads(r.output)["n_awaiting"] == 0
    assert expect_wait <= _csv_records(out2)
    arc.close()


def test_earlier_runs_solved_unharvested_deployments_as_unoccupied(tmp_path):
    """A manifest without the parameter (runs before it) keeps its meaning: unoccupied."""
    arc, sid, _, _, waiting = harvest_in_progress(tmp_path, seed=8, every=3)
    run = solve_survey(arc, sid, {"window": {"hold_unharvested": False}})
    pos = run_positions(arc, get_run(arc, sid, run.run_id))
    assert "awaiting" not in pos["kind"].to_pylist()
    held = pos.filter(pc.is_in(pos["node"], value_set=pa.array([p.stem for p in waiting])))
    assert held.num_rows and all("unoccupied" in f for f in held["flags"].to_pylist())
    arc.close()
