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


def object_owner(arc: Archive, h: str) -> str | None:
    """A short description of what references object ``h`` (the first few owners), or None."""
    found: list[str] = []
    with arc.session() as s:
        raw = s.scalars(select(RawFile).where(
            or_(*(getattr(RawFile, c) == h for c in _RAW_ROLES))).limit(3)).all()
        for r in raw:
            role = next(v for c, v in _RAW_ROLES.items() if getattr(r, c) == h)
            found.append(f"{role} of node {r.node}, file {r.original_name}")
        ins = s.scalars(select(InputVersion).where(
            or_(*(getattr(InputVersion, c) == h for c in _INPUT_ROLES))).limit(3)).all()
        for v in ins:
            role = next(w for c, w in _INPUT_ROLES.items() if getattr(v, c) == h)
            found.append(f"{role} of survey input {v.kind} version {v.version} "
                         f"({v.original_name})")
        runs = s.scalars(select(Run).where(
            or_(*(getattr(Run, c) == h for c in _RUN_ROLES))).limit(3)).all()
        for run in runs:
            role = next(w for c, w in _RUN_ROLES.items() if getattr(run, c) == h)
            found.append(f"{role} of run {run.id[:12]}")
        dels = s.scalars(select(Delivery).where(
            or_(*(getattr(Delivery, c) == h for c in _DELIVERY_ROLES))).limit(3)).all()
        for d in dels:
            role = next(w for c, w in _DELIVERY_ROLES.items() if getattr(d, c) == h)
            found.append(f"{role} of delivery {d.id} ({d.file_name})")
    if not found:
        return None
    return "; ".join(found[:3]) + ("; ..." if len(found) > 3 else "")
