"""Trace: the whole chain behind a delivered coordinate or a delivered file.

``trace_station`` answers "where was this station, what was it derived from, who changed it
and why": every delivery that carried it, the run behind the latest one (parameters, code
version, input tables), the raw files whose fixes were in its cloud (name, hash, when and by
whom received), how many fixes were used, rejected and screened (over all parts of the
station's windows, and per part with the delivered ones marked and the point index each is
delivered under: a moved node has a part before and one after the move, each delivered as
its own record) and every edit of the station.
``trace_file`` starts from a file on disk: its SHA-256 finds the delivery that wrote it.
Both are read-only views.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive.deliver.deliveries import delivery_dict, raw_files_of
from archive.edits.log import edit_node, list_edits
from archive.errors import UsageError
from archive.ingest.read import raw_notes, with_notes
from archive.lineage.common import plain, run_summary
from archive.solve.run import get_run, manifest_inputs, run_manifest
from archive.store.archive import Archive
from archive.store.hashing import sha256_file
from archive.store.models import Delivery, RawFile
from archive.survey.keys import rows_at, station_text

STATUSES = ("used", "rejected", "screened")


def _counts_by_part(cloud: pa.Table, rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Used/rejected/screened fixes per (node, part) of an occupation, delivered part marked.

    Parts are those of the run's position rows (0 a whole window, 1 and 2 before and after
    a move) plus any the cloud holds; a part with no fix in the cloud counts zeros.
    """
    grouped = cloud.group_by(["node", "part", "status"]).aggregate([("time", "count")])
    counts: dict[tuple[str, int], dict[str, int]] = {}
    for node, part, status, n in zip(*(grouped[c].to_pylist() for c in
                                       ("node", "part", "status", "time_count")), strict=True):
        counts.setdefault((node, int(part)), {})[status] = int(n)
    delivered = {(r["node"], int(r["part"])): r.get("point_index") for r in rows
                 if r["delivered"]}
    keys = sorted({(r["node"], int(r["part"])) for r in rows} | set(counts))
    return [{"node": node, "part": part, "delivered": (node, part) in delivered,
             "index": delivered.get((node, part))}
            | {k: counts.get((node, part), {}).get(k, 0) for k in STATUSES}
            for node, part in keys]


def _cloud_fixes(arc: Archive, survey_id: int, cloud: pa.Table,
                 rows: list[dict[str, Any]]) -> dict[str, Any]:
    """Raw files and used/rejected/screened counts of an occupation's fix cloud in the run:
    in total over every part, and per part with the delivered one marked."""
    status = cloud.column("status")
    counts = {k: int(pc.sum(pc.equal(status, k)).as_py() or 0) for k in STATUSES}
    raw_hashes = pc.unique(cloud.column("raw_hash")).to_pylist()
    with arc.session() as s:
        raws = s.scalars(select(RawFile).where(RawFile.survey_id == survey_id,
                                               RawFile.object_hash.in_(raw_hashes))
                         .order_by(RawFile.id)).all()
    raw = [{"id": r.id, "name": r.original_name, "hash": r.object_hash, "node": r.node,
            "received_at": r.received_at, "received_by": r.received_by,
            "notes": raw_notes(r)} for r in raws]
    return {"fixes": counts, "fixes_by_part": _counts_by_part(cloud, rows), "raw_files": raw}


def _solution_row(r: dict[str, Any]) -> dict[str, Any]:
    return _position(r) | {"part": r["part"], "delivered": r["delivered"], "node": r["node"],
                           "index": r.get("point_index"), "flags": r["flags"],
                           "t_start": r["t_start"], "t_end": r["t_end"],
                           "from_margins": r["from_margins"],
                           "solved_by": r.get("solved_by")}


