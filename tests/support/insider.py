"""What someone with write access to the catalog can do behind the archive's back: change an
old ledger event and recompute every later hash and the head, so the chain is whole again
and a plain ``verify`` passes. Only a hash held outside the archive exposes it."""

from __future__ import annotations

import json
from collections.abc import Callable
from typing import Any

from sqlalchemy import select, update

from archive.store.archive import Archive
from archive.store.ledger import GENESIS, hash_of, payload_digest
from archive.store.models import LedgerEvent, LedgerHead


def rewrite_history(arc: Archive, seq: int, change: Callable[[dict[str, Any]], None]) -> None:
    """Apply ``change`` to the payload of event ``seq`` (a dict, changed in place), then
    relink and rehash every event from there on and move the head to the new last hash."""
    with arc.session() as s:
        events = list(s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq)))
    prev = GENESIS
    with arc.engine.begin() as c:
        for ev in events:
            if ev.seq == seq:
                payload = json.loads(ev.payload)
                change(payload)
                ev.payload = json.dumps(payload, sort_keys=True, separators=(",", ":"),
                                        ensure_ascii=False)
            if ev.seq >= seq:
                ev.prev_hash = prev
                if ev.scheme >= 2 and ev.payload is not None:
                    ev.payload_digest = payload_digest(ev.payload)
                ev.hash = hash_of(ev)
                c.execute(update(LedgerEvent).where(LedgerEvent.seq == ev.seq).values(
                    payload=ev.payload, payload_digest=ev.payload_digest,
                    prev_hash=ev.prev_hash, hash=ev.hash))
            prev = ev.hash
        c.execute(update(LedgerHead).where(LedgerHead.id == 1).values(hash=prev))
