"""Incremental solving: a node's rows of an earlier run, reused while its inputs stand still.

Nodes are independent in the solver (windows, unlogged clusters and moves are found along
one node's track), so the rows of a node, before the run-wide error model finishes them
(:mod:`archive.solve.pooled`), are a function of that node's inputs alone. Its *result key*
is the SHA-256 of exactly those inputs:

- the node's fix objects, in load order (the overlap rule keeps the earlier file's fix);
- the node's deployment records (with their occupation numbers and whether a loaded log
  covers them, :mod:`archive.survey.harvest`);
- the point indices in use at the stations it occupied (a moved node's later part takes the
  next free one, :mod:`archive.solve.parts`);
- the exclude spans in force on the node;
- the stations table, the elevation model and its datum, the survey's CRS and height
  convention, the resolved parameters, the manifest format and the code version.

A run stores its unfinished rows (with the working columns of the pooled model) and a small
table of result keys (node, key, the run that solved those rows, counts), both named in its
summary. A later run whose key for a node matches a key of an earlier run takes that node's
rows from it and solves only the other nodes; then the whole table is sorted and finished
together, exactly as a run solved from scratch is. The survey-wide parts (the pooled error
model, hence every row's uncertainty) are therefore recomputed each time, and the positions
and manifest of an incremental run are those of a from-scratch solve bit for bit (the
manifest never says what was reused; the run summary does).
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive import __version__
from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json
from archive.store.models import Run

KEYS_SCHEMA = pa.schema([
    pa.field("node", pa.string(), nullable=False),
    pa.field("key", pa.string(), nullable=False),  # hex SHA-256 of the node's inputs
    pa.field("solved_by", pa.string(), nullable=False),  # run whose solve made the rows
], metadata={"nodekeep.table": "result_keys", "nodekeep.schema_version": "1"})
LOOK_BACK = 20
"""Earlier runs of the survey searched for reusable rows, newest first."""


def _rows_by(table: pa.Table, column: str) -> dict[str, list[dict[str, Any]]]:
    out: dict[str, list[dict[str, Any]]] = {}
    for r in table.to_pylist():  # one entry per deployment record, never per fix
        out.setdefault(str(r[column]), []).append(r)
    return out


def result_keys(inp: Any, manifest: dict[str, Any]) -> dict[str, str]:
    """node -> result key (module doc) of every node the run solves: each node with a fix
    object and each node of a deployment record."""
    common = canonical_hash({
        "format": manifest.get("format"), "survey": manifest["survey"],
        "stations": inp.stations_hash, "dem": inp.dem_hash, "dem_datum": inp.dem_datum,
        "params": manifest["params"], "code_version": manifest.get("code_version", __version__),
        "detect_unlogged": inp.detect_unlogged})
    fixes: dict[str, list[str]] = {}
    for node, h, _ in inp.fix_files:
        fixes.setdefault(node, []).append(h)
    deps = _rows_by(inp.deployments, "node")
    used: dict[tuple[float, float], list[dict[str, Any]]] = {}
    if inp.used is not None:
        for r in inp.used.to_pylist():  # one entry per point index in use
            if r.get("part_of", -1) < 0:  # as the keys of runs before parts were kept
                r.pop("part_of", None)
            used.setdefault((r["line"], r["point"]), []).append(r)
    spans: dict[str, list[dict[str, Any]]] = {}
    for e in manifest.get("edits") or []:
        spans.setdefault(str((e.get("payload") or {}).get("node")), []).append(e)
    out = {}
    for node in sorted(set(fixes) | set(deps)):
        rows = deps.get(node, [])
        stations = sorted({(r["line"], r["point"]) for r in rows})
        out[node] = canonical_hash({
            "common": common, "node": node, "fixes": fixes.get(node, []),
            "deployments": json.loads(canonical_json(rows)),
            "used": [used.get(s, []) for s in stations],
            "spans": sorted(spans.get(node, []), key=lambda e: e.get("id", 0))})
    return out


@dataclass
class Reuse:
    """Rows of earlier runs for the nodes whose keys match, and where each came from."""

    keys: dict[str, str]  # node -> key of this run
    rows: pa.Table | None = None  # unfinished rows of the reused nodes
    solved_by: dict[str, str] = field(default_factory=dict)  # reused node -> run that solved

    @property
    def nodes(self) -> set[str]:
        """Nodes whose rows are reused."""
        return set(self.solved_by)

    def keys_table(self, run_id: str) -> pa.Table:
        """This run's result keys: a reused node names the run that solved it."""
        nodes = sorted(self.keys)
        return pa.table({"node": nodes, "key": [self.keys[n] for n in nodes],
                         "solved_by": [self.solved_by.get(n, run_id) for n in nodes]},
                        schema=KEYS_SCHEMA)

    def summary(self) -> dict[str, Any]:
        """What the run summary says about reuse."""
        runs: dict[str, int] = {}
        for r in self.solved_by.values():
            runs[r] = runs.get(r, 0) + 1
        return {"nodes_solved": len(self.keys) - len(self.solved_by),
                "nodes_reused": len(self.solved_by), "reused_from": runs}


