"""Files are recorded in batched transactions: a failure inside a batch leaves each file of
it either fully recorded (row, objects, ledger event) or not at all, and a second load
completes the job."""

from __future__ import annotations

import pytest
from sqlalchemy import func, select

from archive.ingest import load as load_mod
from archive.ingest import recording as rec_mod
from archive.ingest.load import load_fix_files
from archive.store.ledger import payload_of
from archive.store.models import LedgerEvent, RawFile
from archive.store.verify import verify_archive
from tests.support.fixlogs import log_bytes, survey_id


class Boom(RuntimeError):
    pass


@pytest.fixture
def harvest(tmp_path):
    d = tmp_path / "harvest"
    d.mkdir()
    for k in range(7):
        (d / f"KF-{k:04d}.nmea").write_bytes(log_bytes(60, f"2024-03-0{1 + k % 3}T08:00:00",
                                                       seed=k))
    return d


def _state(arc):
    with arc.session() as s:
        rows = s.scalars(select(RawFile).order_by(RawFile.id)).all()
        events = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.fixes")).all()
        n_rows = s.scalar(select(func.count()).select_from(RawFile))
    return [r.node for r in rows], sorted(payload_of(e)["raw"] for e in events), n_rows, rows


def test_failure_inside_a_batch_rolls_back_the_whole_batch_only(survey_arc, harvest,
                                                                 monkeypatch):
    arc = survey_arc
    sid = survey_id(arc)
    calls = {"n": 0}
    real = rec_mod.Recorder._record

    def failing(self, o, res):
        calls["n"] += 1
        if calls["n"] == 3:  # batches hold 1, 2, 4 files: the 3rd file ends batch 2
            raise Boom("disk pulled")
        return real(self, o, res)

    monkeypatch.setattr(rec_mod.Recorder, "_record", failing)
    with pytest.raises(Boom):
        load_fix_files(arc, sid, [harvest], workers=1)
    nodes, events, n_rows, rows = _state(arc)
    # batch 1 (KF-0000) committed; batch 2 (KF-0001, KF-0002) rolled back as one
    assert nodes == ["KF-0000"] and n_rows == 1
    assert events == [rows[0].object_hash]
    for r in rows:  # a recorded file has all its objects
        assert arc.objects.exists(r.object_hash) and arc.objects.exists(r.fixes_hash)
    assert verify_archive(arc).ok  # unreferenced objects only, the ledger whole
    monkeypatch.setattr(rec_mod.Recorder, "_record", real)
    rep = load_fix_files(arc, sid, [harvest], workers=1)
    assert [f.status for f in rep.files] == ["already"] + ["loaded"] * 6
    nodes, events, n_rows, rows = _state(arc)
    assert nodes == [f"KF-{k:04d}" for k in range(7)]
    assert events == sorted(r.object_hash for r in rows)  # each file ledgered once
    assert verify_archive(arc).ok


def test_batches_grow_and_every_file_gets_its_own_ledger_event(survey_arc, harvest,
                                                               monkeypatch):
    sizes: list[int] = []
    real_flush = rec_mod.Recorder.flush

    def counting(self):
        if self.batch:
            sizes.append(len(self.batch))
        return real_flush(self)

    monkeypatch.setattr(rec_mod.Recorder, "flush", counting)
    monkeypatch.setattr(rec_mod, "BATCH_SECONDS", 3600.0)
    load_fix_files(survey_arc, survey_id(survey_arc), [harvest], workers=1)
    assert sizes == [1, 2, 4]  # the first file is committed at once, then batches double
    _, events, n_rows, _ = _state(survey_arc)
    assert n_rows == 7 and len(events) == 7


def test_small_files_are_flushed_per_batch_bytes_before_names(survey_arc, harvest,
                                                              monkeypatch):
    """Files read whole are not flushed one by one: each batch flushes the store's file
    system once before its objects are named and once after, and only then does the
    catalog record them (a name never points at bytes a power loss could lose)."""
    from archive.store.objects import ObjectStore

    arc = survey_arc
    if not arc.objects.can_sync_filesystem():
        pytest.skip("needs a local store on Linux (syncfs)")
    fsyncs = {"n": 0}
    real_fsync = load_mod.os.fsync

    def counting_fsync(fd):
        fsyncs["n"] += 1
        return real_fsync(fd)

    seen: list[tuple[int, int, int]] = []  # (named objects, files recorded, tmp files)
    real_sync = ObjectStore.sync_filesystem

    def watching(self):
        with arc.session() as s:
            n_rows = s.scalar(select(func.count()).select_from(RawFile))
        named = sum(1 for p in self.root.glob("??/??/*") if p.is_file())
        seen.append((named, n_rows, len(list((self.root / "tmp").glob("put-*")))))
        return real_sync(self)

    monkeypatch.setattr("os.fsync", counting_fsync)
    monkeypatch.setattr(ObjectStore, "sync_filesystem", watching)
    monkeypatch.setattr(rec_mod, "BATCH_SECONDS", 3600.0)
    named_before = sum(1 for p in arc.objects.root.glob("??/??/*") if p.is_file())
    rep = load_fix_files(arc, survey_id(arc), [harvest], workers=1)
    assert [f.status for f in rep.files] == ["loaded"] * 7
    # batches of 1, 2 and 4 files, two flushes each
    assert len(seen) == 6
    for k, n_files in enumerate([1, 2, 4]):
        before, after = seen[2 * k], seen[2 * k + 1]
        done = sum([1, 2, 4][:k])
        assert before[1] == after[1] == done  # the catalog records the batch after both
        assert before[2] == 2 * n_files  # raw copy and fixes table of each file, unnamed
        assert after[0] == before[0] + 2 * n_files and after[2] == 0  # named between
    assert seen[0][0] == named_before
    assert fsyncs["n"] == 0  # no file flushed one by one (SQLite flushes through C)
    assert verify_archive(arc).ok


