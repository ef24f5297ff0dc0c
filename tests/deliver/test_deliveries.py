"""Deliveries: refusals, the stored copy, the lineage manifest, the ledger."""

from __future__ import annotations

import json
import os

import pyarrow as pa
import pytest
from sqlalchemy import select

from archive.deliver.deliveries import deliver, list_deliveries
from archive.edits import decisions as ed
from archive.errors import Refused, StorageError, UsageError
from archive.lineage.anchor import read_file_anchor
from archive.review.acknowledge import ack_flag
from archive.store.hashing import sha256_file
from archive.store.ledger import Anchor
from archive.store.models import Delivery, LedgerEvent
from archive.store.verify import verify_archive
from tests.support.builders import delivery_archive, make_run, positions_table
from tests.support.delivery_tables import read_sps_r

FLAGS = ["", "far-from-plan;moved", "", "", "", "unoccupied", "", ""]


@pytest.fixture
def flagged(survey_arc, tmp_path):
    sid, final, run, raw = delivery_archive(survey_arc, tmp_path, flags=FLAGS)
    return survey_arc, sid, final, run, raw


def test_refuses_unacknowledged_flags_with_what_to_do(flagged, tmp_path):
    arc, sid, _final, run, _ = flagged
    out = tmp_path / "r.sps"
    with pytest.raises(Refused) as exc:
        deliver(arc, sid, None, "sps", out, "Harrow Basin Energy processing")
    msg = str(exc.value)
    assert "2 station(s) with unacknowledged review flags" in msg
    assert "far-from-plan (1)" in msg and "moved (1)" in msg and "unoccupied (1)" in msg
    assert "nodekeep edit ack" in msg and "--allow-flags" in msg
    assert not out.exists()
    with arc.session() as s:
        assert s.scalars(select(Delivery)).first() is None


def test_deliver_with_acknowledged_flags_and_lineage(flagged, tmp_path):
    arc, sid, final, run, raw = flagged
    for flag in ("far-from-plan", "moved"):
        ack_flag(arc, sid, 1001, 2002, flag=flag, reason="checked on the aerial photo")
    ack_flag(arc, sid, 1002, 2002, flag="unoccupied", reason="has a position anyway")
    out = tmp_path / "kestrel_r.sps"
    res = deliver(arc, sid, run.id[:10], "sps", out, "Harrow Basin Energy processing",
                  note="first receiver delivery")
    assert out.is_file() and res.n_stations == final.num_rows
    assert sha256_file(out)[0] == res.file_hash
    assert arc.objects.read_bytes(res.file_hash) == out.read_bytes()  # stored copy
    rows = read_sps_r(out.read_text())
    assert len(rows) == final.num_rows
    lineage_path = tmp_path / "kestrel_r.sps.lineage.json"
    assert sha256_file(lineage_path)[0] == res.manifest_hash
    lin = json.loads(lineage_path.read_text())
    assert lin["delivery"]["id"] == res.delivery_id and lin["delivery"]["file_hash"] == res.file_hash
    assert lin["run"]["id"] == run.id and lin["run"]["manifest"]["params"]["estimate"]["k"] == 1.345
    assert sorted(r["name"] for r in lin["raw_files"]) == sorted(raw)
    assert [e["kind"] for e in lin["edits"]] == ["ack-flag"] * 3
    assert lin["survey"]["crs"] == "EPSG:32614"
    assert arc.objects.read_table(res.final_hash).num_rows == final.num_rows
    with arc.session() as s:
        ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
        row = s.get(Delivery, res.delivery_id)
    assert ev.action == "deliver" and row.recipient == "Harrow Basin Energy processing"
    assert row.created_by == "tester" and json.loads(row.edit_ids) == res.edit_ids
    assert verify_archive(arc).ok
    assert [d["id"] for d in list_deliveries(arc, sid)] == [res.delivery_id]


def test_overwrite_refused_without_force(flagged, tmp_path):
    arc, sid, _final, _run, _ = flagged
    out = tmp_path / "r.csv"
    out.write_text("someone else's file\n")
    with pytest.raises(Refused, match=r"r\.csv already exists.*--force"):
        deliver(arc, sid, None, "csv", out, "QC", allow_flags=True)
    assert out.read_text() == "someone else's file\n"
    res = deliver(arc, sid, None, "csv", out, "QC", allow_flags=True, force=True)
    assert out.read_bytes() == arc.objects.read_bytes(res.file_hash)
    assert res.unacknowledged_flags == {"far-from-plan": 1, "moved": 1, "unoccupied": 1}
    assert not list(tmp_path.glob(".r.csv.*.tmp"))  # no temporary left behind


def test_unfit_value_refused_before_anything_is_recorded(survey_arc, tmp_path):
    sid, _final, _run, _ = delivery_archive(survey_arc, tmp_path, n=4)
    ed.set_height(survey_arc, sid, 1001, 2001, source="given", height=123456.0,
                  reason="a height that cannot fit SEG-P1 columns 62-66")
    out = tmp_path / "r.p1"
    with pytest.raises(Refused, match=r"station 1001/2001 index 1: elevation 123456\.0 does "
                                      r"not fit 5 columns \(62-66\)"):
        deliver(survey_arc, sid, None, "segp1", out, "processing")
    assert not out.exists() and list_deliveries(survey_arc, sid) == []


def test_station_without_position_refused(survey_arc, tmp_path):
    from tests.support.builders import make_run, positions_table

    sid, final, _run, _ = delivery_archive(survey_arc, tmp_path, n=4)
    pos = positions_table(final)
    east = pos.column("easting").to_pylist()
    east[3] = None
    pos = pos.set_column(pos.schema.get_field_index("easting"), "easting",
                         pa.array(east))
    make_run(survey_arc, pos, [], label="second")
    with pytest.raises(Refused, match=r"1 station\(s\) to deliver have no position: "
                                      r"station 1002/2002 index 1.*set-position.*reject"):
        deliver(survey_arc, sid, None, "csv", tmp_path / "x.csv", "processing")