def _summary(run: Run) -> dict[str, Any]:
    return json.loads(run.summary or "{}")


def earlier_runs(arc: Archive, survey_id: int, limit: int = LOOK_BACK) -> list[Run]:
    """The survey's newest runs that stored result keys, newest first."""
    with arc.session() as s:
        runs = s.scalars(select(Run).where(Run.survey_id == survey_id)
                         .order_by(Run.created_at.desc(), Run.id).limit(limit * 3)).all()
    return [r for r in runs if _summary(r).get("results", {}).get("keys")][:limit]


def run_keys(arc: Archive, run: Run) -> pa.Table | None:
    """The run's result keys (node, key, solved_by), or None for a run without them (solved
    before incremental solving, by selection, or its objects are gone)."""
    h = _summary(run).get("results", {}).get("keys")
    if not h or not arc.objects.exists(h):
        return None
    return arc.objects.read_table(h)


def find_reuse(arc: Archive, survey_id: int, keys: dict[str, str]) -> Reuse:
    """The rows of earlier runs (newest first) whose result keys match ``keys``."""
    reuse = Reuse(keys)
    wanted = {k: n for n, k in keys.items()}
    pieces: list[pa.Table] = []
    for run in earlier_runs(arc, survey_id):
        if not wanted:
            break
        table = run_keys(arc, run)
        rows_h = _summary(run).get("results", {}).get("rows")
        if table is None or not rows_h or not arc.objects.exists(rows_h):
            continue
        hit = [(n, k, by) for n, k, by in zip(table["node"].to_pylist(), table["key"].to_pylist(),
                                              table["solved_by"].to_pylist(), strict=True)
               if k in wanted and wanted[k] == n]
        if not hit:
            continue
        nodes = [n for n, _, _ in hit]
        rows = arc.objects.read_table(rows_h)
        pieces.append(rows.filter(pc.is_in(rows["node"], value_set=pa.array(nodes, pa.string()))))
        for n, k, by in hit:
            reuse.solved_by[n] = by
            wanted.pop(k, None)
    if pieces:
        schema = pieces[0].schema
        reuse.rows = pa.concat_tables([p.cast(schema) for p in pieces])
    return reuse


def store_results(arc: Archive, unfinished: pa.Table, reuse: Reuse, run_id: str
                  ) -> tuple[dict[str, str], list[tuple[str, int, str]]]:
    """Store the run's unfinished rows and result keys; returns the summary entry and the
    objects to register (hash, size, kind) in the run's transaction."""
    rows_h, rows_size = arc.objects.put_table(unfinished)
    keys_h, keys_size = arc.objects.put_table(reuse.keys_table(run_id))
    return ({"rows": rows_h, "keys": keys_h},
            [(rows_h, rows_size, "solve-rows"), (keys_h, keys_size, "result-keys")])


def changed_nodes(old: Iterable[tuple[str, str]], new: dict[str, str]) -> dict[str, list[str]]:
    """Nodes whose result key differs between an earlier run's keys ``old`` (node, key) and
    ``new``: ``changed`` (both have the node), ``added`` and ``removed``."""
    before = dict(old)
    return {"changed": sorted(n for n in new if n in before and before[n] != new[n]),
            "added": sorted(n for n in new if n not in before),
            "removed": sorted(n for n in before if n not in new)}


def solved_by(arc: Archive, run: Run, nodes: Iterable[str]) -> dict[str, str]:
    """node -> id of the run whose solve made that node's rows in ``run``: the run itself,
    or the earlier run its rows were reused from (runs without result keys: itself)."""
    table = run_keys(arc, run)
    known = (dict(zip(table["node"].to_pylist(), table["solved_by"].to_pylist(), strict=True))
             if table is not None else {})
    return {str(n): known.get(str(n), run.id) for n in nodes}
