"""The lineage manifest of a delivery: what the recipient holds beside the delivered file.

:class:`DeliveryFacts` gathers everything a delivery rests on before it is recorded;
:func:`lineage_manifest` lays it out as the JSON document written as ``FILE.lineage.json``
and stored by hash (its layout: docs/delivery.md, "What a delivery writes and records").
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any

import pyarrow as pa

from archive import __version__
from archive.deliver.context import CAUTION
from archive.deliver.decisions import by_occupation
from archive.edits.log import edit_dict
from archive.store.hashing import table_digest
from archive.store.ledger import SHORT_HASH, Anchor, row_digest
from archive.store.models import Edit, Run, Survey

LINEAGE_FORMAT = 1


@dataclass
class DeliveryFacts:
    """Everything a delivery states about itself, known before it is recorded."""

    fmt: str
    file_name: str
    file_hash: str
    file_size: int
    recipient: str
    note: str
    actor: str
    produced: datetime
    allow_flags: bool
    flags: dict[str, int]  # unacknowledged flags delivered anyway
    survey: Survey
    heights_datum: str
    run: Run
    run_manifest: dict[str, Any]
    edits: list[Edit]
    edit_set_hash: str
    unapplied: list[Edit]  # exclude spans in force the run did not apply
    inputs: dict[str, Any]
    raw_files: list[dict[str, Any]]
    final: pa.Table
    final_hash: str
    merge: bool
    merges: list[dict[str, Any]]
    # records whose height is not in the delivery's datum: [{"record", "datum"}]
    other_datum: list[dict[str, str]] = field(default_factory=list)
    awaiting: list[dict[str, Any]] = field(default_factory=list)  # held back: not harvested
    changes: dict[str, Any] | None = None  # an incremental delivery: what changed since which
    anchor: Anchor | None = None  # known once the delivery holds the ledger's write lock
    chain: list[str] = field(default_factory=list)  # short hashes of the events before it

    @property
    def n_stations(self) -> int:
        """Stations (line, point) delivered."""
        return len(set(zip(self.final["line"].to_pylist(), self.final["point"].to_pylist(),
                           strict=True)))


def occupations_of(final: pa.Table, edits: list[Edit] | None = None) -> list[dict[str, Any]]:
    """The delivered occupations of every station (line, point); a part of a node that
    moved during its stay also names its ``part`` (1 before the move, 2 after) and the
    ``occupation`` it belongs to. Each names its open review ``flags``, the flags people
    accepted and the ids of the deciding ``edits`` (listed in full under ``edits``)."""
    cols = ["line", "point", "index", "station_index", "node", "deployed", "retrieved",
            "merged"]
    extra = [c for c in ("occupation", "part", "flags", "flags_acknowledged")
             if c in final.column_names]
    decided = by_occupation(edits or [])
    stations: dict[tuple[float, float], list[dict[str, Any]]] = {}
    for r in final.select(cols + extra).to_pylist():  # one entry per delivered record
        occ = {k: r[k] for k in cols[2:]}
        occ["merged"] = [int(i) for i in r["merged"].split(";")] if r["merged"] else []
        if r.get("part") in (1, 2):
            occ |= {"part": r["part"], "occupation": r["occupation"]}
        occ["flags"] = [f for f in (r.get("flags") or "").split(";") if f]
        occ["flags_acknowledged"] = [f for f in (r.get("flags_acknowledged") or "").split(";")
                                     if f]
        o = r.get("occupation") if r.get("occupation") is not None else r["index"]
        occ["decisions"] = [e.id for e in decided.get((r["line"], r["point"], int(o)), [])]
        stations.setdefault((r["line"], r["point"]), []).append(occ)
    return [{"line": k[0], "point": k[1], "occupations": v} for k, v in stations.items()]


def lineage_manifest(f: DeliveryFacts, delivery_id: int) -> dict[str, Any]:
    """The lineage manifest of delivery ``delivery_id`` (see module doc)."""
    survey, run = f.survey, f.run
    return {
        "nodekeep_lineage": LINEAGE_FORMAT,
        "delivery": {"id": delivery_id, "format": f.fmt, "file_name": f.file_name,
                     "file_hash": f.file_hash, "size": f.file_size, "recipient": f.recipient,
                     "note": f.note, "actor": f.actor, "at": f.produced,
                     "allowed_flags": bool(f.allow_flags), "unacknowledged_flags": f.flags,
                     "n_stations": f.n_stations, "n_records": f.final.num_rows,
                     "merge_occupations": bool(f.merge)},
        "survey": {"name": survey.name, "crs": f"EPSG:{survey.crs_epsg}",
                   "crs_name": survey.crs_name, "unit": survey.linear_unit,
                   "vertical_datum": survey.vertical_datum, "heights_datum": f.heights_datum,
                   "client": survey.client, "contractor": survey.contractor},
        "run": {"id": run.id, "manifest_hash": run.manifest_hash,
                "positions_hash": run.positions_hash, "positions_digest": run.positions_digest,
                "code_version": run.code_version, "created_at": run.created_at,
                "created_by": run.created_by, "manifest": f.run_manifest},
        "edit_set_hash": f.edit_set_hash,
        "edits": [edit_dict(e) | {"digest": row_digest(e)} for e in f.edits],
        "edits_not_applied": [e.id for e in f.unapplied],
        "inputs": f.inputs,
        "raw_files": f.raw_files,
        "final_positions": {"hash": f.final_hash, "digest": table_digest(f.final),
                            "rows": f.final.num_rows},
        "occupations": occupations_of(f.final, f.edits),
        "merges": f.merges,
        "heights": {"datum": f.heights_datum, "other_datum": f.other_datum},
        # deployments held back because their node's log was not loaded yet
        "awaiting_harvest": {"count": len(f.awaiting), "deployments": f.awaiting},
        **({"changed_since": f.changes} if f.changes is not None else {}),
        **({"ledger": ledger_section(f.anchor, f.chain)} if f.anchor is not None else {}),
        "code_version": __version__,
        "caution": CAUTION,
    }


def ledger_section(anchor: Anchor, chain: list[str]) -> dict[str, Any]:
    """The manifest's ``ledger`` section: the anchor (the delivery's event and the hash of
    the event before it, also stated in the delivered file) and the first
    :data:`SHORT_HASH` hex digits of every earlier event's hash, which let a check name the
    first event that differs when the history before the delivery was rewritten."""
    return {"anchor": anchor.as_dict(), "short_hash_digits": SHORT_HASH,
            "short_hashes": chain}


def manifest_bytes(doc: dict[str, Any]) -> bytes:
    """The manifest as stored and written: indented, sorted keys, UTF-8, times ISO 8601."""
    def default(v: Any) -> Any:
        if hasattr(v, "isoformat"):
            return v.isoformat()
        raise TypeError(type(v).__name__)

    return (json.dumps(doc, indent=2, sort_keys=True, ensure_ascii=False, default=default,
                       allow_nan=False) + "\n").encode("utf-8")
