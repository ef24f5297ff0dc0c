"""Trace: the whole chain behind a delivered coordinate or a delivered file.

``trace_station`` answers "where was this station, what was it derived from, who changed it
and why": every delivery that carried it, the run behind the latest one (parameters, code
version, input tables), the raw files whose fixes were in its cloud (name, hash, when and by
whom received), how many fixes were used, rejected and screened (over all parts of the
station's windows, and per part with the delivered part marked: a moved node has a part
before and one after the move) and every edit of the station.
``trace_file`` starts from a file on disk: its SHA-256 finds the delivery that wrote it.
Both are read-only views.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import or_, select

from archive.deliver.deliveries import delivery_dict, raw_files_of
from archive.deliver.edits import list_edits
from archive.deliver.runs import get_run, manifest_inputs, plain, run_manifest, run_positions
from archive.errors import UsageError
from archive.ingest.read import raw_notes, with_notes
from archive.store.archive import Archive
from archive.store.hashing import sha256_file
from archive.store.models import Delivery, InputVersion, RawFile, Run

INPUT_KINDS = ("stations", "deployments", "control", "dem")


def _station_rows(table: pa.Table, line: float, point: float, index: int) -> list[dict]:
    m = pc.and_(pc.and_(pc.equal(table["line"], float(line)),
                        pc.equal(table["point"], float(point))),
                pc.equal(table["index"], int(index)))
    return table.filter(m).to_pylist()


def input_tables(arc: Archive, survey_id: int, inputs: dict[str, Any]) -> list[dict[str, Any]]:
    """The input versions a run read (matched by table or source hash), with who loaded them."""
    hashes = {k: inputs.get(k) for k in INPUT_KINDS if isinstance(inputs.get(k), str)}
    if not hashes:
        return []
    with arc.session() as s:
        rows = s.scalars(select(InputVersion).where(
            InputVersion.survey_id == survey_id,
            or_(InputVersion.table_hash.in_(hashes.values()),
                InputVersion.source_hash.in_(hashes.values())))).all()
    out = []
    for kind, h in hashes.items():
        match = [r for r in rows if r.kind == kind and h in (r.table_hash, r.source_hash)]
        r = match[0] if match else None
        out.append({"kind": kind, "hash": h, "version": r.version if r else None,
                    "name": r.original_name if r else None,
                    "loaded_at": r.created_at if r else None,
                    "loaded_by": r.created_by if r else None})
    return out


def run_summary(arc: Archive, run: Run) -> dict[str, Any]:
    """A run with its parameters, code version and input hashes (from its manifest)."""
    manifest = run_manifest(arc, run)
    return {"id": run.id, "label": run.label, "created_at": run.created_at,
            "created_by": run.created_by, "code_version": run.code_version,
            "params": manifest.get("params", {}), "manifest_hash": run.manifest_hash,
            "positions_digest": run.positions_digest,
            "inputs": input_tables(arc, run.survey_id, manifest_inputs(manifest)),
            "n_fix_tables": len(manifest_inputs(manifest).get("fixes", []))}


STATUSES = ("used", "rejected", "screened")


def _counts_by_part(cloud: pa.Table, rows: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Used/rejected/screened fixes per (node, part) of the station, delivered part marked.

    Parts are those of the run's position rows (0 a whole window, 1 and 2 before and after
    a move) plus any the cloud holds; a part with no fix in the cloud counts zeros.
    """
    grouped = cloud.group_by(["node", "part", "status"]).aggregate([("time", "count")])
    counts: dict[tuple[str, int], dict[str, int]] = {}
    for node, part, status, n in zip(*(grouped[c].to_pylist() for c in
                                       ("node", "part", "status", "time_count")), strict=True):
        counts.setdefault((node, int(part)), {})[status] = int(n)
    delivered = {(r["node"], int(r["part"])) for r in rows if r["delivered"]}
    keys = sorted({(r["node"], int(r["part"])) for r in rows} | set(counts))
    return [{"node": node, "part": part, "delivered": (node, part) in delivered}
            | {k: counts.get((node, part), {}).get(k, 0) for k in STATUSES}
            for node, part in keys]


