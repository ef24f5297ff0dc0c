"""The hash-chained ledger: one append-only event per state change.

An event's hash covers its sequence number, UTC time, actor, action, survey and canonical
payload, and the previous event's hash, so rewriting any event breaks every later link.
Writers lock the single ``ledger_head`` row (``SELECT ... FOR UPDATE`` on PostgreSQL; the
SQLite write transaction already holds the database write lock), so the chain never forks.
Catalog rows written by the same transaction are summarised in the payload by their row
digest, which lets ``verify`` detect a row changed behind the archive's back.

Two hash schemes exist. Scheme 1 (events written before catalog revision 0003) hashes the payload
text itself. Scheme 2, written by every new event, hashes the payload's SHA-256 instead and
adds the database session user (PostgreSQL's ``session_user``: who the server says is
connected, beside the actor the command declared; None on SQLite). Hashing the payload's
digest rather than its text lets a custody bundle carry an event it does not need as its
digest alone and still recompute every link of the chain (docs/custody.md).
"""

from __future__ import annotations

import json
import re
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import inspect, select
from sqlalchemy.orm import Session

from archive.store.hashing import canonical_hash, canonical_json, sha256_bytes
from archive.store.models import Base, LedgerEvent, LedgerHead, utcnow

GENESIS = "0" * 64
SCHEME = 2
"""The hash scheme of new events (see module doc)."""
BUNDLE_ACTION = "bundle.made"
"""The event a custody bundle closes its ledger with; its payload declares which earlier
events the bundle carries reduced to their digest (``reduced``, ranges of sequence numbers)
and which rows recorded by events it carries whole it leaves out (``left_out``)."""


def event_hash(
    seq: int, at: datetime, actor: str, action: str, survey_id: int | None, payload: str,
    prev_hash: str,
) -> str:
    """Scheme-1 hash of an event over its canonical fields (the payload as stored text)."""
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


def payload_digest(payload: str) -> str:
    """SHA-256 of a payload's stored text (UTF-8)."""
    return sha256_bytes(payload.encode("utf-8"))


def event_hash_v2(
    seq: int, at: datetime, actor: str, db_user: str | None, action: str,
    survey_id: int | None, digest: str, prev_hash: str,
) -> str:
    """Scheme-2 hash of an event: its fields, the payload's SHA-256 and the session user."""
    return canonical_hash(
        {
            "scheme": 2,
            "seq": seq,
            "at": at.isoformat(),
            "actor": actor,
            "db_user": db_user,
            "action": action,
            "survey": survey_id,
            "payload_sha256": digest,
            "prev": prev_hash,
        }
    )


def hash_of(ev: LedgerEvent) -> str | None:
    """The hash an event's content gives under its scheme (None when it cannot be
    computed: a scheme-1 event without its payload, or an unknown scheme).

    A scheme-2 event carried with its payload is hashed over that payload's digest, so a
    changed payload shows as a wrong hash; one carried without it, over the recorded digest.
    """
    if (ev.scheme or 1) == 1:
        if ev.payload is None:
            return None
        return event_hash(ev.seq, ev.at, ev.actor, ev.action, ev.survey_id, ev.payload,
                          ev.prev_hash)
    if ev.scheme == 2:
        digest = payload_digest(ev.payload) if ev.payload is not None else ev.payload_digest
        if digest is None:
            return None
        return event_hash_v2(ev.seq, ev.at, ev.actor, ev.db_user, ev.action, ev.survey_id,
                             digest, ev.prev_hash)
    return None


def session_user(session: Session) -> str | None:
    """The database session user as the server reports it (PostgreSQL), else None."""
    conn = session.connection()
    if conn.dialect.name != "postgresql":
        return None
    info = conn.connection.info  # per driver connection: the login does not change
    if "nodekeep_session_user" not in info:
        info["nodekeep_session_user"] = conn.exec_driver_sql("SELECT session_user").scalar()
    return info["nodekeep_session_user"]


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
    return append_many(session, actor=actor, events=[(action, payload, survey_id, rows)])[0]


