"""``verify``: prove the archive is whole, or name exactly what is not.

Checks, with a fixed vocabulary of problem kinds:

- ``missing``: a catalog object row whose file is not in the object store.
- ``hash-mismatch``: a stored file whose bytes no longer hash to its name.
- ``bad-reference``: a catalog row pointing at an object the catalog does not know.
- ``broken-chain``: a ledger event whose hash, sequence or link to the previous event is wrong,
  or a ledger head that does not name the last event.
- ``altered-row``: a catalog row whose content differs from what its ledger event recorded.
- ``unledgered-row``: a catalog row that no ledger event recorded.
- ``deleted-row``: a row a ledger event recorded that is no longer in the catalog.
- ``damaged-catalog``: the catalog database file itself is damaged (a page, an index entry,
  text that is not UTF-8), or could not be read at all (:mod:`archive.store.catalog_check`).
- ``broken-constraint``: a catalog row whose foreign key does not resolve, or rows that
  share a key that must be unique.
- ``dangling`` (not corruption): a stored file nothing in the catalog references, typically
  left by an interrupted write. Reported apart; ``verify`` still passes.

A custody bundle (:mod:`archive.lineage.bundle`) carries some events reduced to the digest
of their payload and leaves out rows that events it carries whole recorded; its closing
``bundle.made`` event declares both, and only what it declares is accepted. An event
without its payload that no such event declares is a ``broken-chain``.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field
from typing import Any

from sqlalchemy import inspect, select
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session

from archive.progress import NoProgress, Progress
from archive.store.archive import Archive
from archive.store.catalog_check import check_catalog
from archive.store.ledger import (
    BUNDLE_ACTION,
    GENESIS,
    hash_of,
    payload_digest,
    row_digest,
    row_key,
)
from archive.store.models import (
    Base,
    Delivery,
    Edit,
    InputVersion,
    LedgerEvent,
    LedgerHead,
    RawFile,
    Run,
    StoredObject,
    Survey,
)

LEDGERED_TABLES: list[type[Base]] = [Survey, RawFile, InputVersion, Run, Edit, Delivery]


@dataclass
class Problem:
    """One thing wrong, named exactly."""

    kind: str
    subject: str
    detail: str

    def as_dict(self) -> dict[str, str]:
        return {"kind": self.kind, "subject": self.subject, "detail": self.detail}


@dataclass
class VerifyReport:
    """The outcome of :func:`verify_archive`."""

    problems: list[Problem] = field(default_factory=list)
    dangling: list[str] = field(default_factory=list)
    objects_checked: int = 0
    bytes_checked: int = 0
    events_checked: int = 0
    rows_checked: int = 0
    events_reduced: int = 0  # carried by a bundle as their payload digest only
    rows_left_out: int = 0  # recorded by the ledger, left out of a bundle on purpose
    head: str | None = None

    @property
    def ok(self) -> bool:
        return not self.problems

    def as_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "problems": [p.as_dict() for p in self.problems],
            "dangling": self.dangling,
            "objects_checked": self.objects_checked,
            "bytes_checked": self.bytes_checked,
            "events_checked": self.events_checked,
            "rows_checked": self.rows_checked,
            "events_reduced": self.events_reduced,
            "rows_left_out": self.rows_left_out,
            "head": self.head,
        }


def _object_columns(model: type[Base]) -> list[str]:
    cols = []
    for col in inspect(model).columns:
        for fk in col.foreign_keys:
            if fk.column.table.name == "objects":
                cols.append(col.key)
    return cols


def verify_archive(arc: Archive, *, rehash: bool = True,
                   progress: Progress | None = None) -> VerifyReport:
    """Check the catalog itself, objects, references, the ledger chain and ledgered rows.
    Never writes."""
    progress = progress or NoProgress()
    report = VerifyReport()
    for kind, subject, detail in check_catalog(arc.engine):
        report.problems.append(Problem(kind, subject, detail))
    try:
        _verify_content(arc, report, rehash=rehash, progress=progress)
    except DBAPIError as exc:
        progress.close()
        orig = exc.orig if exc.orig is not None else exc
        words = str(orig).strip().splitlines()
        report.problems.append(Problem(
            "damaged-catalog", "catalog", "reading the catalog stopped part way: "
            f"{words[0] if words else type(orig).__name__}; the checks after that point were "
            "not made (restore the catalog from a backup and verify again)"))
    return report


def _lenient_text(data: bytes) -> str:
    """SQLite text as str even when it is not UTF-8 (reported by the catalog checks), so the
    remaining checks still run; such a row then also differs from its ledger record."""
    return data.decode("utf-8", "backslashreplace")


def _verify_content(arc: Archive, report: VerifyReport, *, rehash: bool,
                    progress: Progress) -> None:
    """The checks on one snapshot of the catalog: the ledger and the rows are read by
    several statements, and a writer committing between them (a crew member loading logs
    meanwhile, or a killed writer whose last commit the server was still finishing) must
    not show up as a row without its event. SQLite's read transaction is one snapshot
    already (write-ahead log); PostgreSQL's default gives each statement its own, so the
    transaction is made REPEATABLE READ there."""
    with arc.session() as s:
        if arc.engine.dialect.name == "sqlite":
            raw = s.connection().connection.driver_connection
            raw.text_factory = _lenient_text
            try:
                _verify_rows(arc, s, report, rehash=rehash, progress=progress)
            finally:
                raw.text_factory = str
        else:
            s.connection(execution_options={"isolation_level": "REPEATABLE READ"})
            _verify_rows(arc, s, report, rehash=rehash, progress=progress)


def _verify_rows(arc: Archive, s: Session, report: VerifyReport, *, rehash: bool,
                 progress: Progress) -> None:
    known = {o.hash: o for o in s.scalars(select(StoredObject))}
    # 1. objects: present and intact
    total = sum(o.size for o in known.values())
    progress.start(total, "bytes", "verify")
    for h, obj in sorted(known.items()):
        if not arc.objects.exists(h):
            report.problems.append(Problem("missing", f"object {h}",
                                           f"{obj.kind} object is not in the object store"))
            continue
        if rehash and not arc.objects.check(h):
            report.problems.append(Problem("hash-mismatch", f"object {h}",
                                           f"{obj.kind} object bytes no longer match the hash"))
        report.objects_checked += 1
        report.bytes_checked += obj.size
        progress.advance(obj.size, h[:12])
    progress.close()
    for h in arc.objects.iter_hashes():
        if h not in known:
            report.dangling.append(h)
    # 2. references from rows to objects
    for model in LEDGERED_TABLES:
        cols = _object_columns(model)
        if not cols:
            continue
        for row in s.scalars(select(model)):
            for c in cols:
                value = getattr(row, c)
                if value is not None and value not in known:
                    report.problems.append(Problem(
                        "bad-reference", f"{model.__tablename__} row {row_key(row)}",
                        f"column {c} names object {value}, unknown to the catalog"))
    # 3. the ledger chain
    recorded, declared = _walk_chain(s, report)
    # 4. ledgered rows unchanged, and none gone
    present: set[tuple[str, str]] = set()
    for model in LEDGERED_TABLES:
        for row in s.scalars(select(model)):
            report.rows_checked += 1
            key = (model.__tablename__, row_key(row))
            present.add(key)
            subject = f"{key[0]} row {key[1]}"
            if key not in recorded:
                report.problems.append(Problem("unledgered-row", subject,
                                               "no ledger event recorded this row"))
            elif recorded[key][0] != row_digest(row, recorded[key][1]):
                report.problems.append(Problem("altered-row", subject,
                                               "row content differs from its ledger record"))
    for table, key in sorted(set(recorded) - present):
        if (table, key) in declared.left_out:
            report.rows_left_out += 1
            continue
        report.problems.append(Problem("deleted-row", f"{table} row {key}",
                                       "a ledger event recorded this row; it is gone"))


@dataclass
class _Declared:
    """What the bundle events of a chain declare: reduced events and rows left out."""

    reduced: set[int] = field(default_factory=set)
    left_out: set[tuple[str, str]] = field(default_factory=set)

    def add(self, payload: dict[str, Any]) -> None:
        for first, last in payload.get("reduced") or []:
            self.reduced.update(range(int(first), int(last) + 1))
        self.left_out.update((str(t), str(k)) for t, k in payload.get("left_out") or [])


def _walk_chain(s: Any, report: VerifyReport
                ) -> tuple[dict[tuple[str, str], tuple[str, list[str] | None]], _Declared]:
    """Walk the ledger in order: sequence, links, each event's hash under its scheme and
    its payload digest. Returns the row digests the events recorded and what bundle events
    declare; problems go into ``report``."""
    prev_hash, prev_seq = GENESIS, 0
    recorded: dict[tuple[str, str], tuple[str, list[str] | None]] = {}
    declared = _Declared()
    without_payload: list[LedgerEvent] = []
    last = None
    for ev in s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq)):
        report.events_checked += 1
        subject = f"ledger event {ev.seq} ({ev.action})"
        if ev.seq != prev_seq + 1:
            report.problems.append(Problem("broken-chain", subject,
                                           f"sequence jumps from {prev_seq} to {ev.seq}"))
        if ev.prev_hash != prev_hash:
            report.problems.append(Problem("broken-chain", subject,
                                           "previous-hash link does not match the event before"))
        expect = hash_of(ev)
        if expect is None:
            report.problems.append(Problem(
                "broken-chain", subject,
                f"its hash cannot be recomputed (scheme {ev.scheme}"
                + (", payload missing)" if ev.payload is None else ")")))
        elif expect != ev.hash:
            report.problems.append(Problem("broken-chain", subject,
                                           "event content does not match its hash"))
        elif (ev.scheme or 1) >= 2 and ev.payload is not None \
                and ev.payload_digest != payload_digest(ev.payload):
            report.problems.append(Problem("broken-chain", subject,
                                           "recorded payload digest does not match the payload"))
        payload: Any = {}
        if ev.payload is None:
            without_payload.append(ev)
        else:
            try:
                payload = json.loads(ev.payload)
            except ValueError:
                report.problems.append(Problem("broken-chain", subject, "payload is not JSON"))
        if not isinstance(payload, dict):
            payload = {}
        for r in payload.get("rows", []):
            recorded[(r["table"], r["key"])] = (r["digest"], r.get("columns"))
        if ev.action == BUNDLE_ACTION:
            declared.add(payload)
        prev_hash, prev_seq, last = ev.hash, ev.seq, ev
    for ev in without_payload:
        if ev.seq in declared.reduced:
            report.events_reduced += 1
        else:
            report.problems.append(Problem(
                "broken-chain", f"ledger event {ev.seq} ({ev.action})",
                "its payload is gone and no custody-bundle event declares it left out"))
    head = s.get(LedgerHead, 1)
    report.head = head.hash if head else None
    if last is not None and (head is None or head.hash != last.hash or head.seq != last.seq):
        report.problems.append(Problem("broken-chain", "ledger head",
                                       f"head does not name the last event ({last.seq})"))
    return recorded, declared
