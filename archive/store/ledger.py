"""The hash-chained ledger: one append-only event per state change.

An event's hash covers its sequence number, UTC time, actor, action, survey and canonical
payload, and the previous event's hash, so rewriting any event breaks every later link.
Writers lock the single ``ledger_head`` row (``SELECT ... FOR UPDATE`` on PostgreSQL; the
SQLite write transaction already holds the database write lock), so the chain never forks.
Catalog rows written by the same transaction are summarised in the payload by their row
digest, which lets ``verify`` detect a row changed behind the archive's back.
"""

from __future__ import annotations

import json
from datetime import datetime
from typing import Any

from sqlalchemy import inspect, select
from sqlalchemy.orm import Session

from archive.store.hashing import canonical_hash, canonical_json
from archive.store.models import Base, LedgerEvent, LedgerHead, utcnow

GENESIS = "0" * 64


def event_hash(
    seq: int, at: datetime, actor: str, action: str, survey_id: int | None, payload: str,
    prev_hash: str,
) -> str:
    """Hash of an event over its canonical fields (the payload as stored text)."""
    return canonical_hash(
        {
            "seq": seq,
            "at": at.isoformat(),
            "actor": actor,
            "action": action,
            "survey": survey_id,
            "payload": payload,
            "prev": prev_hash,
        }
    )


def row_columns(row: Base) -> list[str]:
    """Names of a row's columns, sorted."""
    return sorted(col.key for col in inspect(type(row)).columns)


def row_values(row: Base, columns: list[str] | None = None) -> dict[str, Any]:
    """Column values of a catalog row (all, or the named ones), as JSON-able values."""
    out: dict[str, Any] = {}
    for key in columns if columns is not None else row_columns(row):
        value = getattr(row, key, None)
        out[key] = value.isoformat() if isinstance(value, datetime) else value
    return out


def row_key(row: Base) -> str:
    """The primary key of a row as text (composite keys joined by '|')."""
    ident = inspect(row).identity
    return "|".join(str(v) for v in ident)


def row_digest(row: Base, columns: list[str] | None = None) -> str:
    """SHA-256 of a row's canonical column values (all columns, or the named ones).

    The ledger records which columns it digested, so a column added by a later migration
    does not make older rows look altered.
    """
    return canonical_hash(row_values(row, columns))


def append(
    session: Session,
    *,
    actor: str,
    action: str,
    payload: dict[str, Any],
    survey_id: int | None = None,
    rows: list[Base] | None = None,
) -> LedgerEvent:
    """Append one event inside the caller's transaction and move the head.

    ``rows`` are catalog rows written by the same transaction; their digests go into the
    payload under ``"rows"`` so later tampering with them is detectable.
    """
    if rows:
        session.flush()
        payload = dict(payload)
        payload["rows"] = sorted(
            (
                {"table": r.__tablename__, "key": row_key(r), "columns": row_columns(r),
                 "digest": row_digest(r)}
                for r in rows
            ),
            key=lambda d: (d["table"], d["key"]),
        )
    head = session.execute(
        select(LedgerHead).where(LedgerHead.id == 1).with_for_update()
    ).scalar_one_or_none()
    prev_seq, prev_hash = (head.seq, head.hash) if head else (0, GENESIS)
    text = canonical_json(payload).decode("utf-8")
    at = utcnow()
    seq = prev_seq + 1
    h = event_hash(seq, at, actor, action, survey_id, text, prev_hash)
    event = LedgerEvent(
        seq=seq, at=at, actor=actor, action=action, survey_id=survey_id, payload=text,
        prev_hash=prev_hash, hash=h,
    )
    session.add(event)
    if head is None:
        session.add(LedgerHead(id=1, seq=seq, hash=h))
    else:
        head.seq, head.hash = seq, h
    session.flush()
    return event


def payload_of(event: LedgerEvent) -> dict[str, Any]:
    """The decoded payload of an event."""
    return json.loads(event.payload)


def head(session: Session) -> LedgerHead | None:
    """The ledger head row (None for an empty ledger)."""
    return session.get(LedgerHead, 1)
