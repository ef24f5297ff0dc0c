"""Reading the ledger."""

from __future__ import annotations

import json
from typing import Any

from sqlalchemy import select

from archive.store.archive import Archive
from archive.store.models import LedgerEvent


def event_dict(e: LedgerEvent) -> dict[str, Any]:
    """A ledger event as plain data: ``actor`` is who the command said acted, ``db_user``
    who the database server says was connected (PostgreSQL; None on SQLite and for events
    written before it was recorded); ``payload`` is None for an event a custody bundle
    carries as its digest only (``payload_digest``)."""
    return {"seq": e.seq, "at": e.at, "actor": e.actor, "db_user": e.db_user,
            "action": e.action, "survey_id": e.survey_id,
            "payload": None if e.payload is None else json.loads(e.payload),
            "payload_digest": e.payload_digest, "scheme": e.scheme,
            "prev_hash": e.prev_hash, "hash": e.hash}


def ledger_events(arc: Archive, *, limit: int | None = None,
                  action: str | None = None) -> list[dict[str, Any]]:
    """Ledger events, newest first."""
    with arc.session() as s:
        q = select(LedgerEvent).order_by(LedgerEvent.seq.desc())
        if action:
            q = q.where(LedgerEvent.action == action)
        if limit:
            q = q.limit(limit)
        return [event_dict(e) for e in s.scalars(q)]


def ledger_head(arc: Archive) -> dict[str, Any]:
    """The newest event's sequence number, time and hash."""
    events = ledger_events(arc, limit=1)
    if not events:
        return {"seq": 0, "at": None, "hash": "0" * 64}
    e = events[0]
    return {"seq": e["seq"], "at": e["at"], "hash": e["hash"]}
