"""Files are recorded in batched transactions: a failure inside a batch leaves each file of
it either fully recorded (row, objects, ledger event) or not at all, and a second load
completes the job."""

from __future__ import annotations

import pytest
from sqlalchemy import func, select

from archive.ingest import load as load_mod
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
    real = load_mod._Recorder._record

    def failing(self, tx, o, res):
        calls["n"] += 1
        if calls["n"] == 3:  # batches hold 1, 2, 4 files: the 3rd file ends batch 2
            raise Boom("disk pulled")
        return real(self, tx, o, res)

    monkeypatch.setattr(load_mod._Recorder, "_record", failing)
    with pytest.raises(Boom):
        load_fix_files(arc, sid, [harvest], workers=1)
    nodes, events, n_rows, rows = _state(arc)
    # batch 1 (KF-0000) committed; batch 2 (KF-0001, KF-0002) rolled back as one
    assert nodes == ["KF-0000"] and n_rows == 1
    assert events == [rows[0].object_hash]
    for r in rows:  # a recorded file has all its objects
        assert arc.objects.exists(r.object_hash) and arc.objects.exists(r.fixes_hash)
    assert verify_archive(arc).ok  # unreferenced objects only, the ledger whole
    monkeypatch.setattr(load_mod._Recorder, "_record", real)
    rep = load_fix_files(arc, sid, [harvest], workers=1)
    assert [f.status for f in rep.files] == ["already"] + ["loaded"] * 6
    nodes, events, n_rows, rows = _state(arc)
    assert nodes == [f"KF-{k:04d}" for k in range(7)]
    assert events == sorted(r.object_hash for r in rows)  # each file ledgered once
    assert verify_archive(arc).ok


def test_batches_grow_and_every_file_gets_its_own_ledger_event(survey_arc, harvest,
                                                               monkeypatch):
    sizes: list[int] = []
    real_flush = load_mod._Recorder.flush

    def counting(self):
        if self.batch:
            sizes.append(len(self.batch))
        return real_flush(self)

    monkeypatch.setattr(load_mod._Recorder, "flush", counting)
    monkeypatch.setattr(load_mod, "BATCH_SECONDS", 3600.0)
    load_fix_files(survey_arc, survey_id(survey_arc), [harvest], workers=1)
    assert sizes == [1, 2, 4]  # the first file is committed at once, then batches double
    _, events, n_rows, _ = _state(survey_arc)
    assert n_rows == 7 and len(events) == 7
