"""Incremental solving: a second run re-solves only the nodes whose inputs changed and is
the same, bit for bit, as a solve of the same inputs from scratch.

The reference for "the same" is the run's own from-scratch recompute (``reproduce``): every
node solved again from the manifest's objects, no earlier run consulted. The nodes expected
to be re-solved are worked out here from the files alone (the logs loaded in between and
the one record the corrected deployment log changes), not from the solver's keys.
"""

from __future__ import annotations

import csv
import json
from datetime import datetime, timedelta
from pathlib import Path

import pyarrow as pa
import pyarrow.compute as pc
import pytest

from archive.ingest.load import load_fix_files
from archive.lineage.reproduce import reproduce
from archive.solve.reuse import run_keys
from archive.solve.run import get_run, recompute, run_manifest, run_positions, solve_survey
from archive.store.hashing import table_digest
from archive.survey.inputs import load_input
from tests.support.cli import invoke
from tests.support.scenarios import harvest_in_progress

pytestmark = pytest.mark.slow


def _corrected_log(src: Path, dst: Path, node: str) -> None:
    """The crew's deployment log with the retrieval of ``node`` noted an hour later."""
    with src.open(newline="") as f:
        rows = list(csv.DictReader(f))
    changed = 0
    for r in rows:
        if r["node"] == node and r["retrieved_utc"]:
            t = datetime.fromisoformat(r["retrieved_utc"]) + timedelta(hours=1)
            r["retrieved_utc"] = t.isoformat().replace("+00:00", "Z")
            changed += 1
    assert changed
    with dst.open("w", newline="") as f:
        w = csv.DictWriter(f, fieldnames=list(rows[0]))
        w.writeheader()
        w.writerows(rows)


def test_second_solve_reuses_unchanged_nodes_bit_for_bit(tmp_path, runner):
    arc, sid, sc, loaded, waiting = harvest_in_progress(tmp_path, seed=11, every=2)
    first = solve_survey(arc, sid)
    assert first.summary["reuse"]["nodes_reused"] == 0

    more = waiting[: max(1, len(waiting) // 2)]
    load_fix_files(arc, sid, more, workers=1)
    corrected = loaded[0].stem
    _corrected_log(sc.deployments, tmp_path / "deployments_v2.csv", corrected)
    load_input(arc, sid, "deployments", tmp_path / "deployments_v2.csv")

    r = invoke(runner, arc.root, "solve")
    assert r.exit_code == 0, r.stderr
    second = get_run(arc, sid, r.output.split()[2])
    assert second.id != first.run_id
    reuse = json.loads(second.summary)["reuse"]
    assert (f"nodes solved {reuse['nodes_solved']}, reused from earlier runs "
            f"{reuse['nodes_reused']}") in r.output
    solved_again = {p.stem for p in more} | {corrected}
    assert reuse["nodes_solved"] == len(solved_again)
    assert reuse["reused_from"] == {first.run_id: reuse["nodes_reused"]}
    assert reuse["nodes_reused"] > 0
    keys = run_keys(arc, get_run(arc, sid, second.id))
    mine = {n for n, by in zip(keys["node"].to_pylist(), keys["solved_by"].to_pylist(),
                               strict=True) if by == second.id}
    assert mine == solved_again

    # the same positions as a from-scratch solve of the same inputs, bit for bit
    run = get_run(arc, sid, second.id)
    stored = run_positions(arc, run)
    scratch = recompute(arc, second.id)
    assert table_digest(scratch) == table_digest(stored) == run.positions_digest
    assert scratch.equals(stored)
    assert reproduce(arc, second.id, sid)["identical"] is True
    # the manifest says nothing of the reuse: it is the from-scratch manifest
    assert "reuse" not in run_manifest(arc, run) and "results" not in run_manifest(arc, run)

    # show and trace name the run a reused node's rows came from
    pos = stored.filter(pc.and_(pc.equal(stored["kind"], "logged"),
                                pc.invert(pc.is_in(stored["node"],
                                                   value_set=pa.array(sorted(solved_again))))))
    line, point = pos["line"][0].as_py(), pos["point"][0].as_py()
    node = pos["node"][0].as_py()
    r = invoke(runner, arc.root, "show", str(line), str(point), "--node", node, "--json")
    assert r.exit_code == 0, r.stderr
    assert {row["solved_by"] for row in json.loads(r.output)["rows"]} == {first.run_id}
    r = invoke(runner, arc.root, "show", str(line), str(point), "--node", node)
    assert f"solved in  run {first.run_id[:12]}" in r.output
    r = invoke(runner, arc.root, "trace", str(line), str(point), "--node", node)
    assert r.exit_code == 0, r.stderr
    assert f"solved in earlier run {first.run_id[:12]}, inputs unchanged" in r.output
    fresh = sorted(solved_again)[0]
    r = invoke(runner, arc.root, "show", *_station_of(stored, fresh), "--node", fresh, "--json")
    assert {row["solved_by"] for row in json.loads(r.output)["rows"]} == {second.id}
    arc.close()


def _station_of(table: pa.Table, node: str) -> tuple[str, str]:
    rows = table.filter(pc.equal(table["node"], node))
    return str(rows["line"][0].as_py()), str(rows["point"][0].as_py())


def _loaders() -> list:
    import threading

    return [t for t in threading.enumerate()
            if t.name == "nodekeep-engine-loader" and t.is_alive()]


def test_the_engine_loader_never_outlives_a_solve(tmp_path, monkeypatch):
    """A solve that fails waits for the thread loading the compiled engine before the
    error goes on: a process that ends while that thread is inside the compiler's library
    can abort ("terminate called without an active exception")."""
    import time

    import archive.solve.engine as engine
    import archive.solve.solving as solving
    from tests.support.scenarios import scenario_archive

    arc, sid, _run_id, sc = scenario_archive(tmp_path, seed=5)
    started: list[int] = []
    real_loader = solving._engine_loader

    def counting_loader():
        started.append(1)
        return real_loader()

    def slow_warm_up():
        time.sleep(0.5)

    def failing_part(*args, **kwargs):
        raise RuntimeError("a fix table could not be read")

    monkeypatch.setattr(solving, "_engine_loader", counting_loader)
    monkeypatch.setattr(engine, "warm_up", slow_warm_up)
    monkeypatch.setattr(solving, "_solve_part", failing_part)
    with sc.deployments.open(newline="") as f:  # one node's window changes: it is solved
        node = next(r["node"] for r in csv.DictReader(f) if r["retrieved_utc"])
    _corrected_log(sc.deployments, tmp_path / "deployments_v2.csv", node)
    load_input(arc, sid, "deployments", tmp_path / "deployments_v2.csv")
    t0 = time.monotonic()
    with pytest.raises(RuntimeError, match="could not be read"):
        solve_survey(arc, sid)
    assert started == [1] and _loaders() == []
    assert time.monotonic() - t0 >= 0.5  # it waited for the loader
    arc.close()
