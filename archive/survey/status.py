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

from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
from sqlalchemy import func, select

from archive.store.archive import Archive
from archive.store.models import RawFile
from archive.survey.harvest import OPEN, covered
from archive.survey.inputs import current_input
from archive.survey.occupations import EPOCH, with_occupations
from archive.times import us_array


def _us(t: datetime | None) -> int:
    if t is None:
        return OPEN
    if t.tzinfo is None:
        t = t.replace(tzinfo=UTC)
    return (t - EPOCH) // timedelta(microseconds=1)


def catalog_counts(arc: Archive, survey_id: int) -> dict[str, Any]:
    """Raw files, those parsed into fixes, distinct nodes, fixes and the first and last fix
    time loaded: one aggregate query over the catalog."""
    with arc.session() as s:
        row = s.execute(select(
            func.count(RawFile.id), func.count(RawFile.fixes_hash),
            func.count(func.distinct(RawFile.node)), func.coalesce(func.sum(RawFile.n_fixes), 0),
            func.min(RawFile.t_first), func.max(RawFile.t_last))
            .where(RawFile.survey_id == survey_id)).one()
    return {"n_logs": int(row[0]), "n_logs_with_fixes": int(row[1]), "n_nodes": int(row[2]),
            "n_fixes": int(row[3]), "first_fix": row[4], "last_fix": row[5]}


def harvest_status(arc: Archive, survey_id: int) -> dict[str, Any]:
    """The survey's harvest state (module doc) as plain data:

    - ``counts``: :func:`catalog_counts`, plus deployment records and nodes deployed;
    - ``awaiting``: each deployment no loaded log covers (line, point, occupation index,
      node, deployed, retrieved), in the order of the deployment log;
    - ``nodes_without_deployment``: nodes with a loaded log but no deployment record (a
      serial typed wrong in the log, or a node not yet entered), with their log and fix
      counts.
    """
    counts = catalog_counts(arc, survey_id)
    with arc.session() as s:
        logs = s.execute(select(RawFile.node, RawFile.n_fixes, RawFile.t_first, RawFile.t_last)
                         .where(RawFile.survey_id == survey_id,
                                RawFile.fixes_hash.is_not(None))).all()
    found = current_input(arc, survey_id, "deployments")
    dep = with_occupations(found[1]) if found is not None and found[1] is not None else None
    awaiting: list[dict[str, Any]] = []
    deployed_nodes: set[str] = set()
    if dep is not None and dep.num_rows:
        nodes = np.array(dep["node"].to_pylist(), dtype=object)
        deployed_nodes = set(nodes.tolist())
        ok = covered(nodes, us_array(dep["deployed"], OPEN), us_array(dep["retrieved"], OPEN),
                     np.array([r[0] for r in logs], dtype=object),
                     np.array([_us(r[2]) for r in logs], dtype=np.int64),
                     np.array([_us(r[3]) for r in logs], dtype=np.int64))
        rows = dep.select(["line", "point", "occupation", "node", "deployed", "retrieved"])
        waiting = np.flatnonzero(~ok)
        for r in rows.take(waiting).to_pylist():  # one entry per deployment record
            awaiting.append({"line": r["line"], "point": r["point"], "index": r["occupation"],
                             "node": r["node"], "deployed": r["deployed"],
                             "retrieved": r["retrieved"]})
    orphans: dict[str, dict[str, int]] = {}
    for node, n, _, _ in logs:  # one entry per raw file
        if node not in deployed_nodes:
            o = orphans.setdefault(node, {"n_logs": 0, "n_fixes": 0})
            o["n_logs"] += 1
            o["n_fixes"] += int(n or 0)
    counts |= {"n_deployments": dep.num_rows if dep is not None else 0,
               "n_nodes_deployed": len(deployed_nodes), "n_awaiting": len(awaiting)}
    return {"counts": counts, "awaiting": awaiting,
            "nodes_without_deployment": [{"node": k, **v} for k, v in sorted(orphans.items())]}
