"""Crash safety of the archive core: a writer SIGKILLed at stratified random moments.

The writer (tests/reliability/core_writer.py) follows the custody pattern: objects first,
then one transaction with the row and its ledger event. After every kill the archive must
verify (dangling objects allowed), and a re-run must end with exactly the rows and events of
an uninterrupted run: nothing lost, nothing doubled.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
from sqlalchemy import select

from archive.store.archive import Archive
from archive.store.history import ledger_events
from archive.store.models import RawFile
from tests.reliability.core_writer import ACTION
from tests.reliability.harness import ArchiveTemplate, campaign

COUNT, SIZE = 40, 200_000


def core_result(root: Path) -> tuple:
    """Objects and events the writer committed, in ledger order."""
    with Archive.open(root) as arc:
        events = [e["payload"]["object"] for e in reversed(ledger_events(arc, action=ACTION))]
        with arc.session() as s:
            rows = sorted(s.scalars(select(RawFile.object_hash)))
    assert len(events) == len(set(events)), "an object was ledgered twice"
    return tuple(sorted(events)), tuple(rows)


@pytest.mark.slow
def test_core_writer_killed_at_random(template: ArchiveTemplate, tmp_path: Path, backend: str):
    result = campaign(
        "core writer", template, tmp_path / "trials",
        lambda root: [sys.executable, "-m", "tests.reliability.core_writer", str(root),
                      str(COUNT), str(SIZE)],
        core_result, n=6, seed=7, backend=backend)
    summary = result.summary()
    assert summary["trials"] == 6
    bad = [t for t in result.trials if not t.ok]
    assert not bad, bad
    # the kills are spread: most of them land while the writer works
    assert summary["killed"] >= 4, summary
    assert len(summary["phases"]) >= 2, summary
