"""Archive lifecycle, ledger chain and verify, on SQLite and PostgreSQL."""

from __future__ import annotations

import hashlib
import json
import os

import pytest
from sqlalchemy import select, text

from archive.errors import ArchiveNotFound, SchemaBehind, UsageError
from archive.store.archive import Archive, locate
from archive.store.ledger import GENESIS
from archive.store.models import LedgerEvent, RawFile, StoredObject, Survey, utcnow
from archive.store.verify import verify_archive
from archive.survey.surveys import create_survey


def _store_raw(arc: Archive, survey_id: int, data: bytes, name: str = "N1001.nmea") -> RawFile:
    """Store one raw object with a catalog row referencing it, the custody way."""
    h, size = arc.objects.put_bytes(data)
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "raw")
        row = RawFile(
            survey_id=survey_id, object_hash=h, original_name=name, node="N1001", format="nmea",
            size=size, received_at=utcnow(), received_by=arc.actor, parser="test", n_lines=1,
            n_accepted=1, n_rejected=0, n_ignored=0, n_fixes=1, n_valid=1, details="{}",
        )
        tx.add(row)
        arc.log(tx, "load.fixes", {"raw": h}, survey_id=survey_id, rows=[row])
    return row


def test_init_open_and_chain(any_survey_arc: Archive):
    arc = any_survey_arc
    with arc.session() as s:
        sid = s.scalars(select(Survey.id)).one()
    _store_raw(arc, sid, b"$GPGGA,1*00\r\n")
    reopened = Archive.open(arc.root)
    try:
        with reopened.session() as s:
            events = list(s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq)))
        assert [e.action for e in events] == ["archive.init", "survey.create", "load.fixes"]
        prev = GENESIS
        for e in events:
            assert e.prev_hash == prev and e.scheme == 2
            # who the server saw beside the declared actor: the login of the catalog URL on
            # PostgreSQL, nothing on SQLite (no server, no login)
            assert e.db_user == (arc.engine.url.username
                                 if arc.engine.dialect.name == "postgresql" else None)
            # the scheme-2 hash written out with the standard library: SHA-256 (FIPS 180-4,
            # hashlib) of sorted, compact UTF-8 JSON over the fields and the payload's SHA-256
            digest = hashlib.sha256(e.payload.encode("utf-8")).hexdigest()
            assert e.payload_digest == digest
            fields = {"scheme": 2, "seq": e.seq, "at": e.at.isoformat(), "actor": e.actor,
                      "db_user": e.db_user, "action": e.action, "survey": e.survey_id,
                      "payload_sha256": digest, "prev": e.prev_hash}
            text = json.dumps(fields, sort_keys=True, separators=(",", ":"), ensure_ascii=False)
            assert e.hash == hashlib.sha256(text.encode("utf-8")).hexdigest()
            prev = e.hash
        report = verify_archive(reopened)
        assert report.ok, report.problems
        assert report.objects_checked == 1 and report.events_checked == 3
    finally:
        reopened.close()


def test_failed_transaction_leaves_no_event(any_survey_arc: Archive):
    arc = any_survey_arc
    with pytest.raises(RuntimeError), arc.transaction() as tx:
        arc.log(tx, "test.fail", {})
        raise RuntimeError("boom")
    with arc.session() as s:
        assert "test.fail" not in s.scalars(select(LedgerEvent.action)).all()


def test_verify_names_flipped_byte_edited_payload_deleted_object(any_survey_arc: Archive):
    arc = any_survey_arc
    with arc.session() as s:
        sid = s.scalars(select(Survey.id)).one()
    r1 = _store_raw(arc, sid, b"first log\n", "a.nmea")
    r2 = _store_raw(arc, sid, b"second log\n", "b.nmea")
    # 1. flip one byte of a stored object
    p1 = arc.objects.local_path(r1.object_hash)
    os.chmod(p1, 0o644)
    data = bytearray(p1.read_bytes())
    data[0] ^= 0xFF
    p1.write_bytes(bytes(data))
    # 2. delete another object
    os.chmod(arc.objects.local_path(r2.object_hash), 0o644)
    os.unlink(arc.objects.local_path(r2.object_hash))
    # 3. edit a ledger payload directly in the database
    with arc.engine.connect() as c, c.begin():
        c.execute(text("UPDATE ledger_events SET payload = :p WHERE seq = 2"), {"p": '{"x":1}'})
    report = verify_archive(arc)
    kinds = {(p.kind, p.subject) for p in report.problems}
    assert ("hash-mismatch", f"object {r1.object_hash}") in kinds
    assert ("missing", f"object {r2.object_hash}") in kinds
    assert ("broken-chain", "ledger event 2 (survey.create)") in kinds
    assert not report.ok


