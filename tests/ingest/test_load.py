"""Loading fix logs into an archive: custody, idempotence, failures, the commands."""

from __future__ import annotations

import datetime as dt
import json

import numpy as np
import pyarrow.csv as pacsv
import pyarrow.parquet as pq
import pytest
from sqlalchemy import func, select

from archive.ingest.load import load_fix_files
from archive.ingest.read import list_raw_files, node_fixes
from archive.store.ledger import payload_of
from archive.store.models import LedgerEvent, RawFile, StoredObject
from archive.store.verify import verify_archive
from tests.support.cli import invoke
from tests.support.fixlogs import log_bytes, survey_id


@pytest.fixture
def logs(tmp_path):
    d = tmp_path / "harvest"
    d.mkdir()
    (d / "KF10001.nmea").write_bytes(log_bytes(seed=1) + b"$GPGGA,0001\x00\x00")
    (d / "KF10002.nmea").write_bytes(log_bytes(seed=2))
    return d


def counts(arc) -> tuple[int, int, int]:
    with arc.session() as s:
        return (s.scalar(select(func.count()).select_from(RawFile)),
                s.scalar(select(func.count()).select_from(StoredObject)),
                s.scalar(select(func.count()).select_from(LedgerEvent)))


def test_load_stores_raw_fixes_rejects_and_ledger(survey_arc, logs):
    arc = survey_arc
    sid = survey_id(arc)
    report = load_fix_files(arc, sid, [logs], workers=2)
    assert report.ok and [f.status for f in report.files] == ["loaded", "loaded"]
    with arc.session() as s:
        rows = s.scalars(select(RawFile).order_by(RawFile.id)).all()
        ev = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes")
                       .order_by(LedgerEvent.seq)).all()
    first = rows[0]
    # raw bytes kept byte for byte under their hash
    assert arc.objects.read_bytes(first.object_hash) == (logs / "KF10001.nmea").read_bytes()
    assert first.node == "KF10001" and first.format == "nmea" and first.parser == "nmea-2"
    assert first.n_lines == 1801 and first.n_accepted == 1800 and first.n_rejected == 1
    assert first.n_accepted + first.n_rejected + first.n_ignored == first.n_lines
    assert first.n_fixes == 600 and first.n_valid == 540
    assert first.t_first == dt.datetime(2024, 3, 1, 23, 55, tzinfo=dt.UTC)
    assert first.t_last == dt.datetime(2024, 3, 2, 0, 4, 59, tzinfo=dt.UTC)
    assert json.loads(first.details)["rejects"] == {"binary": 1}
    fixes = arc.objects.read_table(first.fixes_hash)
    assert fixes.num_rows == 600 and fixes.column("raw_hash").unique().to_pylist() == [
        first.object_hash]
    assert arc.objects.read_table(first.rejects_hash).column("raw_line").to_pylist() == [1801]
    assert rows[1].rejects_hash is None
    assert len(ev) == 2 and payload_of(ev[0])["raw"] == first.object_hash
    assert payload_of(ev[0])["rows"][0]["table"] == "raw_files"
    assert verify_archive(arc).ok


def test_load_twice_changes_nothing(survey_arc, logs):
    arc = survey_arc
    sid = survey_id(arc)
    load_fix_files(arc, sid, [logs / "KF10001.nmea"], workers=1)
    before = counts(arc)
    again = load_fix_files(arc, sid, [str(logs / "*.nmea")], workers=1)
    assert [f.status for f in again.files] == ["already", "loaded"]
    third = load_fix_files(arc, sid, [logs], workers=1)
    assert [f.status for f in third.files] == ["already", "already"]
    after = counts(arc)
    assert after[0] == before[0] + 1 and after[2] == before[2] + 1
    assert counts(arc) == after
    assert verify_archive(arc).ok


def test_bad_files_fail_alone(survey_arc, logs):
    arc = survey_arc
    (logs / "photo.jpg").write_bytes(bytes(range(256)) * 40)
    (logs / "empty.nmea").write_bytes(b"")
    (logs / "sheet.csv").write_bytes(b"line,point,x,y\n1001,5001,600100.0,3900200.0\n")
    (logs / "ggaonly.nmea").write_bytes(b"\r\n".join(
        line for line in log_bytes(20).split(b"\r\n") if b"GGA" in line))
    report = load_fix_files(arc, survey_id(arc), [logs], workers=2)
    status = {f.path.rsplit("/", 1)[-1]: (f.status, f.error) for f in report.files}
    assert status["KF10001.nmea"][0] == status["KF10002.nmea"][0] == "loaded"
    assert "photo.jpg: binary data" in status["photo.jpg"][1]
    assert "empty.nmea: the file is empty" in status["empty.nmea"][1]
    assert "sheet.csv: no usable position sentence" in status["sheet.csv"][1]
    assert "--date" in status["ggaonly.nmea"][1]
    assert not report.ok and len(report.failed) == 4
    with arc.session() as s:
        assert s.scalar(select(func.count()).select_from(RawFile)) == 2
    v = verify_archive(arc)
    assert v.ok  # the failed files' raw bytes are at most unreferenced, never referenced
    # with --date the GGA-only log loads
    again = load_fix_files(arc, survey_id(arc), [logs / "ggaonly.nmea"],
                           date=dt.date(2024, 3, 1))
    assert again.ok and again.files[0].n_fixes == 20