@pytest.mark.postgres
def test_deliver_on_postgresql(any_survey_arc, tmp_path, backend):
    sid, final, run, _ = delivery_archive(any_survey_arc, tmp_path, n=4)
    res = deliver(any_survey_arc, sid, None, "geojson", tmp_path / "r.geojson", "GIS team")
    res2 = deliver(any_survey_arc, sid, None, "csv", tmp_path / "r.csv", "GIS team")
    assert (res.delivery_id, res2.delivery_id) == (1, 2)
    assert verify_archive(any_survey_arc).ok


def _no_delivery(arc):
    with arc.session() as s:
        return s.scalars(select(Delivery)).first() is None


def test_unwritable_targets_are_refused_before_anything_is_recorded(flagged, tmp_path):
    arc, sid, _final, _run, _ = flagged
    (tmp_path / "adir").mkdir()
    with pytest.raises(UsageError, match="is a folder"):
        deliver(arc, sid, None, "csv", tmp_path / "adir", "processing", allow_flags=True)
    (tmp_path / "b.csv.lineage.json").mkdir()
    with pytest.raises(UsageError, match="is a folder"):
        deliver(arc, sid, None, "csv", tmp_path / "b.csv", "processing", allow_flags=True,
                force=True)
    with pytest.raises(UsageError, match="does not exist"):
        deliver(arc, sid, None, "csv", tmp_path / "nope" / "c.csv", "processing",
                allow_flags=True)
    assert _no_delivery(arc)


@pytest.mark.skipif(os.geteuid() == 0, reason="root may write any folder")
def test_read_only_folder_is_refused(flagged, tmp_path):
    arc, sid, _final, _run, _ = flagged
    ro = tmp_path / "ro"
    ro.mkdir()
    ro.chmod(0o500)
    try:
        with pytest.raises(UsageError, match="not writable"):
            deliver(arc, sid, None, "csv", ro / "c.csv", "processing", allow_flags=True)
    finally:
        ro.chmod(0o700)
    assert _no_delivery(arc)


def test_rename_failing_after_commit_is_ledgered_and_raised(flagged, tmp_path, monkeypatch):
    arc, sid, _final, _run, _ = flagged
    import archive.deliver.deliveries as dmod

    class NoRename:  # the delivery module's os, whose rename fails (as on a full disk)
        def __getattr__(self, name):
            return getattr(os, name)

        @staticmethod
        def replace(src, dst):
            raise PermissionError(13, "Permission denied", str(dst))

    monkeypatch.setattr(dmod, "os", NoRename())
    out = tmp_path / "r.csv"
    with pytest.raises(StorageError, match="delivery 1 was recorded") as exc:
        deliver(arc, sid, None, "csv", out, "processing", allow_flags=True)
    assert "deliver again" in exc.value.hint
    monkeypatch.undo()
    assert not out.exists() and not list(tmp_path.glob(".r.csv*"))
    with arc.session() as s:
        ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
    assert ev.action == "deliver.failed" and json.loads(ev.payload)["delivery"] == 1
    assert verify_archive(arc).ok


def test_edits_in_force_are_those_the_delivery_rests_on(flagged, tmp_path):
    arc, sid, final, _run, _ = flagged
    ex = ed.exclude_span(arc, sid, 1001, 2001, node="N5000", start="2024-03-11T00:00:00Z",
                         end="2024-03-11T02:00:00Z", reason="carried by the crew")
    rej = ed.reject_station(arc, sid, 1001, 2003, reason="node in a trough")
    res = deliver(arc, sid, None, "csv", tmp_path / "a.csv", "processing", allow_flags=True)
    # the run was solved before the exclude span: not in its edit set, and said so
    assert res.edit_ids == [rej.id]
    assert len(res.warnings) == 1 and f"edit {ex.id}" in res.warnings[0]
    assert "solve again" in res.warnings[0]
    lineage = json.loads((tmp_path / "a.csv.lineage.json").read_text())
    assert [e["id"] for e in lineage["edits"]] == [rej.id]
    assert lineage["edits_not_applied"] == [ex.id]
    # a run whose manifest applied the span: the span is in the set, no warning
    applied = [{"id": ex.id, "kind": "exclude-span", "payload": json.loads(ex.payload)}]
    run2 = make_run(arc, positions_table(final), [], label="after exclude", edits=applied)
    res2 = deliver(arc, sid, run2.id, "csv", tmp_path / "b.csv", "processing",
                   allow_flags=True)
    assert res2.edit_ids == [ex.id, rej.id] and res2.warnings == []


@pytest.mark.parametrize("fmt", ["sps", "segp1", "csv", "geojson", "gpkg"])
def test_every_format_states_its_ledger_anchor(flagged, tmp_path, fmt):
    """The delivered file itself holds the anchor (its deliver event and the hash before
    it), so the recipient keeps it even without the manifest."""
    arc, sid, *_ = flagged
    out = tmp_path / f"kestrel.{fmt}"
    res = deliver(arc, sid, None, fmt, out, "Harrow Basin Energy processing",
                  allow_flags=True)
    with arc.session() as s:
        ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc())).first()
    assert ev.action == "deliver" and res.anchor == {"event": ev.seq, "after": ev.prev_hash}
    assert read_file_anchor(out) == Anchor(ev.seq, ev.prev_hash)
    if fmt == "sps":  # an H26 comment record, continued like every long header value
        assert any(line.startswith("H26 Ledger anchor") for line in out.read_text().splitlines())