def test_a_failed_flush_records_nothing_of_its_batch(survey_arc, harvest, monkeypatch):
    """The file system reporting a write error when the batch is flushed: a storage error,
    nothing of that batch recorded or named, its temporary files removed; a second load
    completes the job."""
    from archive.errors import StorageError
    from archive.store import durable as objects_mod

    arc = survey_arc
    if not arc.objects.can_sync_filesystem():
        pytest.skip("needs a local store on Linux (syncfs)")
    calls = {"n": 0}
    real = objects_mod._syncfs()

    def failing(fd):
        calls["n"] += 1
        return -1 if calls["n"] == 3 else real(fd)  # the first flush of the 2nd batch

    monkeypatch.setattr(objects_mod, "_syncfs", lambda: failing)
    with pytest.raises(StorageError, match="cannot write to the object store"):
        load_fix_files(arc, survey_id(arc), [harvest], workers=1)
    nodes, events, n_rows, rows = _state(arc)
    assert nodes == ["KF-0000"] and n_rows == 1 and events == [rows[0].object_hash]
    assert not list((arc.objects.root / "tmp").glob("put-*"))
    assert verify_archive(arc).ok
    monkeypatch.setattr(objects_mod, "_syncfs", lambda: real)
    rep = load_fix_files(arc, survey_id(arc), [harvest], workers=1)
    assert [f.status for f in rep.files] == ["already"] + ["loaded"] * 6
    assert verify_archive(arc).ok


def test_small_files_go_to_the_parsing_processes_in_runs():
    """Consecutive small files are handed to a parsing process together, in order, at
    most GROUP_FILES and GROUP_BYTES a run, at least four runs per process, a file as large
    as a run alone."""
    groups = load_mod._groups
    tasks = [(i, {"path": f"KF-{i:04d}.nmea"}) for i in range(100)]
    runs = groups(tasks, [100_000] * 100, 2)
    assert [i for run in runs for i, _ in run] == list(range(100))  # order kept
    assert [len(r) for r in runs] == [12] * 8 + [4]  # 100 // (4 * 2) = 12 a run
    runs = groups(tasks, [100_000] * 100, 1)
    assert max(len(r) for r in runs) == load_mod.GROUP_FILES
    assert [len(r) for r in groups(tasks[:3], [10] * 3, 2)] == [1, 1, 1]
    sizes = [1_000_000] * 100
    sizes[40] = load_mod.GROUP_BYTES + 1
    runs = groups(tasks, sizes, 1)
    assert [(i, _) for run in runs for i, _ in run] == tasks
    assert [[i for i, _ in r] for r in runs if 40 in [i for i, _ in r]] == [[40]]
    assert all(sum(sizes[i] for i, _ in r) <= load_mod.GROUP_BYTES for r in runs if len(r) > 1)


def test_a_harvest_loaded_by_two_processes_records_every_file_in_order(survey_arc,
                                                                        harvest):
    rep = load_fix_files(survey_arc, survey_id(survey_arc), [harvest], workers=2)
    assert [f.status for f in rep.files] == ["loaded"] * 7
    nodes, events, n_rows, rows = _state(survey_arc)
    assert nodes == [f"KF-{k:04d}" for k in range(7)]  # recorded in the order given
    assert [r.id for r in rows] == sorted(r.id for r in rows)
    assert events == sorted(r.object_hash for r in rows)
    assert verify_archive(survey_arc).ok


def test_without_syncfs_every_object_is_flushed_before_it_is_named(survey_arc, harvest,
                                                                   monkeypatch):
    """Where the file system cannot be flushed in one call (not Linux), each object is
    flushed by the process that wrote it and the folders after the renames, as before."""
    from archive.store import durable

    monkeypatch.setattr(durable, "_syncfs", lambda: None)
    assert not survey_arc.objects.can_sync_filesystem()
    fsyncs = {"n": 0}
    real_fsync = load_mod.os.fsync

    def counting_fsync(fd):
        fsyncs["n"] += 1
        return real_fsync(fd)

    monkeypatch.setattr("os.fsync", counting_fsync)
    rep = load_fix_files(survey_arc, survey_id(survey_arc), [harvest], workers=1)
    assert [f.status for f in rep.files] == ["loaded"] * 7
    assert fsyncs["n"] >= 2 * 7  # each file's raw copy and fix table, then their folders
    assert verify_archive(survey_arc).ok
