"""A delivered record keeps its meaning: a moved node's later part keeps the point index it
was delivered under when a later deployment log adds an occupation at its station.

Before, the log numbered the new occupation first (M + 1) and the part took the next index
up, so the key the recipient held (line, point, index of the part) came to name another
node. The rule now (docs/delivery.md): indices a later part was delivered under are kept
with the log's version; new occupations are numbered above them.
"""

from __future__ import annotations

import csv
import json
from datetime import datetime, timedelta
from pathlib import Path

import pyarrow.compute as pc

from archive.deliver.deliveries import deliver
from archive.lineage.reproduce import reproduce
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run, solve_survey
from archive.survey.inputs import current_input, load_input
from tests.support.scenarios import scenario_archive

RECIPIENT = "Harrow Basin Energy processing centre"


def _rows(path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _station(table, line: float, point: float) -> list[dict]:
    mask = pc.and_(pc.equal(table["line"], line), pc.equal(table["point"], point))
    return table.filter(mask).to_pylist()


def _with_late_node(sc, line: float, point: float, folder: Path) -> Path:
    """The scenario's deployment log plus node KF-LATE laid at (line, point) an hour after
    the node there came up, still out: a second version of the log, written to ``folder``."""
    dep = _rows(sc.deployments)
    ours = next(r for r in dep if (float(r["line"]), float(r["point"])) == (line, point))
    later = datetime.fromisoformat(ours["retrieved_utc"].replace("Z", "+00:00"))
    extra = {**ours, "node": "KF-LATE", "deployed_utc":
             (later + timedelta(hours=1)).strftime("%Y-%m-%dT%H:%M:%SZ"), "retrieved_utc": ""}
    path = folder / "deployments-v2.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        w = csv.DictWriter(fh, fieldnames=list(dep[0]))
        w.writeheader()
        w.writerows([*dep, extra])
    return path


def test_a_delivered_later_part_keeps_its_index(tmp_path):
    arc, sid, run_id, sc = scenario_archive(tmp_path, seed=11, dem=True)
    try:
        moved = next(p for p in sc.problems if p["kind"] == "moved")
        line, point = float(moved["line"]), float(moved["point"])
        deliver(arc, sid, run_id, "csv", tmp_path / "first.csv", RECIPIENT, allow_flags=True)
        first = [r for r in _rows(tmp_path / "first.csv")
                 if (float(r["line"]), float(r["point"])) == (line, point)]
        assert [r["index"] for r in first] == ["1", "2"]  # before and after the move
        node = first[0]["node"]

        # the crew lays another node there after the moved one came up (not harvested yet)
        load_input(arc, sid, "deployments", _with_late_node(sc, line, point, tmp_path))
        version, table = current_input(arc, sid, "deployments")
        kept = json.loads(version.meta)["occupations"]["later_parts"]
        assert {"line": line, "point": point, "occupation": 1, "index": 2} in kept
        added = [r for r in _station(table, line, point) if r["node"] == "KF-LATE"]
        assert [r["occupation"] for r in added] == [3]  # above the kept index, not 2

        run2 = solve_survey(arc, sid).run_id
        rows = [r for r in _station(run_occupations(arc, get_run(arc, sid, run2)), line, point)
                if r["delivered"]]
        assert sorted((r["node"], r["part"], r["point_index"]) for r in rows) == [
            (node, 1, 1), (node, 2, 2)]
        # the run is still what its archived inputs give
        assert reproduce(arc, run2, sid)["identical"]

        # a preplot that gives the station a point index 2 of its own raises M too: the
        # part keeps 2 (the load warns that the two share the key)
        _, stations = current_input(arc, sid, "stations")
        pre = tmp_path / "preplot-v2.csv"
        with open(pre, "w", newline="", encoding="utf-8") as fh:
            w = csv.writer(fh)
            w.writerow(["line", "point", "index", "easting", "northing", "elevation"])
            for r in stations.to_pylist():
                w.writerow([r["line"], r["point"], r["index"], r["easting"], r["northing"],
                            r["elevation"]])
                if (r["line"], r["point"], r["index"]) == (line, point, 1):
                    w.writerow([line, point, 2, r["easting"] + 5.0, r["northing"],
                                r["elevation"]])
        res = load_input(arc, sid, "stations", pre)
        assert [w["code"] for w in res.warnings] == ["later-part-index"]
        run3 = solve_survey(arc, sid).run_id
        rows = [r for r in _station(run_occupations(arc, get_run(arc, sid, run3)), line, point)
                if r["delivered"] and r["node"] == node]
        assert sorted((r["part"], r["point_index"]) for r in rows) == [(1, 1), (2, 2)]
        assert reproduce(arc, run3, sid)["identical"]
    finally:
        arc.close()


def test_a_run_is_reproduced_from_the_log_version_it_read(tmp_path):
    # v2 adds an occupation before anything is delivered (the later part is then numbered
    # above it, 3), a delivery carries the part as 3, and v3 is the original file again:
    # the same table as v1, but its version keeps index 3 for the part. A recompute of the
    # run solved from v3 must read v3's notes, not v1's (which would give the part 2).
    arc, sid, run1, sc = scenario_archive(tmp_path, seed=11, dem=True)
    try:
        moved = next(p for p in sc.problems if p["kind"] == "moved")
        line, point = float(moved["line"]), float(moved["point"])
        load_input(arc, sid, "deployments", _with_late_node(sc, line, point, tmp_path))
        run2 = solve_survey(arc, sid).run_id
        deliver(arc, sid, run2, "csv", tmp_path / "d2.csv", RECIPIENT, allow_flags=True)
        load_input(arc, sid, "deployments", sc.deployments)
        v3, _ = current_input(arc, sid, "deployments")
        v1 = [v for v in _versions(arc, sid) if v.version == 1][0]
        assert v3.table_hash == v1.table_hash
        run3 = solve_survey(arc, sid).run_id
        part = [r for r in _station(run_occupations(arc, get_run(arc, sid, run3)), line, point)
                if r["delivered"] and r["part"] == 2]
        assert [r["point_index"] for r in part] == [3]  # as delivered
        assert reproduce(arc, run3, sid)["identical"]
    finally:
        arc.close()


def _versions(arc, sid):
    from sqlalchemy import select

    from archive.store.models import InputVersion

    with arc.session() as s:
        return s.scalars(select(InputVersion).where(InputVersion.survey_id == sid,
                                                   InputVersion.kind == "deployments")).all()
