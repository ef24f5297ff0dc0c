"""``verify`` reads the catalog as one snapshot: a writer that commits while it reads (a crew
member loading logs on a shared catalog, or the server finishing the commit of a writer
killed a moment earlier) does not show up as a row without its ledger event."""

from __future__ import annotations

from archive.store import verify as verify_module
from archive.store.archive import Archive
from archive.store.verify import verify_archive


def test_a_commit_between_the_ledger_and_the_rows_is_not_a_problem(any_survey_arc: Archive,
                                                                   monkeypatch):
    arc = any_survey_arc
    from tests.reliability.core_writer import write

    write(str(arc.root), 2, 1_000)  # two ledgered writes before
    walk = verify_module._walk_chain
    committed = []

    def walk_then_commit(s, report):
        out = walk(s, report)  # the ledger read; then another writer commits
        write(str(arc.root), 3, 1_000)
        committed.append(True)
        return out

    monkeypatch.setattr(verify_module, "_walk_chain", walk_then_commit)
    report = verify_archive(arc, rehash=False)
    assert committed and report.ok, report.problems
    assert report.events_checked == report.rows_checked + 1  # the survey's event too
    monkeypatch.undo()
    after = verify_archive(arc, rehash=False)  # the third write, seen whole afterwards
    assert after.ok and after.rows_checked == report.rows_checked + 1
