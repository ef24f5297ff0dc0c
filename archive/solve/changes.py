"""What changed since a run: the result keys of :mod:`archive.solve.reuse`, compared.

For the crew's daily loop and deliveries of what changed:

- :func:`inputs_changed_since` says whether a solve now would differ from a given run
  (its manifest), and which nodes' inputs changed (their result keys);
- :func:`deployment_keys` lists a run's result key per deployment row (station, occupation
  index, node), so two runs, or a run and a delivery's run, can be compared station by
  station with :func:`changed_stations`.

A node whose key is unchanged has the same position in both runs. Its uncertainty may still
differ slightly: the pooled error model is fitted on the whole run (solving.md, "Incremental
solving").
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from archive.solve.reuse import changed_nodes, result_keys, run_keys
from archive.solve.run import build_manifest, get_run, run_manifest, run_positions
from archive.store.archive import Archive
from archive.store.hashing import canonical_hash

DEPLOYMENT_KEYS_SCHEMA = pa.schema([
    pa.field("line", pa.float64(), nullable=False),
    pa.field("point", pa.float64(), nullable=False),
    pa.field("index", pa.int8()),  # the occupation's point index (null: unlogged cluster)
    pa.field("node", pa.string(), nullable=False),
    pa.field("kind", pa.string(), nullable=False),  # logged | unlogged | awaiting
    pa.field("key", pa.string()),  # null: the run has no result keys
    pa.field("solved_by", pa.string()),
])


def current_keys(arc: Archive, survey_id: int, params: dict[str, Any]
                 ) -> tuple[str, dict[str, str]]:
    """The run id a whole-survey solve with ``params`` (resolved) would get now, and its
    result key per node. Reads the catalog and the survey's input tables, no fix table."""
    from archive.solve.inputs import survey_inputs

    selection = {"stations": None, "nodes": None}
    inp = survey_inputs(arc, survey_id, selection)
    manifest = build_manifest(inp, params, selection)
    return canonical_hash(manifest), result_keys(inp, manifest)


def inputs_changed_since(arc: Archive, survey_id: int, run_ref: str | None = None
                         ) -> dict[str, Any]:
    """Whether the inputs changed since a run (the newest by default), solving with that
    run's parameters: ``changed`` (a solve now would be another run), the run id it would
    get, and the nodes whose result keys differ (``changed``, ``added``, ``removed``; for a
    run without result keys, every current node is ``added``)."""
    run = get_run(arc, survey_id, run_ref)
    params = run_manifest(arc, run)["params"]
    now_id, now_keys = current_keys(arc, survey_id, params)
    old = run_keys(arc, run)
    pairs = (zip(old["node"].to_pylist(), old["key"].to_pylist(), strict=True)
             if old is not None else [])
    return {"run": run.id, "changed": now_id != run.id, "would_be_run": now_id,
            "nodes": changed_nodes(pairs, now_keys)}


def deployment_keys(arc: Archive, survey_id: int, run_ref: str | None = None) -> pa.Table:
    """The run's result key per row (station, occupation index, node, kind) with the run
    that solved it (:data:`DEPLOYMENT_KEYS_SCHEMA`); keys are null for a run without them."""
    run = get_run(arc, survey_id, run_ref)
    pos = run_positions(arc, run)
    occ = pos["occupation"] if "occupation" in pos.column_names else \
        pa.nulls(pos.num_rows, pa.int8())
    keys = run_keys(arc, run)
    known_key: dict[str, str] = {}
    known_by: dict[str, str] = {}
    if keys is not None:
        for n, k, by in zip(keys["node"].to_pylist(), keys["key"].to_pylist(),
                            keys["solved_by"].to_pylist(), strict=True):
            known_key[n], known_by[n] = k, by
    nodes = pos["node"].to_pylist()
    return pa.table({"line": pos["line"], "point": pos["point"], "index": occ,
                     "node": nodes, "kind": pos["kind"],
                     "key": [known_key.get(n) for n in nodes],
                     "solved_by": [known_by.get(n, run.id if keys is not None else None)
                                   for n in nodes]}, schema=DEPLOYMENT_KEYS_SCHEMA)


def changed_stations(arc: Archive, survey_id: int, old_run: str, new_run: str | None = None
                     ) -> pa.Table:
    """Rows of ``new_run`` (the newest by default) whose result key is not among those of
    ``old_run`` for the same station, occupation index and node: the stations a delivery
    of what changed would carry. Without keys in either run every row counts as changed."""
    a = deployment_keys(arc, survey_id, old_run)
    b = deployment_keys(arc, survey_id, new_run)
    if a["key"].null_count == a.num_rows or b["key"].null_count == b.num_rows:
        return b

    def ids(t: pa.Table) -> pa.Array:
        parts = [pc.cast(t[c], pa.string()) for c in ("line", "point", "index", "node", "key")]
        return pc.binary_join_element_wise(*[pc.fill_null(p, "") for p in parts], "|")

    return b.filter(pc.invert(pc.is_in(ids(b), value_set=ids(a).combine_chunks())))
