"""Delivery and lineage on a real solve of the small invented scenario (Kestrel Flats 3D).

One archive is built per module (generate, load, solve: about 20 s on 2 cores), so these
tests are marked slow. Tampering happens on a copy of that archive.
"""

from __future__ import annotations

import json
import os
import shutil
from pathlib import Path

import pyarrow.compute as pc
import pytest
from sqlalchemy import select

from archive.deliver.deliveries import deliver
from archive.errors import IntegrityError
from archive.lineage.reproduce import reproduce
from archive.lineage.trace import trace_file, trace_station
from archive.store.archive import Archive
from archive.store.models import RawFile
from tests.support.cli import invoke
from tests.support.scenarios import scenario_archive

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def solved(tmp_path_factory):
    base = tmp_path_factory.mktemp("solved")
    arc, sid, run_id, _ = scenario_archive(base, seed=7)
    yield arc, sid, run_id, base
    arc.close()


def _raw_names_by_node(arc: Archive, sid: int) -> dict[str, set[str]]:
    with arc.session() as s:
        rows = s.execute(select(RawFile.node, RawFile.original_name)
                         .where(RawFile.survey_id == sid)).all()
    out: dict[str, set[str]] = {}
    for node, name in rows:
        out.setdefault(node, set()).add(name)
    return out


def test_reproduce_untouched_run_is_identical(solved):
    arc, sid, run_id, _ = solved
    r = reproduce(arc, run_id[:10], sid)
    assert r["identical"] is True and r["recomputed_digest"] == r["recorded_digest"]
    assert r["code_version_differs"] is False


def test_trace_of_delivered_file_names_every_contributing_raw_file(solved):
    from archive.solve.run import get_run, run_positions

    arc, sid, run_id, base = solved
    out = base / "kestrel_receivers.csv"
    deliver(arc, sid, run_id, "csv", out, "Harrow Basin Energy processing", allow_flags=True,
            force=True)
    t = trace_file(arc, out)
    named = {r["name"] for r in t["raw_files"]}
    pos = run_positions(arc, get_run(arc, sid, run_id))
    used = pos.filter(pc.and_(pos["delivered"], pc.greater(pos["n_used"], 0)))
    by_node = _raw_names_by_node(arc, sid)
    expected = set().union(*(by_node.get(n, set()) for n in used["node"].to_pylist()))
    assert expected and expected <= named
    lineage = json.loads(Path(str(out) + ".lineage.json").read_text())
    assert {r["name"] for r in lineage["raw_files"]} == named


def test_trace_station_counts_fixes_from_its_cloud(solved):
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run

    arc, sid, run_id, _ = solved
    pos = run_occupations(arc, get_run(arc, sid, run_id))
    row = pos.filter(pc.and_(pos["delivered"], pc.greater(pos["n_used"], 0))).to_pylist()[0]
    t = trace_station(arc, sid, row["line"], row["point"], row["occupation"])
    [o] = t["occupations"]
    assert o["index"] == row["occupation"] and o["node"] == row["node"]
    assert o["fixes"]["used"] == row["n_used"]  # the cloud agrees with the run's count
    # the run counts every fix of the window not used (screened or rejected) as n_rejected
    assert o["fixes"]["rejected"] + o["fixes"]["screened"] == row["n_rejected"]
    assert o["fixes"]["used"] + row["n_rejected"] == row["n_total"]
    names = {r["name"] for r in o["raw_files"]}
    assert names and names <= _raw_names_by_node(arc, sid)[row["node"]]