def append_many(
    session: Session,
    *,
    actor: str,
    events: list[tuple[str, dict[str, Any], int | None, list[Base] | None]],
) -> list[LedgerEvent]:
    """Append events ``(action, payload, survey_id, rows)`` in order inside the caller's
    transaction, chained as :func:`append` chains one: the writers' lock on the head is
    taken once and the head moved once, so many events cost one round trip, not one each."""
    if any(rows for _, _, _, rows in events):
        session.flush()
    head = session.execute(
        select(LedgerHead).where(LedgerHead.id == 1).with_for_update()
    ).scalar_one_or_none()
    seq, prev_hash = (head.seq, head.hash) if head else (0, GENESIS)
    db_user = session_user(session)
    out = []
    for action, payload, survey_id, rows in events:
        if rows:
            payload = dict(payload)
            payload["rows"] = sorted(
                (
                    {"table": r.__tablename__, "key": row_key(r), "columns": row_columns(r),
                     "digest": row_digest(r)}
                    for r in rows
                ),
                key=lambda d: (d["table"], d["key"]),
            )
        text = canonical_json(payload).decode("utf-8")
        at = utcnow()
        seq += 1
        digest = payload_digest(text)
        h = event_hash_v2(seq, at, actor, db_user, action, survey_id, digest, prev_hash)
        event = LedgerEvent(
            seq=seq, at=at, actor=actor, db_user=db_user, action=action, survey_id=survey_id,
            payload=text, payload_digest=digest, scheme=SCHEME, prev_hash=prev_hash, hash=h,
        )
        session.add(event)
        out.append(event)
        prev_hash = h
    if not out:
        return out
    if head is None:
        session.add(LedgerHead(id=1, seq=seq, hash=prev_hash))
    else:
        head.seq, head.hash = seq, prev_hash
    session.flush()
    return out


SHORT_HASH = 16
"""Hex digits of each earlier event's hash a delivery's manifest keeps (to name the first
event that differs; the full hash of the event before the delivery's is the proof)."""

_ANCHOR_TEXT = re.compile(r"event\s+(\d+)\s+after\s+([0-9a-f][0-9a-f\s]*)")


@dataclass(frozen=True)
class Anchor:
    """Where a delivery sits in the ledger: ``event`` is the sequence number of the event
    that records it and ``after`` the hash of the event before (the head the delivery was
    recorded on). The delivered file cannot carry its own event's hash, which covers the
    file's hash; ``after`` covers every event before it."""

    event: int
    after: str

    def text(self) -> str:
        """The anchor as delivered files state it: ``event N after HASH``."""
        return f"event {self.event} after {self.after}"

    def as_dict(self) -> dict[str, Any]:
        """The anchor as plain data."""
        return {"event": self.event, "after": self.after}

    @classmethod
    def parse(cls, text: str) -> Anchor | None:
        """The anchor in a text (header records may break the hash over lines), or None."""
        m = _ANCHOR_TEXT.search(text)
        if m is None:
            return None
        digits = re.sub(r"\s", "", m.group(2))[:64]
        return cls(int(m.group(1)), digits) if len(digits) == 64 else None


def next_anchor(session: Session) -> Anchor:
    """The anchor of the next event, taking the writers' lock on the ledger head: inside a
    write transaction, the next :func:`append` in it is that event."""
    head = session.execute(
        select(LedgerHead).where(LedgerHead.id == 1).with_for_update()
    ).scalar_one_or_none()
    return Anchor(head.seq + 1, head.hash) if head else Anchor(1, GENESIS)


def short_hashes(session: Session, before: int) -> list[str]:
    """The first :data:`SHORT_HASH` hex digits of the hash of every event before ``before``,
    in order (item ``i`` is event ``i + 1``)."""
    rows = session.execute(select(LedgerEvent.hash).where(LedgerEvent.seq < before)
                           .order_by(LedgerEvent.seq)).scalars()
    return [h[:SHORT_HASH] for h in rows]


def payload_of(event: LedgerEvent) -> dict[str, Any] | None:
    """The decoded payload of an event (None when a bundle carries it as its digest only)."""
    return None if event.payload is None else json.loads(event.payload)


def head(session: Session) -> LedgerHead | None:
    """The ledger head row (None for an empty ledger)."""
    return session.get(LedgerHead, 1)
