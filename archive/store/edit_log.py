"""Which manual edits are in force.

Edits are immutable rows. An edit is in force unless a later edit names it in
``supersedes`` (a replacement of the same kind, or an ``undo``). ``undo`` edits themselves
never act on positions. Edit kinds and their payloads:

- ``set-position``: {"easting", "northing", "source": "control"|"preplot"|"given"}
- ``set-height``: {"height", "source"}
- ``exclude-span``: {"node", "start", "end"} (ISO 8601 UTC; effective at the next solve)
- ``reject-station``: {} (the station is not delivered)
- ``ack-flag``: {"flag"}
- ``undo``: {} with ``supersedes`` = the edit undone
"""

from __future__ import annotations

from datetime import datetime

from sqlalchemy import select
from sqlalchemy.orm import Session

from archive.store.models import Edit

EDIT_KINDS = ("set-position", "set-height", "exclude-span", "reject-station", "ack-flag", "undo")


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