def test_trace_station_splits_fix_counts_by_part_of_a_moved_node(solved, runner):
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run

    arc, sid, run_id, base = solved
    pos = run_occupations(arc, get_run(arc, sid, run_id))
    # the scenario plants a node moved mid-deployment: its window is solved in parts 1 and 2
    moved = pos.filter(pc.and_(pos["delivered"], pc.equal(pos["part"], 2))).to_pylist()
    assert moved, "the demo scenario plants one moved node"
    row = moved[0]
    parts = pos.filter(pc.and_(pc.and_(pc.equal(pos["line"], row["line"]),
                                       pc.equal(pos["point"], row["point"])),
                               pc.equal(pos["node"], row["node"]))).to_pylist()
    t = trace_station(arc, sid, row["line"], row["point"], row["occupation"])
    [o] = t["occupations"]
    by_part = {p["part"]: p for p in o["fixes_by_part"] if p["node"] == row["node"]}
    # each part is delivered on its own (flags.move_deliver = "each")
    assert {1, 2} <= set(by_part) and by_part[2]["delivered"] and by_part[1]["delivered"]
    for r in parts:  # each part's counts agree with the run's own counts of that part
        p = by_part[r["part"]]
        assert p["used"] == r["n_used"] and p["rejected"] + p["screened"] == r["n_rejected"]
    for k in ("used", "rejected", "screened"):  # the parts add up to the total
        assert sum(p[k] for p in o["fixes_by_part"]) == o["fixes"][k]
    assert o["fixes"]["used"] > row["n_used"]  # the total is not the delivered part's count
    r = invoke(runner, base / "archive", "trace", f"{row['line']:g}", f"{row['point']:g}",
               "--index", str(row["occupation"]))
    assert r.exit_code == 0, r.stderr
    assert (f"part 2 node {row['node']}: used {row['n_used']}, rejected "
            f"{by_part[2]['rejected']}, screened {by_part[2]['screened']} (delivered as index "
            f"{row['point_index']})" in r.output)
    assert row["point_index"] != row["occupation"] and by_part[2]["index"] == row["point_index"]
    r = invoke(runner, base / "archive", "trace", f"{row['line']:g}", f"{row['point']:g}",
               "--node", row["node"], "--json")
    assert json.loads(r.output)["occupations"][0]["fixes_by_part"] == o["fixes_by_part"]
    # the index the later part is delivered under leads to the same occupation, its raw
    # files and fixes (not to an empty entry of its own)
    later = trace_station(arc, sid, row["line"], row["point"], row["point_index"])
    [o2] = later["occupations"]
    assert o2["index"] == row["occupation"] and o2["fixes"] == o["fixes"]
    assert o2["raw_files"] and o2["raw_files"] == o["raw_files"]
    r = invoke(runner, base / "archive", "show", f"{row['line']:g}", f"{row['point']:g}",
               "--index", str(row["point_index"]), "--json")
    assert r.exit_code == 0, r.stderr
    shown = json.loads(r.output)
    assert {x["part"] for x in shown["rows"]} >= {1, 2}
    assert {x["occupation"] for x in shown["rows"]} == {row["occupation"]}
    # once delivered, the occupation carries both records: its own index and the later part's
    res = deliver(arc, sid, run_id, "csv", base / "r_moved.csv", "processing",
                  allow_flags=True, force=True)
    [o3] = trace_station(arc, sid, row["line"], row["point"], row["point_index"])["occupations"]
    assert o3["delivery"]["id"] == res.delivery_id
    assert o3["delivery"]["position"]["index"] == row["occupation"]
    [p] = o3["parts_delivered"]
    assert p["index"] == row["point_index"] and p["delivery"]["id"] == res.delivery_id
    assert p["delivery"]["position"]["easting"] == pytest.approx(row["easting"], abs=1e-3)
    r = invoke(runner, base / "archive", "trace", f"{row['line']:g}", f"{row['point']:g}",
               "--index", str(row["point_index"]))
    assert r.exit_code == 0, r.stderr
    assert "1 occupation(s); 1 later part(s) of a moved node" in r.output
    assert f"part delivered as index {row['point_index']}:" in r.output