def trace_station(arc: Archive, survey_id: int, line: float, point: float,
                  index: int | None = None, *, node: str | None = None) -> dict[str, Any]:
    """Everything behind station (line, point): per occupation (``index``/``node`` keep one)
    its deliveries, the run behind the latest one, its solution rows, the raw files whose
    fixes were in its cloud with the fix counts, and the station's edits.

    ``index`` is a delivered point index: that of an occupation, or the one a moved node's
    later part is delivered under, which leads to its occupation. An occupation whose parts
    were delivered under several indices lists the deliveries of the others in
    ``parts_delivered`` (its own index's in ``delivery``/``deliveries``)."""
    from archive.lineage.records import by_occupation, station_records
    from archive.solve.cloud import station_cloud
    from archive.solve.occupancy import occupation_of_index, run_occupations

    records = station_records(arc, survey_id, line, point)
    if node is not None:
        records = [r for r in records if str(r["record"]["node"]) == str(node)]

    def solved_rows(ref: str | None) -> tuple[Any, list[dict[str, Any]]]:
        run = get_run(arc, survey_id, ref)
        return run, [r for r in rows_at(run_occupations(arc, run), line, point, None, node)
                     .to_pylist() if r["kind"] == "logged"]

    run, solved = solved_rows(records[-1]["run"] if records else None)

    def occupation(k: int, record: dict[str, Any] | None = None) -> int:
        """The occupation of delivered index ``k`` (the record's own, when it says)."""
        if record is not None and record.get("occupation") is not None:
            return int(record["occupation"])
        return occupation_of_index(solved, k)

    edits = list_edits(arc, survey_id, all_edits=True, line=float(line), point=float(point))
    if node is not None:
        edits = [e for e in edits if edit_node(e) in (None, str(node))]
    if index is not None:
        # the occupation the index names now: that of its latest record (an index a later
        # part once had may since be an occupation's), else of the run's rows
        wanted = occupation(int(index), next((r["record"] for r in reversed(records)
                                              if r["record"]["index"] == int(index)), None))
        records = [r for r in records
                   if occupation(int(r["record"]["index"]), r["record"]) == wanted]
        latest = records[-1]["run"] if records else None  # None: the newest run
        if latest != run.id:  # the run behind its latest delivery, or the newest
            run, solved = solved_rows(latest)
        solved = [r for r in solved if r["occupation"] == wanted]
    occ_of_record = [occupation(int(r["record"]["index"]), r["record"]) for r in records]
    keys = sorted({int(r["occupation"]) for r in solved if r["occupation"] is not None}
                  | set(occ_of_record))
    if index is not None:
        edits = [e for e in edits if e["index"] == wanted]
    if not solved and not records and not edits:
        which = "".join(f" {k} {v}" for k, v in (("index", index), ("node", node)) if v)
        raise UsageError(f"station {station_text(line, point)}{which} is in no run, delivery or edit "
                         "of this survey", hint="check the line and point numbers")
    cloud = None
    if solved:
        cloud = station_cloud(arc, run.id, line, point)
    from archive.solve.reuse import solved_by

    by = solved_by(arc, run, {r["node"] for r in solved})
    for r in solved:
        r["solved_by"] = by[str(r["node"])]  # an earlier run when its rows were reused
    occupations = []
    for k in keys:
        rows = [r for r in solved if r["occupation"] == k]
        # its records grouped by the index each was delivered under (edits name the
        # occupation by its own index)
        mine = by_occupation([r for r, o in zip(records, occ_of_record, strict=True) if o == k])
        past = next((o for o in mine if o["index"] == k), mine[0] if mine else None)
        fixes = {"fixes": {}, "fixes_by_part": [], "raw_files": []}
        if rows and cloud is not None:
            part = cloud.filter(pc.fill_null(pc.equal(cloud["occupation"], k), False))
            fixes = _cloud_fixes(arc, survey_id, part, rows)
        first = rows[0] if rows else (past["delivered"]["record"] if past else {})
        occupations.append({
            "index": k, "node": first.get("node"), "deployed": first.get("deployed"),
            "retrieved": first.get("retrieved"),
            "delivery": _carried(past["delivered"]) if past else None,
            "deliveries": [_carried(h) for h in past["history"]] if past else [],
            "parts_delivered": [{"index": o["index"], "delivery": _carried(o["delivered"]),
                                 "deliveries": [_carried(h) for h in o["history"]]}
                                for o in mine if o is not past],
            "solution": [_solution_row(r) for r in rows],
            "fixes": fixes["fixes"], "fixes_by_part": fixes["fixes_by_part"],
            "raw_files": fixes["raw_files"],
            "edits": [e for e in edits if e["index"] == k],
        })
    return plain({
        "station": {"line": float(line), "point": float(point), "index": index, "node": node},
        "run": run_summary(arc, run),
        "occupations": occupations,
        "edits": edits,
    })


def _carried(entry: dict[str, Any]) -> dict[str, Any]:
    return {k: v for k, v in entry.items() if k != "record"} | {
        "position": _position(entry["record"]) | {"index": entry["record"]["index"],
                                                   "node": entry["record"]["node"]}}


def _position(r: dict[str, Any]) -> dict[str, Any]:
    keys = ("easting", "northing", "height", "height_source", "sigma_e", "sigma_n", "r95",
            "source", "flags")
    return {k: r[k] for k in keys if k in r}


def deliveries_of_file(arc: Archive, path: str | Path) -> tuple[str, list[Delivery]]:
    """The SHA-256 of a file and the deliveries that wrote those bytes (oldest first);
    UsageError when none did."""
    path = Path(path)
    if not path.is_file():
        raise UsageError(f"no such file: {path}")
    h, _ = sha256_file(path)
    with arc.session() as s:
        found = list(s.scalars(select(Delivery).where(Delivery.file_hash == h)
                               .order_by(Delivery.id)))
    if not found:
        raise UsageError(f"{path} (SHA-256 {h[:16]}...) matches no delivery of this archive",
                         hint="the file may have been changed after delivery: compare it with "
                              "the file_hash in its .lineage.json")
    return h, found


def delivery_of_file(arc: Archive, path: str | Path) -> Delivery:
    """The (latest) delivery that wrote a file's bytes; UsageError when none did."""
    return deliveries_of_file(arc, path)[1][-1]


def trace_file(arc: Archive, path: str | Path) -> dict[str, Any]:
    """The delivery that wrote a file (found by its SHA-256) and everything behind it."""
    path = Path(path)
    h, found = deliveries_of_file(arc, path)
    d = found[-1]
    run = get_run(arc, d.survey_id, d.run_id)
    lineage = json.loads(arc.objects.read_bytes(d.manifest_hash))
    fix_hashes = manifest_inputs(run_manifest(arc, run)).get("fixes", [])
    ids = json.loads(d.edit_ids or "[]")
    edits = [e for e in list_edits(arc, d.survey_id, all_edits=True) if e["id"] in ids]
    return plain({
        "file": {"path": str(path), "hash": h},
        "delivery": delivery_dict(d),
        "same_bytes_delivered": [x.id for x in found],
        "run": run_summary(arc, run),
        "raw_files": with_notes(arc, d.survey_id, raw_files_of(arc, d.survey_id, fix_hashes)),
        "edits": edits,
        "n_stations": lineage.get("delivery", {}).get("n_stations"),
        "survey": lineage.get("survey"),
    })
