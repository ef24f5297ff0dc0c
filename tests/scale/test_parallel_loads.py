"""Several ``nodekeep load fixes`` processes on one archive at once.

Each process parses in its own worker pool; catalog writes are serialised by the database
(SQLite's write lock taken at BEGIN IMMEDIATE, PostgreSQL's row lock on the ledger head), so
every load must land, once, on one unbroken ledger chain.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys

import pytest
from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.models import LedgerEvent, RawFile, StoredObject
from archive.store.verify import verify_archive

pytestmark = pytest.mark.slow

N_PROCESSES = 4
LOGS_EACH = 2
LINES_KEPT = 3000  # the head of each demo log: real NMEA, a quarter of the parse work


def test_four_load_processes_at_once(any_survey_arc: Archive, small_scenario, tmp_path):
    arc = any_survey_arc
    logs = []
    for src in small_scenario.logs[: N_PROCESSES * LOGS_EACH]:
        head = tmp_path / src.name
        head.write_bytes(b"".join(src.read_bytes().splitlines(keepends=True)[:LINES_KEPT]))
        logs.append(head)
    env = dict(os.environ, NODEKEEP_ACTOR="loader")
    procs = []
    for k in range(N_PROCESSES):
        mine = [str(p) for p in logs[k * LOGS_EACH:(k + 1) * LOGS_EACH]]
        procs.append(subprocess.Popen(
            [sys.executable, "-m", "archive", "-A", str(arc.root), "load", "fixes", *mine,
             "--workers", "2", "--json"],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, env=env))
    outputs = []
    for p in procs:
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err.decode()
        outputs.append(json.loads(out))

    with arc.session() as s:
        rows = s.scalars(select(RawFile)).all()
        events = s.scalar(select(func.count()).select_from(LedgerEvent)
                          .where(LedgerEvent.action == "load.fixes"))
        catalogued = set(s.scalars(select(StoredObject.hash)))
    # Every log is present once, under the SHA-256 of its bytes (hashlib, independently).
    expected = {hashlib.sha256(p.read_bytes()).hexdigest(): p.stem for p in logs}
    assert sorted(r.object_hash for r in rows) == sorted(expected)
    assert {r.object_hash: r.node for r in rows} == expected
    assert events == len(logs)
    assert sum(len(o["files"]) for o in outputs) == len(logs)
    # One chain, no fork, nothing altered; no duplicate or unreferenced objects.
    report = verify_archive(arc)
    assert report.ok, report.problems
    stored = list(arc.objects.iter_hashes())
    assert len(stored) == len(set(stored)) == len(catalogued)
    assert not report.dangling
