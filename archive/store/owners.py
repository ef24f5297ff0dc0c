"""What a stored object belongs to, in words a user recognises (for error messages).

An object is named by its hash; a message that says only the hash sends the user hunting.
:func:`object_owner` looks the hash up in every catalog column that references objects and
says, for instance, "fix table of node N1042, file node1042_0312.nmea" or "survey input
stations version 2 (preplot_v2.sps)".
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from sqlalchemy import or_, select

from archive.store.models import Delivery, InputVersion, RawFile, Run

if TYPE_CHECKING:
    from archive.store.archive import Archive

_RAW_ROLES = {"object_hash": "raw log", "fixes_hash": "fix table", "rejects_hash": "rejects table",
              "profile_hash": "column profile"}
_INPUT_ROLES = {"source_hash": "source file", "table_hash": "table"}
_RUN_ROLES = {"manifest_hash": "manifest", "positions_hash": "positions"}
_DELIVERY_ROLES = {"file_hash": "file", "manifest_hash": "manifest", "final_hash": "final table"}
# each catalog table that references objects: its columns (with the role they name) and
# how a row is described to a user
_OWNERS = (
    (RawFile, _RAW_ROLES, lambda r: f"node {r.node}, file {r.original_name}"),
    (InputVersion, _INPUT_ROLES,
     lambda v: f"survey input {v.kind} version {v.version} ({v.original_name})"),
    (Run, _RUN_ROLES, lambda run: f"run {run.id[:12]}"),
    (Delivery, _DELIVERY_ROLES, lambda d: f"delivery {d.id} ({d.file_name})"),
)


def object_owner(arc: Archive, h: str) -> str | None:
    """A short description of what references object ``h`` (the first few owners), or None."""
    found: list[str] = []
    with arc.session() as s:
        for model, roles, describe in _OWNERS:
            rows = s.scalars(select(model).where(
                or_(*(getattr(model, c) == h for c in roles))).limit(3)).all()
            for r in rows:
                role = next(w for c, w in roles.items() if getattr(r, c) == h)
                found.append(f"{role} of {describe(r)}")
    if not found:
        return None
    return "; ".join(found[:3]) + ("; ..." if len(found) > 3 else "")
