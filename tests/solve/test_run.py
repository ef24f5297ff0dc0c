"""Runs in an archive: manifest-named, deterministic, recomputable, traceable, custodial."""

from __future__ import annotations

import json
import os
import stat
from datetime import timedelta

import numpy as np
import pyarrow.compute as pc
import pytest
from sqlalchemy import select

from archive import __version__
from archive.errors import IntegrityError, UsageError
from archive.solve.cloud import station_cloud
from archive.solve.run import (
    get_run,
    list_runs,
    recompute,
    run_manifest,
    run_positions,
    solve_survey,
)
from archive.solve.schema import FLAGS, POSITION_SCHEMA
from archive.store.hashing import canonical_hash, table_digest
from archive.store.models import Edit, LedgerEvent, Run, utcnow
from archive.store.verify import verify_archive


def test_solve_records_a_run_and_a_second_solve_is_a_lookup(sim_arc) -> None:
    arc, sid = sim_arc
    first = solve_survey(arc, sid, label="first pass")
    assert first.created and first.n_positions == 13  # 11 logged (one moved: 2 rows) + 1
    run = get_run(arc, sid)
    assert run.id == first.run_id and run.label == "first pass"
    manifest = run_manifest(arc, run)
    assert canonical_hash(manifest) == run.id  # run id = SHA-256 of the canonical manifest
    assert manifest["code_version"] == __version__
    assert manifest["survey"]["crs_epsg"] == 32614
    assert len(manifest["inputs"]["fixes"]) == 12 and manifest["inputs"]["dem"]
    assert manifest["params"]["estimate"]["huber_k"] == 1.345
    pos = run_positions(arc, run)
    assert pos.schema.equals(POSITION_SCHEMA, check_metadata=True)
    assert table_digest(pos) == run.positions_digest
    again = solve_survey(arc, sid, label="again")
    assert not again.created and again.run_id == first.run_id
    with arc.session() as s:
        assert len(s.scalars(select(Run)).all()) == 1
        events = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "solve.run")).all()
        assert len(events) == 1 and json.loads(events[0].payload)["run"] == run.id
    report = verify_archive(arc)
    assert report.ok, report


def test_positions_carry_heights_uncertainty_and_flags(sim_arc, small_sim) -> None:
    arc, sid = sim_arc
    res = solve_survey(arc, sid)
    pos = run_positions(arc, get_run(arc, sid)).to_pydict()
    assert set(pos["height_source"]) == {"model"}
    for f in pos["flags"]:
        assert all(k in FLAGS for k in f.split(";") if k)
    # flags count stations (occupations): the moved node has two rows and is one station;
    # the unlogged cluster is no station and is counted apart
    moved_rows = sum("moved" in f.split(";") for f in pos["flags"])
    assert moved_rows == 2 and res.flag_counts["moved"] == 1
    assert "unlogged" not in res.flag_counts and res.summary["n_unlogged"] == 1
    assert res.flag_counts["nearer-other"] >= 2
    assert res.n_flagged <= res.summary["n_stations"] < res.n_positions
    # model height 240 + 0.002·(E - west edge): |dh| stays small for these simulated nodes
    assert all(abs(d) < 3 for d in pos["dh"])
    assert all(s > 0.2 for s in pos["sigma_h"])
    # 95 % radius between the circular-normal factors of the larger and smaller sigma, times
    # the coverage factor of its degrees of freedom (archive.solve.noise.coverage_factor)
    from archive.solve.noise import coverage_factor

    for se, sn, r95, dof in zip(pos["sigma_e"], pos["sigma_n"], pos["r95"], pos["dof"],
                                strict=True):
        k = float(np.sqrt(coverage_factor(np.array([dof]))[0]))
        assert 1.0 <= k < 1.5 and dof >= 1
        assert 1.9599 * k * max(se, sn) <= r95 <= 2.4478 * k * max(se, sn)


def test_recompute_is_bit_identical_and_detects_altered_inputs(sim_arc) -> None:
    arc, sid = sim_arc
    res = solve_survey(arc, sid)
    run = get_run(arc, sid, res.run_id[:8])
    assert table_digest(recompute(arc, run.id)) == run.positions_digest
    manifest = run_manifest(arc, run)
    victim = manifest["inputs"]["fixes"][3]
    path = arc.objects.local_path(victim)
    os.chmod(path, stat.S_IWUSR | stat.S_IRUSR)
    data = bytearray(path.read_bytes())
    data[100] ^= 0xFF
    path.write_bytes(bytes(data))
    with pytest.raises(IntegrityError, match="no longer matches its hash"):
        recompute(arc, run.id)
    path.unlink()
    with pytest.raises(IntegrityError, match="missing from the object store"):
        recompute(arc, run.id)


