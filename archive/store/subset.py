"""A new archive holding a chosen part of another, with the ledger evidence that proves it.

:func:`write_subset` is the custody core of a bundle (:mod:`archive.lineage.bundle` chooses
what goes in): a new folder archive (SQLite catalog, local objects) that opens like any
other, holding

1. the chosen objects, streamed and re-hashed on arrival;
2. the chosen catalog rows, copied with their keys unchanged (so every ledgered digest still
   matches), from one read of the source;
3. the **whole chain** of the source's ledger up to its head, every event with its sequence
   number, time, actor, database user, action, survey, links and hash unchanged. An event
   that records a carried row, or one about the archive itself (no survey, no rows: its
   creation, upgrades, migrations), is carried **whole**. Any other event is carried
   **reduced** to the SHA-256 of its payload, which its hash covers (scheme 2,
   :mod:`archive.store.ledger`), so every link still recomputes. An event of scheme 1
   (written before payload digests existed) cannot be reduced: it is carried whole, and the
   rows it recorded that the subset leaves out are listed as left out;
4. a closing ``bundle.made`` event, appended after the source's head, declaring which events
   are reduced and which rows are left out, so ``verify`` accepts exactly those omissions.

The source is only read. The subset is verified (objects re-hashed, chain walked, rows
checked) before this returns.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from sqlalchemy import inspect, select
from sqlalchemy.orm import Session

from archive.errors import IntegrityError, UsageError
from archive.progress import NoProgress, Progress
from archive.store import migrate
from archive.store.archive import CONFIG_NAME, Archive
from archive.store.ledger import BUNDLE_ACTION, row_key
from archive.store.models import Base, LedgerEvent, LedgerHead, StoredObject
from archive.store.verify import LEDGERED_TABLES, VerifyReport, verify_archive

CATALOG = "catalog.sqlite"
OBJECTS = "objects"


@dataclass
class Selection:
    """What a subset carries: primary keys of ledgered rows by table name, and objects."""

    rows: dict[str, set[str]] = field(default_factory=dict)
    objects: set[str] = field(default_factory=set)

    def add(self, row: Base) -> None:
        """Carry a catalog row and every object it references."""
        self.rows.setdefault(row.__tablename__, set()).add(row_key(row))
        for col in object_columns(type(row)):
            value = getattr(row, col)
            if value is not None:
                self.objects.add(value)

    def has(self, table: str, key: str) -> bool:
        """Whether the row (table, key) is carried."""
        return key in self.rows.get(table, ())


@dataclass
class SubsetReport:
    """What :func:`write_subset` wrote."""

    root: str
    rows: dict[str, int]
    objects: int
    bytes: int
    events_whole: int
    events_reduced: int
    rows_left_out: int
    source_head: dict[str, Any]
    closing_event: dict[str, Any]
    verify: VerifyReport | None = None

    def as_dict(self) -> dict[str, Any]:
        return {"root": self.root, "rows": self.rows, "objects": self.objects,
                "bytes": self.bytes, "events_whole": self.events_whole,
                "events_reduced": self.events_reduced, "rows_left_out": self.rows_left_out,
                "source_head": self.source_head, "closing_event": self.closing_event,
                "verify_ok": bool(self.verify and self.verify.ok)}


def object_columns(model: type[Base]) -> list[str]:
    """Columns of a catalog table that name an object."""
    return [col.key for col in inspect(model).columns
            if any(fk.column.table.name == "objects" for fk in col.foreign_keys)]


def _ranges(seqs: list[int]) -> list[list[int]]:
    """Sorted sequence numbers as [first, last] runs."""
    out: list[list[int]] = []
    for s in sorted(seqs):
        if out and s == out[-1][1] + 1:
            out[-1][1] = s
        else:
            out.append([s, s])
    return out


def _check_destination(dest: Path) -> None:
    if dest.exists() and (not dest.is_dir() or any(dest.iterdir())):
        raise UsageError(f"{dest} exists and is not an empty folder",
                         hint="give --to a new folder (the bundle is a whole archive)")
    if not dest.parent.is_dir():
        raise UsageError(f"the folder {dest.parent} does not exist",
                         hint="create it first or choose another --to")
    if not os.access(dest.parent, os.W_OK | os.X_OK):
        raise UsageError(f"the folder {dest.parent} is not writable",
                         hint="choose a folder you may write to with --to")


def write_subset(source: Archive, dest: str | Path, sel: Selection, *,
                 declaration: dict[str, Any], progress: Progress | None = None) -> SubsetReport:
    """Write the subset ``sel`` of ``source`` as a new archive in ``dest`` (see module doc).

    ``declaration`` goes into the closing ``bundle.made`` event beside what this function
    adds (source head, reduced events, rows left out, counts).
    """
    progress = progress or NoProgress()
    dest = Path(dest)
    _check_destination(dest)
    dest.mkdir(exist_ok=True)
    config = {"format": 1, "db": f"sqlite:///{CATALOG}", "objects": OBJECTS}
    target = Archive(dest.resolve(), config, actor=source.actor)
    try:
        target.objects.root.mkdir(parents=True, exist_ok=True)
        migrate.upgrade(target.engine)  # a new catalog: tables, no event
        n_bytes = _copy_objects(source, target, sel, progress)
        report = _copy_catalog(source, target, sel, declaration)
        report.bytes = n_bytes
        tmp = dest / (CONFIG_NAME + ".tmp")
        tmp.write_text("# nodekeep archive: a custody bundle (see docs/custody.md)\n"
                       "[archive]\nformat = 1\n"
                       f'db = "sqlite:///{CATALOG}"\nobjects = "{OBJECTS}"\n',
                       encoding="utf-8")
        os.replace(tmp, dest / CONFIG_NAME)
        report.verify = verify_archive(target, progress=progress)
    finally:
        target.close()
    if not report.verify.ok:
        kinds = sorted({p.kind for p in report.verify.problems})
        raise IntegrityError(f"the bundle written to {dest} does not verify ({', '.join(kinds)})",
                             hint="run 'nodekeep verify' on the source archive; remove the "
                                  "folder and bundle again")
    return report


def _copy_objects(source: Archive, target: Archive, sel: Selection, progress: Progress) -> int:
    with source.session() as s:
        sizes = {o.hash: o.size for o in s.scalars(select(StoredObject).where(
            StoredObject.hash.in_(sorted(sel.objects))))}
    unknown = sorted(sel.objects - set(sizes))
    if unknown:
        raise IntegrityError(f"the source catalog does not know object {unknown[0]}",
                             hint="run 'nodekeep verify' on the source archive")
    progress.start(sum(sizes.values()), "bytes", "bundle objects")
    for h in sorted(sizes):
        with source.objects.open(h) as fh:
            got, _ = target.objects.put_stream(fh)
        if got != h:
            raise IntegrityError(f"object {h} of the source reads back as {got}",
                                 hint="run 'nodekeep verify' on the source archive")
        progress.advance(sizes[h], h[:12])
    progress.close()
    return sum(sizes.values())


def _copy_catalog(source: Archive, target: Archive, sel: Selection,
                  declaration: dict[str, Any]) -> SubsetReport:
    """Rows, objects rows and the ledger, in one target transaction; then the closing event."""
    counts: dict[str, int] = {}
    with source.session() as src, target.transaction() as dst:
        head = src.get(LedgerHead, 1)
        if head is None:
            raise UsageError("the source archive has an empty ledger")
        objs = [_values(o) for o in src.scalars(select(StoredObject).where(
            StoredObject.hash.in_(sorted(sel.objects))))]
        if objs:
            dst.execute(StoredObject.__table__.insert(), objs)
        for model in sorted(LEDGERED_TABLES, key=lambda m: _order(m)):
            keys = sel.rows.get(model.__tablename__, set())
            pk = inspect(model).primary_key[0]
            rows = [r for r in src.scalars(select(model).order_by(pk)) if row_key(r) in keys]
            if rows:
                dst.execute(model.__table__.insert(), [_values(r) for r in rows])
            counts[model.__tablename__] = len(rows)
        whole, reduced, left_out = _copy_events(src, dst, sel, head.seq)
        dst.add(LedgerHead(id=1, seq=head.seq, hash=head.hash))
        dst.flush()
        payload = dict(declaration) | {
            "source_head": {"seq": head.seq, "hash": head.hash},
            "reduced": _ranges(reduced), "left_out": sorted(left_out),
            "events_whole": whole, "events_reduced": len(reduced), "row_counts": counts,
            "objects": len(sel.objects)}
        closing = target.log(dst, BUNDLE_ACTION, payload)
        closing_event = {"seq": closing.seq, "hash": closing.hash}
    return SubsetReport(root=str(target.root), rows=counts, objects=len(sel.objects), bytes=0,
                        events_whole=whole, events_reduced=len(reduced),
                        rows_left_out=len(left_out),
                        source_head={"seq": head.seq, "hash": head.hash},
                        closing_event=closing_event)


def _order(model: type[Base]) -> int:
    """Position of a table in foreign-key order (parents first)."""
    return [t.name for t in Base.metadata.sorted_tables].index(model.__tablename__)


def _values(row: Base) -> dict[str, Any]:
    return {c.key: getattr(row, c.key) for c in inspect(type(row)).columns}


def _copy_events(src: Session, dst: Session, sel: Selection, up_to: int
                 ) -> tuple[int, list[int], set[tuple[str, str]]]:
    """Copy events 1..``up_to``, whole or reduced (see module doc). Returns (whole count,
    reduced sequence numbers, rows left out that whole events recorded)."""
    whole, reduced, left_out = 0, [], set()
    batch: list[dict[str, Any]] = []
    for ev in src.scalars(select(LedgerEvent).where(LedgerEvent.seq <= up_to)
                          .order_by(LedgerEvent.seq)).yield_per(2000):
        values = _values(ev)
        recorded = [(r["table"], r["key"]) for r in
                    (json.loads(ev.payload).get("rows", []) if ev.payload else [])]
        carried = [k for k in recorded if sel.has(*k)]
        keep = bool(carried) or (not recorded and ev.survey_id is None)
        if ev.payload is None:  # already reduced (the source is itself a bundle)
            reduced.append(ev.seq)
        elif not keep and (ev.scheme or 1) >= 2:
            values["payload"] = None
            reduced.append(ev.seq)
        else:
            whole += 1
            left_out.update(k for k in recorded if not sel.has(*k))
        batch.append(values)
        if len(batch) >= 2000:
            dst.execute(LedgerEvent.__table__.insert(), batch)
            batch = []
    if batch:
        dst.execute(LedgerEvent.__table__.insert(), batch)
    return whole, reduced, {tuple(k) for k in left_out}

