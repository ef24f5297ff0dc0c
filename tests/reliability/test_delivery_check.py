"""``nodekeep verify --delivery``: a delivered file and its lineage manifest, checked against
the archive, with whatever differs named (archive/lineage/check.py vocabulary)."""

from __future__ import annotations

import json
import os
import stat
from pathlib import Path

import pytest
from sqlalchemy import select, update

from archive.lineage.anchor import read_file_anchor
from archive.lineage.bundle import make_bundle
from archive.lineage.check import check_delivery
from archive.store.archive import Archive
from archive.store.ledger import Anchor
from archive.store.models import Delivery, LedgerEvent, Run
from archive.store.verify import verify_archive
from tests.reliability.harness import ArchiveTemplate
from tests.support.cli import invoke
from tests.support.insider import rewrite_history
from tests.support.reliability import make_delivery, make_survey_archive


@pytest.fixture
def delivered(full_template: ArchiveTemplate, tmp_path: Path):
    """A copy of the full archive and a new delivery made from it into tmp_path/out."""
    with Archive.open(full_template.clone(tmp_path / "copy"), actor="tester") as arc:
        with arc.session() as s:
            sid = arc.survey(s).id
        res = make_delivery(arc, sid, tmp_path / "out" / "Kestrel Flats 3D final.csv")
        yield arc, res


def _kinds(check) -> list[str]:
    return [p.kind for p in check.problems]


def test_intact_delivery_passes_through_the_cli(delivered, runner):
    arc, res = delivered
    r = invoke(runner, arc.root, "verify", "--delivery", res.lineage_path)
    assert r.exit_code == 0, r.output
    assert "delivery OK" in r.output and res.file_hash in r.output
    # the delivered file's own path finds its manifest beside it
    r = invoke(runner, arc.root, "verify", "--delivery", res.path, "--json")
    data = json.loads(r.output)
    assert data["ok"] and data["delivery_id"] == res.delivery_id
    assert data["run_id"] == res.run_id and data["objects_checked"] >= 5


def test_changed_file_is_named(delivered, runner):
    arc, res = delivered
    path = Path(res.path)
    text = path.read_text(encoding="utf-8")
    i = next(k for k, ch in enumerate(text) if ch.isdigit() and k > len(text) // 2)
    path.write_text(text[:i] + str((int(text[i]) + 1) % 10) + text[i + 1:], encoding="utf-8")
    r = invoke(runner, arc.root, "verify", "--delivery", res.lineage_path)
    assert r.exit_code == 3
    assert f"PROBLEM file-changed: {path}" in r.output
    assert "delivery NOT OK: 1 problem(s)" in r.output


def test_changed_manifest_is_named(delivered):
    arc, res = delivered
    doc = json.loads(Path(res.lineage_path).read_text(encoding="utf-8"))
    doc["delivery"]["recipient"] = "someone else"
    Path(res.lineage_path).write_text(json.dumps(doc, indent=2), encoding="utf-8")
    check = check_delivery(arc, res.lineage_path)
    assert _kinds(check) == ["manifest-changed"]
    assert f"delivery {res.delivery_id}" in check.problems[0].detail


def test_missing_file_is_named(delivered):
    arc, res = delivered
    os.unlink(res.path)
    check = check_delivery(arc, res.lineage_path)
    assert _kinds(check) == ["file-missing"]


def test_delivery_row_changed_in_the_catalog_is_named(delivered):
    arc, res = delivered
    with arc.engine.begin() as c:
        c.execute(update(Delivery).where(Delivery.id == res.delivery_id)
                  .values(recipient="another processing centre"))
    check = check_delivery(arc, res.lineage_path)
    assert [(p.kind, p.subject) for p in check.problems] == [
        ("altered-row", f"deliveries row {res.delivery_id}")]


def test_run_changed_in_the_catalog_is_named(delivered):
    arc, res = delivered
    with arc.engine.begin() as c:
        c.execute(update(Run).where(Run.id == res.run_id).values(positions_digest="0" * 64))
    check = check_delivery(arc, res.lineage_path)
    assert _kinds(check) == ["run-mismatch"]
    assert "positions_digest" in check.problems[0].detail


def test_changed_run_positions_object_is_named(delivered):
    arc, res = delivered
    with arc.session() as s:
        h = s.get(Run, res.run_id).positions_hash
    path = arc.objects.local_path(h)
    os.chmod(path, stat.S_IRUSR | stat.S_IWUSR)
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x40
    path.write_bytes(bytes(data))
    check = check_delivery(arc, res.lineage_path)
    assert [(p.kind, p.subject) for p in check.problems] == [("hash-mismatch", f"object {h}")]
    assert "positions" in check.problems[0].detail


def test_deleted_raw_log_behind_a_delivery_is_named(delivered):
    arc, res = delivered
    doc = json.loads(Path(res.lineage_path).read_text(encoding="utf-8"))
    raw = doc["raw_files"][0]
    arc.objects.local_path(raw["hash"]).unlink()
    check = check_delivery(arc, res.lineage_path)
    assert [(p.kind, p.subject) for p in check.problems] == [("missing", f"object {raw['hash']}")]
    assert raw["name"] in check.problems[0].detail


def test_manifest_of_another_archive_is_no_delivery(delivered, tmp_path, runner):
    _, res = delivered
    other = make_survey_archive(tmp_path / "other", None)
    r = invoke(runner, other, "verify", "--delivery", res.lineage_path)
    assert r.exit_code == 3
    assert "PROBLEM no-delivery" in r.output


def test_not_a_manifest_is_named(delivered, tmp_path):
    arc, _ = delivered
    bogus = tmp_path / "notes.csv.lineage.json"
    bogus.write_bytes(b"\x00\x01 not json")
    (tmp_path / "notes.csv").write_text("line,point\n", encoding="utf-8")
    check = check_delivery(arc, bogus)
    assert _kinds(check) == ["manifest-unreadable"]



def _deliver_event(arc: Archive, delivery_id: int) -> LedgerEvent:
    with arc.session() as s:
        return next(e for e in s.scalars(select(LedgerEvent).where(LedgerEvent.action ==
                                                                   "deliver"))
                    if json.loads(e.payload)["delivery"] == delivery_id)


def test_the_file_and_its_manifest_carry_the_ledger_anchor(delivered):
    """The anchor is the delivery's own event and the hash of the event before it; the
    manifest adds the short hash of every earlier event."""
    arc, res = delivered
    ev = _deliver_event(arc, res.delivery_id)
    assert res.anchor == {"event": ev.seq, "after": ev.prev_hash}
    assert read_file_anchor(res.path) == Anchor(ev.seq, ev.prev_hash)
    ledger = json.loads(Path(res.lineage_path).read_text(encoding="utf-8"))["ledger"]
    assert ledger["anchor"] == res.anchor and len(ledger["short_hashes"]) == ev.seq - 1
    with arc.session() as s:
        earlier = [e.hash for e in s.scalars(select(LedgerEvent).where(LedgerEvent.seq < ev.seq)
                                             .order_by(LedgerEvent.seq))]
    assert [h[:16] for h in earlier] == ledger["short_hashes"] and earlier[-1] == ev.prev_hash
    check = check_delivery(arc, res.lineage_path)
    assert check.ok and check.anchor["events_checked"] == ev.seq


def test_history_rewritten_before_the_delivery_is_named(delivered, runner, tmp_path):
    """What an insider with write access could do: change an early event and recompute every
    later hash and the head. A plain verify passes; the held delivery names the event."""
    arc, res = delivered
    with arc.session() as s:
        target = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes")
                           .order_by(LedgerEvent.seq)).first()
    rewrite_history(arc, target.seq, lambda p: p.update(name="another-node.nmea"))
    assert verify_archive(arc).ok  # the rewritten chain is whole again
    r = invoke(runner, arc.root, "verify", "--delivery", res.path)
    assert r.exit_code == 3
    assert f"PROBLEM history-rewritten: ledger event {target.seq} (load.fixes)" in r.output
    check = check_delivery(arc, res.lineage_path)
    assert [p.kind for p in check.problems] == ["history-rewritten"]
    assert check.anchor["first_differing_event"] == target.seq
    # the file alone (manifest lost) still exposes the rewrite, as a range of events
    alone = tmp_path / "alone" / Path(res.path).name
    alone.parent.mkdir()
    alone.write_bytes(Path(res.path).read_bytes())
    check = check_delivery(arc, alone)
    n = res.anchor["event"] - 1
    assert [(p.kind, p.subject) for p in check.problems] == [
        ("history-rewritten", f"ledger events 1-{n}")]
    assert check.delivery_id == res.delivery_id