def test_selection_params_and_exclusions_make_new_runs(sim_arc) -> None:
    arc, sid = sim_arc
    whole = solve_survey(arc, sid)
    some = solve_survey(arc, sid, stations=[(1001.0, 2001.0), (1001.0, 2002.0)])
    assert some.created and some.run_id != whole.run_id and some.n_positions == 2
    tukey = solve_survey(arc, sid, {"estimate": {"estimator": "tukey"}},
                         nodes=["KF05000"])
    assert tukey.created and tukey.n_positions == 1
    before = run_positions(arc, get_run(arc, sid, some.run_id)).to_pydict()
    start = before["t_start"][0]
    with arc.transaction() as tx:
        edit = Edit(survey_id=sid, kind="exclude-span", line=1001.0, point=2001.0,
                    point_index=1, payload=json.dumps({
                        "node": before["node"][0], "start": start.isoformat(),
                        "end": (start + timedelta(hours=6)).isoformat()}),
                    reason="node disturbed by cattle", created_at=utcnow(),
                    created_by=arc.actor)
        tx.add(edit)
        tx.flush()
        arc.log(tx, "edit.add", {"id": edit.id}, survey_id=sid, rows=[edit])
    edited = solve_survey(arc, sid, stations=[(1001.0, 2001.0), (1001.0, 2002.0)])
    assert edited.created and edited.run_id != some.run_id
    manifest = run_manifest(arc, get_run(arc, sid, edited.run_id))
    assert [e["id"] for e in manifest["edits"]] == [edit.id]
    after = run_positions(arc, get_run(arc, sid, edited.run_id)).to_pydict()
    # six hours of fixes at 30 s (720 epochs) are left out, minus those screened anyway
    assert before["n_used"][0] - after["n_used"][0] > 600
    assert len(list_runs(arc, sid)) == 4


def test_station_cloud_explains_every_fix_of_the_window(sim_arc) -> None:
    arc, sid = sim_arc
    res = solve_survey(arc, sid)
    run = get_run(arc, sid)
    pos = run_positions(arc, run)
    row = pos.filter(pc.and_(pc.equal(pos["line"], 1001.0),
                             pc.equal(pos["point"], 2001.0))).to_pylist()[0]
    cloud = station_cloud(arc, res.run_id, 1001.0, 2001.0)
    status = cloud["status"].to_pylist()
    assert status.count("used") == row["n_used"]
    assert len(status) == row["n_total"]
    assert set(status) <= {"used", "rejected", "screened"}
    times = pc.cast(cloud["time"], "int64").to_numpy()
    t0 = pc.cast(pos["t_start"], "int64").to_numpy()[0]
    assert times.min() >= t0  # nothing from before the window (transit, camp)
    reasons = set(cloud.filter(pc.equal(cloud["status"], "screened"))["reason"].to_pylist())
    assert reasons and reasons <= {"invalid", "not-3d", "few-satellites", "pdop", "hdop",
                                   "excluded"}
    assert set(cloud.filter(pc.equal(cloud["status"], "rejected"))["reason"].to_pylist()) \
        <= {"outlier"}
    assert len(set(cloud["raw_hash"].to_pylist())) == 1
    unl = pos.filter(pc.equal(pos["kind"], "unlogged")).to_pylist()[0]
    ucloud = station_cloud(arc, res.run_id, unl["line"], unl["point"])
    assert ucloud["status"].to_pylist().count("used") == unl["n_used"]
    with pytest.raises(UsageError, match="no deployment"):
        station_cloud(arc, res.run_id, 999.0, 1.0)


def test_errors_say_what_to_do(survey_arc) -> None:
    with survey_arc.session() as s:
        sid = survey_arc.survey(s).id
    with pytest.raises(UsageError, match="the survey has no stations loaded") as exc:
        solve_survey(survey_arc, sid)
    assert "nodekeep load stations" in str(exc.value)
    with pytest.raises(UsageError, match="no solution run yet"):
        get_run(survey_arc, sid)
    with pytest.raises(UsageError, match="too short"):
        get_run(survey_arc, sid, "ab")


def test_parameters_of_an_older_run_solve_as_they_did(small_sim) -> None:
    """A manifest written before the pooled uncertainty, the move scan and the delivery of
    each part names none of their parameters: it solves with batch means and the normal
    quantile, the hour-block detector, and delivers the later part for the whole stay."""
    from archive.solve.engine import solve_fixes
    from archive.solve.params import BEFORE, default_params
    from archive.solve.run import MANIFEST_FORMAT
    from archive.solve.solving import combine

    old = {sec: {k: v for k, v in keys.items() if (sec, k) not in BEFORE}
           for sec, keys in default_params().items()}
    old["uncertainty"] |= {"method": "batch", "floor": 0.3}
    old["flags"] |= {"min_span_hours": 6.0, "move_min_hours": 6.0, "move_block_min": 60.0,
                     "move_z": 4.0}
    sim = small_sim
    out = solve_fixes(sim.fixes, sim.deployments, sim.stations, old, sim.meta["epsg"],
                      finish=False).positions
    pos = out.to_pydict()
    moved = [k for k, f in enumerate(pos["flags"]) if "moved" in f.split(";")]
    assert sorted(pos["part"][k] for k in moved) == [1, 2]
    for k in moved:  # only the later part is delivered, under the occupation's index
        assert pos["delivered"][k] == (pos["part"][k] == 2)
    later = next(k for k in moved if pos["part"][k] == 2)
    assert pos["point_index"][later] == pos["occupation"][later]
    assert pos["held_from"][later] == pos["deployed"][later]
    assert all(d is None for d in pos["dof"])  # the normal quantile
    v2, _ = combine([out], {"format": 2, "params": old,
                             "survey": {"crs_epsg": sim.meta["epsg"]}})
    assert "point_index" not in v2.column_names and MANIFEST_FORMAT == 3