def test_node_fixes_dedup_across_files(survey_arc, tmp_path):
    arc = survey_arc
    a = tmp_path / "a.nmea"
    b = tmp_path / "b.nmea"
    data = log_bytes(300)
    a.write_bytes(data)
    # a second download of the same node overlapping the first by 100 epochs
    b.write_bytes(log_bytes(300, start="2024-03-01T23:58:20", seed=9))
    sid = survey_id(arc)
    load_fix_files(arc, sid, [a, b], node="KF20002", workers=1)
    t = node_fixes(arc, sid, "KF20002")
    times = t.column("time").to_numpy()
    assert t.num_rows == 500 and (np.diff(times.astype(np.int64)) > 0).all()
    w = node_fixes(arc, sid, "KF20002", dt.datetime(2024, 3, 2, tzinfo=dt.UTC),
                   dt.datetime(2024, 3, 2, 0, 1, tzinfo=dt.UTC))
    assert w.num_rows == 60
    assert [r["node"] for r in list_raw_files(arc, sid)] == ["KF20002", "KF20002"]


def test_cli_load_logs_fixes(survey_arc, logs, runner, tmp_path):
    root = survey_arc.root
    (logs / "junk.bin").write_bytes(b"\x00\xff" * 100)
    r = invoke(runner, root, "load", "fixes", str(logs), "--node-pattern", r"KF(?P<node>\d+)",
               "--workers", "1")
    assert r.exit_code == 1
    assert "junk.bin" in r.output and "failed" in r.output
    r = invoke(runner, root, "load", "fixes", str(logs / "KF10001.nmea"), "--json", "--quiet")
    assert r.exit_code == 0 and json.loads(r.stdout)["files"][0]["status"] == "already"
    r = invoke(runner, root, "logs", "--json")
    rows = json.loads(r.stdout)
    assert r.exit_code == 0 and [x["node"] for x in rows] == ["10001", "10002"]
    assert rows[0]["rejects"] == {"binary": 1}
    r = invoke(runner, root, "logs")
    assert "binary 1" in r.output
    out = tmp_path / "kf.csv"
    r = invoke(runner, root, "fixes", "10001", "--start", "2024-03-02T00:00:00Z",
               "--to", str(out))
    assert r.exit_code == 0 and "wrote 300 fixes of node 10001" in r.output
    csv = pacsv.read_csv(out)
    assert csv.num_rows == 300 and {"time", "lat", "lon", "quality", "raw_hash",
                                    "raw_line"} <= set(csv.column_names)
    # ISO 8601 UTC with microseconds
    assert out.read_text().splitlines()[1].split(",")[1] == '"2024-03-02T00:00:00.000000Z"'
    r = invoke(runner, root, "fixes", "10001", "--to", str(out))
    assert r.exit_code == 4 and "already exists" in r.stderr
    pq_out = tmp_path / "kf.parquet"
    r = invoke(runner, root, "fixes", "10001", "--to", str(pq_out), "--json")
    assert json.loads(r.stdout)["n_fixes"] == 600 and pq.read_table(pq_out).num_rows == 600
    r = invoke(runner, root, "verify")
    assert r.exit_code == 0
    # an unknown node is a usage error naming known ones, and writes nothing
    nope = tmp_path / "nope.csv"
    r = invoke(runner, root, "fixes", "NOPE", "--to", str(nope))
    assert r.exit_code == 2 and not nope.exists()
    assert "'NOPE' has no loaded fix log" in r.stderr and "10001, 10002" in r.stderr