def test_trace_station_after_edit_and_delivery(solved, runner):
    from archive.edits import decisions as ed
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run

    arc, sid, run_id, base = solved
    pos = run_occupations(arc, get_run(arc, sid, run_id))
    row = pos.filter(pc.and_(pos["delivered"], pc.greater(pos["n_used"], 0))).to_pylist()[-1]
    line, point = row["line"], row["point"]
    e = ed.set_height(arc, sid, line, point, row["occupation"], source="given", height=612.5,
                      reason="levelled from the benchmark by the crew")
    res = deliver(arc, sid, run_id, "sps", base / "r_trace.sps", "processing",
                  allow_flags=True, force=True)
    t = trace_station(arc, sid, line, point, row["occupation"])
    [o] = t["occupations"]
    assert o["delivery"]["id"] == res.delivery_id
    assert o["delivery"]["position"]["height"] == 612.5
    assert o["delivery"]["position"]["source"] == f"edit:{e.id}"
    assert t["run"]["id"] == run_id and t["run"]["params"]
    assert {i["kind"] for i in t["run"]["inputs"]} >= {"stations", "deployments"}
    assert [x["reason"] for x in t["edits"]] == ["levelled from the benchmark by the crew"]
    r = invoke(runner, base / "archive", "trace", f"{line:g}", f"{point:g}",
               "--index", str(row["occupation"]))
    assert r.exit_code == 0, r.stderr
    assert f"last delivered in delivery {res.delivery_id}" in r.output
    assert "levelled from the benchmark" in r.output and "received" in r.output
    r = invoke(runner, base / "archive", "trace", "9999", "1")
    assert r.exit_code == 2 and "in no run, delivery or edit" in r.stderr


def test_reproduce_after_tampering_fails_loudly(solved, tmp_path, runner):
    arc, sid, run_id, base = solved
    copy = tmp_path / "archive"
    shutil.copytree(base / "archive", copy)
    manifest = json.loads((copy / "objects").joinpath(
        *_fan(_manifest_hash(arc, run_id))).read_bytes())
    victim = copy / "objects" / Path(*_fan(manifest["inputs"]["fixes"][0]))
    os.chmod(victim, 0o644)
    data = bytearray(victim.read_bytes())
    data[len(data) // 2] ^= 0xFF
    victim.write_bytes(bytes(data))
    with Archive.open(copy) as tampered, pytest.raises(IntegrityError, match="fix table of node .* no longer matches its hash"):
        reproduce(tampered, run_id, sid)
    r = invoke(runner, copy, "reproduce", run_id[:12])
    assert r.exit_code == 3 and "no longer matches its hash" in r.stderr
    r = invoke(runner, base / "archive", "reproduce", run_id[:12])
    assert r.exit_code == 0 and "identical" in r.output


def _manifest_hash(arc: Archive, run_id: str) -> str:
    from archive.solve.run import get_run

    return get_run(arc, None, run_id).manifest_hash


def _fan(h: str) -> tuple[str, str, str]:
    return h[:2], h[2:4], h


def test_exclude_span_takes_effect_at_next_solve(solved):
    # Last in this module: it adds a newer run to the shared archive.
    from archive.edits import decisions as ed
    from archive.solve.run import get_run, run_manifest, run_positions, solve_survey

    arc, sid, run_id, _ = solved

    def station(table, line, point):
        m = pc.and_(pc.and_(pc.equal(table["line"], line), pc.equal(table["point"], point)),
                    table["delivered"])
        return table.filter(m).to_pylist()[0]

    pos = run_positions(arc, get_run(arc, sid, run_id))
    row = pos.filter(pc.and_(pos["delivered"], pc.greater(pos["n_used"], 20))).to_pylist()[0]
    half = row["t_start"] + (row["t_end"] - row["t_start"]) / 2
    e = ed.exclude_span(arc, sid, row["line"], row["point"], node=row["node"],
                        start=row["t_start"], end=half, reason="node carried about by cattle")
    new = solve_survey(arc, sid, label="after exclusion")
    assert new.created and new.run_id != run_id
    run = get_run(arc, sid, new.run_id)
    assert e.id in [x["id"] for x in run_manifest(arc, run)["edits"]]
    after = station(run_positions(arc, run), row["line"], row["point"])
    assert 0 < after["n_used"] < row["n_used"]
    # the earlier run is untouched and still reproduces
    assert reproduce(arc, run_id, sid)["identical"] is True
