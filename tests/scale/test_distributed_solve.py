"""The solve fanned out on Dask gives the single-process positions, bit for bit.

A LocalCluster of two workers (threads of this process, reached by its tcp address as a
remote scheduler would be) solves the small Kestrel Flats 3D scenario cut into several node
partitions; ``recompute`` then solves the same manifest in this process alone, and the two
tables must have the same content digest (``table_digest``: schema and every value).
"""

from __future__ import annotations

import json

import pytest

from archive.solve import inputs as solve_inputs
from archive.solve import run as solve_run
from archive.solve import solving
from archive.store.archive import Archive
from archive.store.hashing import table_digest
from archive.store.verify import verify_archive
from tests.support.cli import invoke
from tests.support.scale import populate

pytest.importorskip("distributed")
pytestmark = pytest.mark.slow

PART_FIXES = 20_000  # small partitions, so the scenario is cut into several


def test_solve_on_two_dask_workers_is_bit_identical(tmp_path, small_scenario, runner,
                                                    monkeypatch):
    from distributed import LocalCluster

    root = tmp_path / "arc"
    arc = Archive.init(root, actor="office")
    survey_id = populate(arc, small_scenario, n_logs=12)
    monkeypatch.setattr(solving, "partitions",
                        lambda a, inp, skip=None: solve_inputs.partitions(a, inp, limit=PART_FIXES,
                                                                          skip=skip))
    inp = solve_inputs.survey_inputs(arc, survey_id, {"stations": None, "nodes": None})
    parts = solving.partitions(arc, inp)
    assert len([p for p in parts if p.nodes]) >= 3
    try:
        with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                          protocol="tcp://", host="127.0.0.1",
                          dashboard_address=None) as cluster:
            result = invoke(runner, root, "solve", "--scheduler", cluster.scheduler_address,
                            "--json", "--quiet")
            assert result.exit_code == 0, result.output
            out = json.loads(result.stdout)
            assert out["created"] and out["n_positions"] > 0
            # Work really went to the workers.
            assert sum(len(w.data) + w.state.transition_counter
                       for w in cluster.workers.values()) > 0
        run = solve_run.get_run(arc, survey_id, out["run_id"])
        single = solve_run.recompute(arc, run.id)  # this process, partition after partition
        # positions_digest is the digest of the table the Dask workers produced.
        assert table_digest(single) == run.positions_digest
        assert single.num_rows == out["n_positions"]
        assert arc.objects.read_table(run.positions_hash).equals(single)
        # Same manifest, same run: solving again locally is a look-up of the same run.
        again = solve_run.solve_survey(arc, survey_id)
        assert again.run_id == run.id and not again.created
        assert verify_archive(arc).ok
    finally:
        arc.close()
