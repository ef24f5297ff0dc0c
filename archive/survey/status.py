"""Where a survey stands in the crew's daily loop, from the catalog alone.

:func:`harvest_status` answers the questions of a morning meeting: which deployments still
await harvest (no loaded log of their node covers them, :mod:`archive.survey.harvest`),
which logged nodes have no deployment record, and how many logs, nodes and fixes are
loaded. It reads the catalog's rows of raw files (node, fix count, first and last fix time)
and the current deployment log table, never a fix table, so it answers in well under a
second on an archive of any size: the cost grows with the number of raw files and
deployment records, not with the fixes.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.models import RawFile
from archive.survey.harvest import OPEN, covered
from archive.survey.inputs import current_input
from archive.survey.occupations import with_occupations
from archive.times import us_array


def plain_rows(arc: Archive, sql: str) -> list[tuple[Any, ...]]:
    """Rows of ``sql`` as plain tuples from the database driver (no per-row result objects:
    several times faster on the tens of thousands of raw-file rows of a month's logs).
    ``sql`` takes no parameters; callers put only integers into it."""
    with arc.engine.connect() as conn:
        cursor = conn.connection.driver_connection.cursor()
        try:
            cursor.execute(sql)
            return list(cursor.fetchall())
        finally:
            cursor.close()


def _times_us(values: list[Any]) -> np.ndarray:
    """Catalog times (aware datetimes from PostgreSQL, naive UTC ISO text from SQLite) as
    integer microseconds since 1970 UTC, vectorised; unknown times as :data:`OPEN`."""
    if not values:
        return np.zeros(0, dtype=np.int64)
    if any(isinstance(v, str) for v in values):
        text = pa.array(values, pa.string())
        try:
            t = text.cast(pa.timestamp("us"))
        except pa.ArrowInvalid:  # text with a zone offset
            t = pa.array([None if v is None else datetime.fromisoformat(v) for v in values],
                         pa.timestamp("us", tz="UTC"))
    else:
        t = pa.array(values, pa.timestamp("us", tz="UTC"))
    return pc.fill_null(t.cast(pa.int64()), OPEN).to_numpy()


def catalog_counts(arc: Archive, survey_id: int) -> dict[str, Any]:
    """Raw files, those parsed into fixes, distinct nodes, fixes (and those usable), bytes
    received, the first and last fix time loaded and when the last log came in: one
    aggregate query over the catalog."""
    with arc.session() as s:
        row = s.execute(select(
            func.count(RawFile.id), func.count(RawFile.fixes_hash),
            func.count(func.distinct(RawFile.node)), func.coalesce(func.sum(RawFile.n_fixes), 0),
            func.coalesce(func.sum(RawFile.n_valid), 0), func.coalesce(func.sum(RawFile.size), 0),
            func.min(RawFile.t_first), func.max(RawFile.t_last), func.max(RawFile.received_at))
            .where(RawFile.survey_id == survey_id)).one()
    return {"n_logs": int(row[0]), "n_logs_with_fixes": int(row[1]), "n_nodes": int(row[2]),
            "n_fixes": int(row[3]), "n_usable_fixes": int(row[4]), "bytes": int(row[5]),
            "first_fix": row[6], "last_fix": row[7], "last_received": row[8]}


def parsed_logs(arc: Archive, survey_id: int) -> list[tuple[Any, ...]]:
    """The catalog's rows of the survey's logs parsed into fixes, as plain tuples
    ``(node, n_fixes, t_first, t_last, fixes_hash)``: what :func:`harvest_status` reads, and
    what a caller comparing loaded fix tables with a run's may share with it."""
    return plain_rows(arc, "SELECT node, n_fixes, t_first, t_last, fixes_hash FROM raw_files "
                           f"WHERE survey_id = {int(survey_id)} AND fixes_hash IS NOT NULL")


def harvest_status(arc: Archive, survey_id: int, limit: int | None = None,
                   logs: list[tuple[Any, ...]] | None = None) -> dict[str, Any]:
    """The survey's harvest state (module doc) as plain data:

    - ``counts``: :func:`catalog_counts`, plus deployment records and nodes deployed, and
      the deployments awaiting harvest and their distinct nodes (``n_awaiting``,
      ``n_awaiting_nodes``);
    - ``awaiting``: each deployment no loaded log covers (line, point, occupation index,
      node, deployed, retrieved), in the order of the deployment log; the first ``limit``
      of them when a limit is given (a screen lists a few, the counts say how many);
    - ``nodes_without_deployment``: nodes with a loaded log but no deployment record (a
      serial typed wrong in the log, or a node not yet entered), with their log and fix
      counts.

    The raw-file rows (``logs``: :func:`parsed_logs`, read here when not given) are plain
    tuples handled column-wise: 20,000 nodes with five logs each take a fraction of a
    second (bench/status.py).
    """
    counts = catalog_counts(arc, survey_id)
    if logs is None:
        logs = parsed_logs(arc, survey_id)
    log_node = pa.array([r[0] for r in logs], pa.string())
    log_fixes = pa.array([r[1] or 0 for r in logs], pa.int64())
    found = current_input(arc, survey_id, "deployments")
    dep = with_occupations(found[1]) if found is not None and found[1] is not None else None
    awaiting: list[dict[str, Any]] = []
    deployed_nodes = pa.array([], pa.string())
    n_awaiting = n_awaiting_nodes = 0
    if dep is not None and dep.num_rows:
        nodes = dep["node"].combine_chunks().cast(pa.string())
        deployed_nodes = pc.unique(nodes)
        ok = covered(nodes, us_array(dep["deployed"], OPEN),
                     us_array(dep["retrieved"], OPEN), log_node,
                     _times_us([r[2] for r in logs]), _times_us([r[3] for r in logs]))
        waiting = np.flatnonzero(~ok)
        n_awaiting = len(waiting)
        n_awaiting_nodes = len(pc.unique(nodes.take(waiting)))
        rows = dep.select(["line", "point", "occupation", "node", "deployed", "retrieved"])
        for r in rows.take(waiting[:limit]).to_pylist():  # one per deployment listed
            awaiting.append({"line": r["line"], "point": r["point"], "index": r["occupation"],
                             "node": r["node"], "deployed": r["deployed"],
                             "retrieved": r["retrieved"]})
    stray = pc.and_(pc.invert(pc.is_in(log_node, value_set=deployed_nodes)),
                    pc.is_valid(log_node))
    coded = pc.dictionary_encode(log_node.filter(stray))  # a few strays among many logs
    per_node = coded.indices.to_numpy(zero_copy_only=False)
    names = coded.dictionary.to_pylist()
    n_logs = np.bincount(per_node, minlength=len(names))
    n_fixes = np.bincount(per_node, weights=log_fixes.filter(stray).to_numpy(),
                          minlength=len(names))
    counts |= {"n_deployments": dep.num_rows if dep is not None else 0,
               "n_nodes_deployed": len(deployed_nodes), "n_awaiting": n_awaiting,
               "n_awaiting_nodes": n_awaiting_nodes}
    return {"counts": counts, "awaiting": awaiting,
            "nodes_without_deployment": [
                {"node": names[k], "n_logs": int(n_logs[k]), "n_fixes": int(n_fixes[k])}
                for k in sorted(range(len(names)), key=names.__getitem__)]}
