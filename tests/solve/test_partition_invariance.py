"""A run's positions must not depend on how its nodes were partitioned: the run is cut into
node partitions (and spread over Dask workers), so solving all nodes at once and node by
node must give the same bits. Every cloud is solved on its own; the pooled error model
behind the uncertainty is fitted once the partitions are combined, on all the run's rows in
the run's order (:func:`archive.solve.solving.combine`)."""

from __future__ import annotations

import pyarrow as pa
import pyarrow.compute as pc

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.solve.pooled import WORK
from archive.solve.run import MANIFEST_FORMAT, SORT_KEYS
from archive.solve.solving import combine
from archive.store.hashing import table_digest


def _sorted(t: pa.Table) -> pa.Table:
    return t.take(pc.sort_indices(t, sort_keys=SORT_KEYS)).combine_chunks()


def test_solving_node_by_node_equals_solving_all_at_once(small_sim):
    sim = small_sim
    p = default_params()
    manifest = {"format": MANIFEST_FORMAT, "params": p,
                "survey": {"crs_epsg": sim.meta["epsg"]}}
    # unlogged-cluster detection looks at whole tracks of one node, so it is per node too
    together = solve_fixes(sim.fixes, sim.deployments, sim.stations, p, sim.meta["epsg"],
                           finish=False).positions
    parts = []
    for node in pc.unique(sim.deployments["node"]).to_pylist():
        fx = sim.fixes.filter(pc.equal(sim.fixes["node"], node))
        dep = sim.deployments.filter(pc.equal(sim.deployments["node"], node))
        parts.append(solve_fixes(fx, dep, sim.stations, p, sim.meta["epsg"],
                                 used=_used(sim), finish=False).positions)
    logged = [t.filter(pc.equal(t["kind"], "logged")) for t in (together, *parts)]
    together, parts = logged[0], logged[1:]
    one_by_one = _sorted(pa.concat_tables(parts))
    assert set(WORK) <= set(together.column_names)
    # every cloud's own columns, before the pooled model
    raw_a, raw_b = _sorted(together), one_by_one
    assert raw_a.num_rows == raw_b.num_rows > 0
    for name in raw_a.column_names:
        assert raw_a[name].equals(raw_b[name]), name
    # the finished run, whatever the partitions
    a, _ = combine([together], manifest)
    b, _ = combine(parts, manifest)
    assert not set(WORK) & set(a.column_names)
    assert table_digest(a) == table_digest(b)


def _used(sim):
    from archive.solve.parts import used_indices

    return used_indices(sim.deployments, sim.stations)