def test_cli_delimited_with_profile(survey_arc, runner, tmp_path):
    prof = tmp_path / "kf.toml"
    prof.write_text('[columns]\ntime = "t"\nlat = "lat"\nlon = "lon"\nquality = "q"\n')
    log = tmp_path / "KF30003.csv"
    log.write_text("t,lat,lon,q\n2024-03-01T00:00:00Z,35.1,-101.2,1\n"
                   "2024-03-01T00:00:01Z,35.1,-101.2,4\n")
    r = invoke(runner, survey_arc.root, "load", "fixes", str(log), "--profile", str(prof))
    assert r.exit_code == 0, r.output
    with survey_arc.session() as s:
        row = s.scalars(select(RawFile)).one()
    assert row.format == "delimited" and row.n_fixes == 2
    assert survey_arc.objects.read_bytes(row.profile_hash) == prof.read_bytes()
    bad = tmp_path / "bad.toml"
    bad.write_text('[columns]\ntime = "t"\nlat = "lat"\n')
    r = invoke(runner, survey_arc.root, "load", "fixes", str(log), "--profile", str(bad))
    assert r.exit_code == 1 and "bad.toml" in r.stderr and "columns.lon" in r.stderr


@pytest.mark.postgres
def test_load_on_postgres(any_survey_arc, logs):
    arc = any_survey_arc
    sid = survey_id(arc)
    report = load_fix_files(arc, sid, [logs], workers=2)
    assert report.ok and len(report.loaded) == 2
    assert [f.status for f in load_fix_files(arc, sid, [logs]).files] == ["already"] * 2
    assert node_fixes(arc, sid, "KF10002").num_rows == 600
    assert verify_archive(arc).ok


def test_failed_files_are_kept_and_ledgered(survey_arc, logs):
    arc = survey_arc
    (logs / "photo.jpg").write_bytes(bytes(range(256)) * 40)
    (logs / "empty.nmea").write_bytes(b"")
    report = load_fix_files(arc, survey_id(arc), [logs], workers=1)
    by_name = {f.path.rsplit("/", 1)[-1]: f for f in report.files}
    assert [by_name[n].status for n in ("KF10001.nmea", "KF10002.nmea")] == ["loaded"] * 2
    photo, empty = by_name["photo.jpg"], by_name["empty.nmea"]
    assert photo.status == empty.status == "failed"
    # every line of the binary file is accounted for; the empty file has none
    assert photo.n_lines > 0 and photo.n_fixes == 0
    assert photo.n_accepted + photo.n_rejected + photo.n_ignored == photo.n_lines
    assert photo.rejects.get("binary", 0) > 0
    assert empty.n_lines == 0
    v = verify_archive(arc)
    assert v.ok and v.dangling == []  # the failed raw bytes are referenced, not left over
    with arc.session() as s:
        kinds = dict(s.execute(select(StoredObject.hash, StoredObject.kind)).all())
        events = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes.failed")
                           .order_by(LedgerEvent.seq)).all()
        payloads = [payload_of(e) for e in events]
    assert kinds[photo.raw_hash] == kinds[empty.raw_hash] == "raw-failed"
    got = {p["name"]: p for p in payloads}
    assert set(got) == {"photo.jpg", "empty.nmea"}
    assert got["photo.jpg"]["raw"] == photo.raw_hash and got["photo.jpg"]["node"] == "photo"
    assert "binary data" in got["photo.jpg"]["error"]
    assert got["photo.jpg"]["counts"]["n_lines"] == photo.n_lines
    assert got["empty.nmea"]["raw"] == empty.raw_hash
    assert "the file is empty" in got["empty.nmea"]["error"]


def test_raw_bytes_of_a_failed_attempt_become_a_loaded_log(survey_arc, tmp_path):
    """A log that failed with the wrong column profile keeps its raw bytes (raw-failed);
    loaded again with the right profile, the same object is the loaded log's raw copy."""
    log = tmp_path / "KF30004.csv"
    log.write_text("t,lat,lon,q\n2024-03-01T00:00:00Z,35.1,-101.2,1\n"
                   "2024-03-01T00:00:01Z,35.1,-101.2,4\n")
    wrong = tmp_path / "wrong.toml"
    wrong.write_text('[columns]\ntime = "time"\nlat = "lat"\nlon = "lon"\n')
    right = tmp_path / "right.toml"
    right.write_text('[columns]\ntime = "t"\nlat = "lat"\nlon = "lon"\nquality = "q"\n')
    sid = survey_id(survey_arc)
    first = load_fix_files(survey_arc, sid, [log], fmt="delimited", profile_path=wrong)
    assert [f.status for f in first.files] == ["failed"]
    h = first.files[0].raw_hash
    with survey_arc.session() as s:
        assert s.get(StoredObject, h).kind == "raw-failed"
    second = load_fix_files(survey_arc, sid, [log], fmt="delimited", profile_path=right)
    assert [f.status for f in second.files] == ["loaded"] and second.files[0].raw_hash == h
    with survey_arc.session() as s:
        assert s.get(StoredObject, h).kind == "raw"
    assert verify_archive(survey_arc).ok
