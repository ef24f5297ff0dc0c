"""A station's solution must not depend on which other nodes it is solved with: the run
is cut into node partitions (and spread over Dask workers), so solving all nodes at once
and node by node must give the same bits."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.compute as pc

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.store.hashing import table_digest

KEYS = [("line", "ascending"), ("point", "ascending"), ("index", "ascending"),
        ("node", "ascending"), ("part", "ascending")]


def _sorted(t: pa.Table) -> pa.Table:
    return t.take(pc.sort_indices(t, sort_keys=KEYS)).combine_chunks()


def test_solving_node_by_node_equals_solving_all_at_once(small_sim):
    sim = small_sim
    p = default_params()
    # unlogged-cluster detection looks at whole tracks of one node, so it is per node too
    together = solve_fixes(sim.fixes, sim.deployments, sim.stations, p, sim.meta["epsg"])
    parts = []
    for node in pc.unique(sim.deployments["node"]).to_pylist():
        fx = sim.fixes.filter(pc.equal(sim.fixes["node"], node))
        dep = sim.deployments.filter(pc.equal(sim.deployments["node"], node))
        parts.append(solve_fixes(fx, dep, sim.stations, p, sim.meta["epsg"]).positions)
    one_by_one = _sorted(pa.concat_tables(parts))
    together = _sorted(together.positions)
    logged = pc.equal(together["kind"], "logged")
    together = together.filter(logged)
    one_by_one = one_by_one.filter(pc.equal(one_by_one["kind"], "logged"))
    assert together.num_rows == one_by_one.num_rows > 0
    for name in together.column_names:
        assert together[name].equals(one_by_one[name]), name
    assert table_digest(together) == table_digest(one_by_one)
