"""Tamper evidence: whatever is changed behind the archive's back, verify finds and names it.

Each test copies an archive with rows in the ledgered tables, changes one thing directly
in the catalog database or the object folder (as someone with file or database access
could), and checks that ``verify`` reports exactly that thing in its vocabulary
(archive/store/verify.py): altered-row, unledgered-row, hash-mismatch, missing,
broken-chain. A recorded ledger head (``nodekeep history --head``) proves the chain only
grew, and catches even a chain rewritten consistently from some event on.
"""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pytest
from sqlalchemy import select, text, update

from archive.store.archive import Archive
from archive.store.ledger import row_key
from archive.store.models import LedgerEvent, RawFile, StoredObject
from archive.store.verify import LEDGERED_TABLES, verify_archive
from tests.reliability.harness import ArchiveTemplate
from tests.support.cli import invoke
from tests.support.insider import rewrite_history

# One text column per ledgered table, changed by the tamper test.
TAMPER_COLUMN = {"surveys": "client", "raw_files": "node", "input_versions": "original_name",
                 "runs": "label", "edits": "reason", "deliveries": "recipient"}


@pytest.fixture
def arc(full_template: ArchiveTemplate, tmp_path: Path):
    with Archive.open(full_template.clone(tmp_path / "copy"), actor="tester") as a:
        yield a


def _kinds(report) -> list[tuple[str, str]]:
    return [(p.kind, p.subject) for p in report.problems]


def test_copy_verifies_before_tampering(arc: Archive):
    report = verify_archive(arc)
    assert report.ok, report.problems
    assert report.dangling == []
    assert report.rows_checked > 0 and report.objects_checked > 0


@pytest.mark.parametrize("model", LEDGERED_TABLES, ids=lambda m: m.__tablename__)
def test_changed_row_of_every_ledgered_table_is_named(arc: Archive, model):
    table = model.__tablename__
    with arc.session() as s:
        row = s.scalars(select(model).limit(1)).first()
    if row is None:
        pytest.skip(f"no {table} rows in this archive yet (that part has not landed)")
    key = row_key(row)
    col = TAMPER_COLUMN[table]
    pk = [c.key for c in model.__mapper__.primary_key]
    with arc.engine.begin() as c:
        c.execute(update(model).where(*[getattr(model, k) == getattr(row, k) for k in pk])
                  .values({col: str(getattr(row, col)) + " (changed)"}))
    report = verify_archive(arc)
    assert _kinds(report) == [("altered-row", f"{table} row {key}")]


def test_row_added_behind_the_archive_is_unledgered(arc: Archive):
    with arc.engine.begin() as c:
        c.execute(text("INSERT INTO surveys (id, name, crs_epsg, crs_name, linear_unit, "
                       "unit_factor, vertical_datum, height_mode, height_param, client, "
                       "contractor, area, created_at, created_by) VALUES (99, 'Slipped In', "
                       "32614, 'x', 'metre', 1.0, '', 'gga', '', '', '', '', "
                       "'2025-04-07 00:00:00', 'nobody')"))
    report = verify_archive(arc)
    assert _kinds(report) == [("unledgered-row", "surveys row 99")]


def _raw_object(arc: Archive) -> str:
    with arc.session() as s:
        return s.scalars(select(RawFile.object_hash).order_by(RawFile.id)).first()


def test_changed_object_bytes_are_named(arc: Archive):
    h = _raw_object(arc)
    path = arc.objects.local_path(h)
    os.chmod(path, stat.S_IRUSR | stat.S_IWUSR)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01  # one bit flipped in the middle of a raw log
    path.write_bytes(bytes(data))
    report = verify_archive(arc)
    assert _kinds(report) == [("hash-mismatch", f"object {h}")]
    assert "raw object" in report.problems[0].detail


def test_deleted_object_is_named_missing(arc: Archive):
    with arc.session() as s:
        h = s.scalars(select(RawFile.fixes_hash).order_by(RawFile.id)).first()
    arc.objects.local_path(h).unlink()
    report = verify_archive(arc)
    assert _kinds(report) == [("missing", f"object {h}")]


def test_catalog_object_row_removed_is_a_bad_reference(arc: Archive):
    with arc.session() as s:
        h = s.scalars(select(RawFile.fixes_hash).order_by(RawFile.id.desc())).first()
    delete = StoredObject.__table__.delete().where(StoredObject.hash == h)
    if arc.engine.dialect.name == "sqlite":  # foreign keys are off in a plain connection
        import sqlite3

        db = sqlite3.connect(arc.engine.url.database)
        db.execute("DELETE FROM objects WHERE hash = ?", (h,))
        db.commit()
        db.close()
    else:
        with arc.engine.begin() as c:
            c.execute(text("SET session_replication_role = replica"))
            c.execute(delete)
    report = verify_archive(arc)
    assert _kinds(report) == [("bad-reference", f"raw_files row {_raw_id(arc, h)}")]
    assert h in report.dangling  # its file is still there, now unreferenced


