"""Crash safety of ``nodekeep load fixes``: SIGKILL at stratified moments, on both backends.

After every kill: verify passes (only unreferenced objects may be left, reported as
dangling), the ledger chain is whole, and loading the same logs again ends with exactly the
raw-file rows of an uninterrupted load (same objects, counts and fix tables), each ledgered
once.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.reliability.harness import ArchiveTemplate, spread_campaign
from tests.reliability.logs import write_logs
from tests.reliability.scenarios import load_fixes

TRIALS = {"sqlite": 10, "postgres": 10}  # 20 in CI over both backends; bench/soak.py runs more


@pytest.mark.slow
def test_load_fixes_killed_at_random(template: ArchiveTemplate, tmp_path: Path, backend: str):
    logs = tmp_path / "logs"
    write_logs(logs, 4, 3000)
    sc = load_fixes(logs)
    result = spread_campaign(sc.name, template, tmp_path / "trials", sc.argv_for, sc.result_of,
                      n=TRIALS[backend], seed=11, backend=backend, rerun=sc.rerun)
    summary = result.summary()
    bad = [t for t in result.trials if not t.ok]
    assert not bad, (summary, bad)
    assert summary["killed"] >= TRIALS[backend] // 2, summary
    assert len(summary["phases"]) >= 2, summary
