"""Crash safety of ``nodekeep solve``: SIGKILL at stratified moments, on both backends.

The template holds the small demo scenario with every log loaded. After every kill:
verify passes (only unreferenced objects may be left), the chain is whole, and solving
again gives the same run id (the hash of the run manifest) and the same positions digest
as an uninterrupted solve, ledgered once.
"""

from __future__ import annotations

from pathlib import Path

import pytest

from tests.reliability.harness import ArchiveTemplate, spread_campaign
from tests.reliability.scenarios import solve
from tests.support.reliability import fill_archive

TRIALS = {"sqlite": 10, "postgres": 10}  # 20 in CI over both backends; bench/soak.py runs more


@pytest.mark.slow
def test_solve_killed_at_random(scenario, tmp_path: Path, db_url: str | None, backend: str):
    tpl = ArchiveTemplate(fill_archive(tmp_path / "template", db_url, scenario, n_logs=0),
                          db_url)
    sc = solve()
    try:
        result = spread_campaign(sc.name, tpl, tmp_path / "trials", sc.argv_for, sc.result_of,
                          n=TRIALS[backend], seed=13, backend=backend, rerun=sc.rerun)
    finally:
        tpl.cleanup()
    summary = result.summary()
    bad = [t for t in result.trials if not t.ok]
    assert not bad, (summary, bad)
    assert summary["killed"] >= TRIALS[backend] // 2, summary
    assert len(summary["phases"]) >= 2, summary