def _cloud_fixes(arc: Archive, survey_id: int, run: Run,
                 solution: list[dict[str, Any]]) -> dict[str, Any]:
    """Raw files and used/rejected/screened counts of the station's fix cloud in the run:
    in total over every part, and per part with the delivered one marked."""
    from archive.solve.cloud import station_cloud

    row = solution[0]
    cloud = station_cloud(arc, run.id, row["line"], row["point"], row["index"])
    status = cloud.column("status")
    counts = {k: int(pc.sum(pc.equal(status, k)).as_py() or 0) for k in STATUSES}
    raw_hashes = pc.unique(cloud.column("raw_hash")).to_pylist()
    with arc.session() as s:
        rows = s.scalars(select(RawFile).where(RawFile.survey_id == survey_id,
                                               RawFile.object_hash.in_(raw_hashes))
                         .order_by(RawFile.id)).all()
    raw = [{"id": r.id, "name": r.original_name, "hash": r.object_hash, "node": r.node,
            "received_at": r.received_at, "received_by": r.received_by,
            "notes": raw_notes(r)} for r in rows]
    return {"fixes": counts, "fixes_by_part": _counts_by_part(cloud, solution), "raw_files": raw}


def trace_station(arc: Archive, survey_id: int, line: float, point: float,
                  index: int = 1) -> dict[str, Any]:
    """Everything behind station (line, point, index): deliveries, run, inputs, raw, edits."""
    with arc.session() as s:
        deliveries = s.scalars(select(Delivery).where(Delivery.survey_id == survey_id)
                               .order_by(Delivery.id)).all()
    carried = []
    for d in deliveries:
        rows = _station_rows(arc.objects.read_table(d.final_hash), line, point, index)
        if rows:
            carried.append(delivery_dict(d) | {"position": _position(rows[0])})
    run_id = carried[-1]["run"] if carried else None
    run = get_run(arc, survey_id, run_id)
    rows = _station_rows(run_positions(arc, run), line, point, index)
    edits = list_edits(arc, survey_id, all_edits=True, line=float(line), point=float(point))
    edits = [e for e in edits if e["index"] == int(index)]
    if not rows and not carried and not edits:
        raise UsageError(f"station {line:g}/{point:g} index {index} is in no run, delivery or "
                         "edit of this survey", hint="check the line and point numbers")
    fixes = (_cloud_fixes(arc, survey_id, run, rows) if rows
             else {"fixes": {}, "fixes_by_part": [], "raw_files": []})
    return plain({
        "station": {"line": float(line), "point": float(point), "index": int(index)},
        "delivery": carried[-1] if carried else None,
        "deliveries": carried,
        "run": run_summary(arc, run),
        "solution": [_position(r) | {"part": r["part"], "delivered": r["delivered"],
                                     "node": r["node"], "flags": r["flags"],
                                     "t_start": r["t_start"], "t_end": r["t_end"]}
                     for r in rows],
        "fixes": fixes["fixes"], "fixes_by_part": fixes["fixes_by_part"],
        "raw_files": fixes["raw_files"],
        "edits": edits,
    })


def _position(r: dict[str, Any]) -> dict[str, Any]:
    keys = ("easting", "northing", "height", "height_source", "sigma_e", "sigma_n", "r95",
            "source", "flags")
    return {k: r[k] for k in keys if k in r}


def trace_file(arc: Archive, path: str | Path) -> dict[str, Any]:
    """The delivery that wrote a file (found by its SHA-256) and everything behind it."""
    path = Path(path)
    if not path.is_file():
        raise UsageError(f"no such file: {path}")
    h, _ = sha256_file(path)
    with arc.session() as s:
        found = s.scalars(select(Delivery).where(Delivery.file_hash == h)
                          .order_by(Delivery.id)).all()
    if not found:
        raise UsageError(f"{path} (SHA-256 {h[:16]}...) matches no delivery of this archive",
                         hint="the file may have been changed after delivery: compare it with "
                              "the file_hash in its .lineage.json")
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