def _raw_id(arc: Archive, fixes_hash: str) -> int:
    with arc.session() as s:
        return s.scalars(select(RawFile.id).where(RawFile.fixes_hash == fixes_hash)).one()


def _events(arc: Archive) -> list[LedgerEvent]:
    with arc.session() as s:
        return list(s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq)))


def test_changed_ledger_payload_is_named(arc: Archive):
    ev = _events(arc)[2]
    payload = json.loads(ev.payload)
    payload["name"] = "another.nmea"
    with arc.engine.begin() as c:
        c.execute(update(LedgerEvent).where(LedgerEvent.seq == ev.seq)
                  .values(payload=json.dumps(payload, sort_keys=True, separators=(",", ":"))))
    report = verify_archive(arc)
    assert _kinds(report) == [("broken-chain", f"ledger event {ev.seq} ({ev.action})")]
    assert "does not match its hash" in report.problems[0].detail


def test_row_and_its_ledger_digest_changed_together_still_break_the_chain(arc: Archive):
    """Someone changes a row and the digest its event recorded: the event hash catches it."""
    with arc.session() as s:
        row = s.scalars(select(RawFile).order_by(RawFile.id)).first()
        ev = [e for e in s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes"))
              if json.loads(e.payload)["raw"] == row.object_hash][0]
    from archive.store.ledger import row_digest

    row.node = "N9999"
    payload = json.loads(ev.payload)
    payload["rows"][0]["digest"] = row_digest(row)
    with arc.engine.begin() as c:
        c.execute(update(RawFile).where(RawFile.id == row.id).values(node="N9999"))
        c.execute(update(LedgerEvent).where(LedgerEvent.seq == ev.seq)
                  .values(payload=json.dumps(payload, sort_keys=True, separators=(",", ":"))))
    report = verify_archive(arc)
    assert _kinds(report) == [("broken-chain", f"ledger event {ev.seq} (load.fixes)")]


def test_deleted_ledger_event_is_named(arc: Archive):
    events = _events(arc)
    gone = events[1]
    with arc.engine.begin() as c:
        c.execute(LedgerEvent.__table__.delete().where(LedgerEvent.seq == gone.seq))
    report = verify_archive(arc)
    kinds = _kinds(report)
    nxt = events[2]
    assert ("broken-chain", f"ledger event {nxt.seq} ({nxt.action})") in kinds
    # the rows that event recorded are now unledgered, and named
    assert any(k == "unledgered-row" for k, _ in kinds)


def _head(runner, root: Path) -> dict:
    r = invoke(runner, root, "history", "--head", "--json")
    assert r.exit_code == 0, r.output
    return json.loads(r.output)


def _chain_grew_from(runner, root: Path, earlier: dict) -> bool:
    """True when the recorded head is still the event of the same number in the chain."""
    r = invoke(runner, root, "history", "-n", "0", "--json")
    events = {e["seq"]: e["hash"] for e in json.loads(r.output)}
    return events.get(earlier["seq"]) == earlier["hash"]


def test_recorded_head_proves_the_chain_only_grew(arc: Archive, runner):
    earlier = _head(runner, arc.root)
    h, size = arc.objects.put_bytes(b"a later note from the field")
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "note")
        arc.log(tx, "note.add", {"object": h})
    later = _head(runner, arc.root)
    assert later["seq"] == earlier["seq"] + 1 and later["hash"] != earlier["hash"]
    assert _chain_grew_from(runner, arc.root, earlier)
    assert verify_archive(arc).ok


def test_consistently_rewritten_chain_is_caught_by_the_recorded_head(arc: Archive, runner):
    """An insider edits an old event and recomputes every later hash and the head: the
    chain is whole again, but the head recorded outside the archive no longer is in it."""
    earlier = _head(runner, arc.root)
    rewrite_history(arc, _events(arc)[1].seq, lambda p: p.update(name="rewritten"))
    assert verify_archive(arc).ok  # the rewrite is internally consistent...
    assert not _chain_grew_from(runner, arc.root, earlier)  # ...but the recorded head is gone
    assert _head(runner, arc.root)["hash"] != earlier["hash"]


def test_payload_removed_outside_a_bundle_is_named(arc: Archive):
    """Only a custody bundle may carry an event as its digest alone, and only when its
    closing event declares it: a payload blanked in an ordinary archive is named."""
    ev = _events(arc)[0]  # archive.init: no rows, so nothing else would notice
    with arc.engine.begin() as c:
        c.execute(update(LedgerEvent).where(LedgerEvent.seq == ev.seq).values(payload=None))
    report = verify_archive(arc)
    assert _kinds(report) == [("broken-chain", f"ledger event {ev.seq} (archive.init)")]
    assert "no custody-bundle event declares it" in report.problems[0].detail