def test_history_after_the_delivery_is_not_its_concern(delivered):
    """An event rewritten after the delivery's own event leaves the delivery's history
    intact (a later anchor, or a head recorded outside, covers that event)."""
    arc, res = delivered
    h, size = arc.objects.put_bytes(b"a note added after the delivery")
    with arc.transaction() as tx:
        arc.register_object(tx, h, size, "note")
        later = arc.log(tx, "note.add", {"object": h})
    rewrite_history(arc, later.seq, lambda p: p.update(object="0" * 64))
    assert check_delivery(arc, res.lineage_path).ok


def test_deleted_anchor_event_is_named(delivered):
    arc, res = delivered
    with arc.engine.begin() as c:
        c.execute(LedgerEvent.__table__.delete().where(LedgerEvent.seq >= res.anchor["event"]))
    kinds = [(p.kind, p.subject) for p in check_delivery(arc, res.lineage_path).problems]
    assert ("anchor-missing", f"ledger event {res.anchor['event']}") in kinds


def test_a_bundle_keeps_the_evidence_of_the_history_it_was_made_from(delivered, tmp_path):
    """Bundled from either backend: the bundle proves the held delivery, keeps the database
    user each event recorded, and still holds the original history after the source's is
    rewritten, so the rewrite shows against the source and not against the bundle."""
    arc, res = delivered
    made = make_bundle(arc, [res.delivery_id], tmp_path / "bundle")
    assert made.subset.verify.ok
    login = arc.engine.url.username if arc.engine.dialect.name == "postgresql" else None
    with Archive.open(tmp_path / "bundle") as b, b.session() as s:
        users = {e.db_user for e in s.scalars(select(LedgerEvent))
                 if e.action != "bundle.made"}
    assert users == {login}
    with arc.session() as s:
        first = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes")
                          .order_by(LedgerEvent.seq)).first()
    rewrite_history(arc, first.seq, lambda p: p.update(name="another-node.nmea"))
    assert [p.kind for p in check_delivery(arc, res.lineage_path).problems] == \
        ["history-rewritten"]
    with Archive.open(tmp_path / "bundle") as b:
        assert check_delivery(b, res.lineage_path).ok and verify_archive(b).ok