def test_verify_names_altered_row_and_reports_dangling_apart(any_survey_arc: Archive):
    arc = any_survey_arc
    with arc.session() as s:
        sid = s.scalars(select(Survey.id)).one()
    row = _store_raw(arc, sid, b"log\n")
    stray, _ = arc.objects.put_bytes(b"written but never referenced (interrupted load)")
    report = verify_archive(arc)
    assert report.ok and report.dangling == [stray]
    with arc.engine.connect() as c, c.begin():
        c.execute(text("UPDATE raw_files SET node = 'N9999' WHERE id = :i"), {"i": row.id})
    report = verify_archive(arc)
    assert [(p.kind, p.subject) for p in report.problems] == [("altered-row", f"raw_files row {row.id}")]


def test_objects_row_without_file_is_missing(any_arc: Archive):
    with any_arc.transaction() as tx:
        tx.add(StoredObject(hash="ab" * 32, size=3, kind="raw", created_at=utcnow()))
    report = verify_archive(any_arc)
    assert [p.kind for p in report.problems] == ["missing"]


def test_survey_validation(any_arc: Archive):
    create_survey(any_arc, "Kestrel Flats 3D", "EPSG:32614")
    with pytest.raises(UsageError, match="already exists"):
        create_survey(any_arc, "Kestrel Flats 3D", "EPSG:32614")
    from archive.errors import CRSProblem

    with pytest.raises(CRSProblem, match="geographic, not a projected CRS"):
        create_survey(any_arc, "Geo", "EPSG:4326")
    with pytest.raises(CRSProblem, match="not a known"):
        create_survey(any_arc, "Nowhere", "EPSG:999999")
    with any_arc.session() as s:
        assert any_arc.survey(s).name == "Kestrel Flats 3D"


def test_locate_walks_up_and_env(tmp_path, monkeypatch, arc):
    deep = arc.root / "a" / "b"
    deep.mkdir(parents=True)
    monkeypatch.delenv("NODEKEEP_ARCHIVE", raising=False)
    monkeypatch.chdir(deep)
    assert locate() == arc.root
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("NODEKEEP_ARCHIVE", str(arc.root))
    assert locate() == arc.root
    monkeypatch.setenv("NODEKEEP_ARCHIVE", str(tmp_path / "nope"))
    with pytest.raises(ArchiveNotFound, match="NODEKEEP_ARCHIVE"):
        locate()


def test_schema_behind_says_upgrade(arc):
    with arc.engine.connect() as c, c.begin():
        c.execute(text("UPDATE alembic_version SET version_num = 'old0'"))
    with pytest.raises(Exception) as exc:
        Archive.open(arc.root)
    # an unknown revision is "ahead"; a missing one is "behind"
    assert "nodekeep" in str(exc.value)
    with arc.engine.connect() as c, c.begin():
        c.execute(text("DELETE FROM alembic_version"))
    with pytest.raises(SchemaBehind, match="nodekeep upgrade"):
        Archive.open(arc.root)


def test_verify_names_a_deleted_row(any_survey_arc: Archive):
    arc = any_survey_arc
    with arc.session() as s:
        sid = s.scalars(select(Survey.id)).one()
    row = _store_raw(arc, sid, b"a log that someone later removes from the catalog\n")
    with arc.engine.connect() as c, c.begin():
        c.execute(text("DELETE FROM raw_files WHERE id = :i"), {"i": row.id})
    report = verify_archive(arc)
    assert [(p.kind, p.subject) for p in report.problems] == [
        ("deleted-row", f"raw_files row {row.id}")]
