"""Recording edits and reading which are in force.

Edits are immutable rows. An edit is in force unless a later edit names it in ``supersedes``
(a replacement of the same kind, or an ``undo``); ``undo`` edits themselves never act on
positions. A new ``set-position``, ``set-height`` or ``reject-station`` of an occupation
supersedes the one in force for it, a new ``ack-flag`` the one in force for the same
occupation and flag; ``exclude-span`` edits add up. Every edit is written in one transaction
with its ``edit.<kind>`` ledger event.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import select
from sqlalchemy.orm import Session

from archive.edits.kinds import AUTO_SUPERSEDE, FINAL_KINDS
from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json
from archive.store.ledger import row_digest
from archive.store.models import Edit, utcnow


def edits_in_force(session: Session, survey_id: int, *, as_of: datetime | None = None,
                   kinds: tuple[str, ...] | None = None) -> list[Edit]:
    """Edits of a survey in force (optionally as of a time), oldest first."""
    q = select(Edit).where(Edit.survey_id == survey_id).order_by(Edit.id)
    if as_of is not None:
        q = q.where(Edit.created_at <= as_of)
    edits = list(session.scalars(q))
    superseded = {e.supersedes for e in edits if e.supersedes is not None}
    live = [e for e in edits if e.id not in superseded and e.kind != "undo"]
    if kinds is not None:
        live = [e for e in live if e.kind in kinds]
    return live


@dataclass
class EditSpec:
    """One edit to record: its kind, the occupation it names, payload and reason."""

    kind: str
    line: float
    point: float
    index: int
    payload: dict[str, Any]
    reason: str
    supersedes: int | None = None


def _live_key(kind: str, line: float, point: float, index: int,
              payload: dict[str, Any]) -> tuple[Any, ...]:
    """What a new edit of ``kind`` replaces: the same occupation (and flag, for acks)."""
    flag = payload.get("flag") if kind == "ack-flag" else None
    return (kind, float(line), float(point), int(index), flag)


def record_edits(arc: Archive, survey_id: int, specs: list[EditSpec], *,
                 batch: dict[str, Any] | None = None) -> list[Edit]:
    """Insert edits in ONE transaction, each superseding what it replaces, each with its own
    ``edit.<kind>`` ledger event (``batch``, when given, is added to every event's payload
    so the events of one review session can be found together). All or nothing."""
    out: list[Edit] = []
    with arc.transaction() as tx:
        live: dict[tuple[Any, ...], int] = {}
        if any(sp.supersedes is None and sp.kind in AUTO_SUPERSEDE for sp in specs):
            for e in edits_in_force(tx, survey_id, kinds=AUTO_SUPERSEDE):
                live[_live_key(e.kind, e.line, e.point, e.point_index,
                               json.loads(e.payload or "{}"))] = e.id
        now = utcnow()
        pending: dict[tuple[Any, ...], Edit] = {}  # added in this batch, id not yet known
        for sp in specs:
            key = _live_key(sp.kind, sp.line, sp.point, sp.index, sp.payload)
            supersedes = sp.supersedes
            if supersedes is None and sp.kind in AUTO_SUPERSEDE:
                if key in pending:  # replaces an edit of this same batch: its id is needed
                    tx.flush()
                    live[key] = pending.pop(key).id
                supersedes = live.get(key)
            edit = Edit(survey_id=survey_id, kind=sp.kind, line=float(sp.line),
                        point=float(sp.point), point_index=int(sp.index),
                        payload=canonical_json(sp.payload).decode("utf-8"), reason=sp.reason,
                        supersedes=supersedes, created_at=now, created_by=arc.actor)
            tx.add(edit)
            if sp.kind in AUTO_SUPERSEDE:
                pending[key] = edit
            out.append(edit)
        tx.flush()  # every id at once
        events = []
        for sp, edit in zip(specs, out, strict=True):
            event = {"edit": edit.id, "kind": sp.kind,
                     "station": [edit.line, edit.point, int(sp.index)], "payload": sp.payload,
                     "reason": sp.reason, "supersedes": edit.supersedes}
            if batch is not None:
                event["batch"] = batch
            events.append((f"edit.{sp.kind}", event, survey_id, [edit]))
        arc.log_many(tx, events)
    return out


def record_edit(arc: Archive, survey_id: int, kind: str, line: float, point: float,
                index: int, payload: dict[str, Any], reason: str, *,
                supersedes: int | None = None) -> Edit:
    """Insert one edit, superseding what it replaces, with its ledger event."""
    return record_edits(arc, survey_id, [EditSpec(kind, line, point, index, payload, reason,
                                                  supersedes)])[0]


def edit_dict(e: Edit, *, in_force: bool | None = None) -> dict[str, Any]:
    """An edit as plain data."""
    d = {"id": e.id, "kind": e.kind, "line": e.line, "point": e.point, "index": e.point_index,
         "payload": json.loads(e.payload or "{}"), "reason": e.reason,
         "supersedes": e.supersedes, "created_at": e.created_at, "created_by": e.created_by}
    if in_force is not None:
        d["in_force"] = in_force
    return d


def edit_node(d: dict[str, Any]) -> str | None:
    """The node of the occupation an edit (as :func:`edit_dict`) names, when it says."""
    p = d.get("payload") or {}
    return (p.get("occupation") or {}).get("node") or p.get("node")


def list_edits(arc: Archive, survey_id: int, *, all_edits: bool = False,
               line: float | None = None, point: float | None = None,
               as_of: datetime | None = None) -> list[dict[str, Any]]:
    """Edits of a survey, oldest first: those in force, or every edit with ``all_edits``."""
    with arc.session() as s:
        live = {e.id for e in edits_in_force(s, survey_id, as_of=as_of)}
        q = select(Edit).where(Edit.survey_id == survey_id).order_by(Edit.id)
        if as_of is not None:
            q = q.where(Edit.created_at <= as_of)
        rows = list(s.scalars(q))
    return [edit_dict(e, in_force=e.id in live) for e in rows
            if (all_edits or e.id in live)
            and (line is None or e.line == line) and (point is None or e.point == point)]


def set_hash(edits: list[Edit]) -> str:
    """The hash naming a set of edits (over their ids and row digests)."""
    return canonical_hash([[e.id, row_digest(e)] for e in edits])


def edit_set(arc: Archive, survey_id: int, *, as_of: datetime | None = None,
             ) -> tuple[list[Edit], str]:
    """The edits in force and the hash naming that set."""
    with arc.session() as s:
        live = edits_in_force(s, survey_id, as_of=as_of)
    return live, set_hash(live)


def delivery_edit_set(arc: Archive, survey_id: int, manifest: dict[str, Any], *,
                      as_of: datetime | None = None) -> tuple[list[Edit], str, list[Edit]]:
    """The edits a delivery of a run rests on, their set hash, and exclude spans it lacks.

    The set is the final-position edits in force plus the exclude-span edits the run's
    manifest applied (whatever became of them since). The third item lists exclude-span
    edits in force that the run did not apply: the run must be solved again to apply them.
    """
    applied_ids = {int(e["id"]) for e in manifest.get("edits") or []
                   if e.get("kind", "exclude-span") == "exclude-span"}
    with arc.session() as s:
        live = edits_in_force(s, survey_id, as_of=as_of)
        applied = [s.get(Edit, i) for i in sorted(applied_ids)]
    final = [e for e in live if e.kind in FINAL_KINDS]
    missing = [e for e in live if e.kind == "exclude-span" and e.id not in applied_ids]
    edits = sorted(final + [e for e in applied if e is not None], key=lambda e: e.id)
    return edits, set_hash(edits), missing


def exclude_spans_in_force(arc: Archive, survey_id: int) -> list[dict[str, Any]]:
    """The exclude-span edits in force as the run manifest records them (id, kind, payload)."""
    with arc.session() as s:
        return [{"id": e.id, "kind": e.kind, "payload": json.loads(e.payload or "{}")}
                for e in edits_in_force(s, survey_id, kinds=("exclude-span",))]
