"""Occupations: each deployment of a node at a station, and the point index it is delivered under.

A station (line, point, point index of the preplot) may be occupied any number of times over
a survey: a node re-laid after the spread rolls back, a replacement after a failure, a node
re-deployed after a flood. Every occupation is one record of the deployment log, and each is
delivered as its own receiver position under its own SPS point index (SPS rev 2.1 uses the
point index to tell apart different positions of one point), so (line, point, index) is a
unique key in every delivery.

Numbering (the ``occupation`` column of the deployments table, see
:data:`archive.survey.schema.DEPLOYMENT_SCHEMA`), per (line, point), in order of deployment
time (ties by the record's line in the log):

1. an occupation that continues one of the previous deployments version keeps the index it
   had there (matched at the same station by, in turn: same node with overlapping windows,
   overlapping windows, same node);
2. any other occupation takes its station's own point index when no occupation at that line
   and point holds it yet (the first occupation of a station is delivered under the preplot's
   index);
3. otherwise it takes the next index above every index already used at that line and point
   (by this version, by the previous version, and by the station indices of the log there).

So numbers follow deployment time, a later occupation never renumbers an earlier one, and a
corrected log (a serial or a time fixed, a forgotten deployment added) keeps every index
already given. The index is stored with the deployments version when it is loaded, so runs
and deliveries read it from the deployment data, never from the order of a run. A
deployments table written before occupations were numbered has no such column:
:func:`with_occupations` numbers it by the same rule without a previous version.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

OPEN_END = np.iinfo(np.int64).max  # retrieved unknown: still in the ground
MAX_INDEX = 127  # int8; SPS rev 2.1 can write 1-9 (column 24, I1)
SPS_MAX_INDEX = 9


@dataclass
class Records:
    """Deployment records as parallel arrays (times in µs, ``OPEN_END`` when still out)."""

    line: np.ndarray
    point: np.ndarray
    index: np.ndarray
    node: np.ndarray
    start: np.ndarray
    end: np.ndarray
    order: np.ndarray  # tie-break among equal start times (the record's line in its file)

    def __len__(self) -> int:
        return len(self.start)

    @classmethod
    def of(cls, table: pa.Table) -> Records:
        """The records of a deployments table (:data:`DEPLOYMENT_SCHEMA`)."""
        n = table.num_rows
        start = pc.cast(table["deployed"], pa.int64()).to_numpy(zero_copy_only=False)
        end = pc.fill_null(pc.cast(table["retrieved"], pa.int64()), OPEN_END)
        order = (table["src_line"].to_numpy() if "src_line" in table.column_names
                 else np.arange(n))
        return cls(line=table["line"].to_numpy().astype(np.float64),
                   point=table["point"].to_numpy().astype(np.float64),
                   index=table["index"].to_numpy().astype(np.int64),
                   node=np.array(table["node"].to_pylist(), dtype=object),
                   start=np.asarray(start, dtype=np.int64),
                   end=end.to_numpy(zero_copy_only=False).astype(np.int64),
                   order=np.asarray(order, dtype=np.int64))


def _overlap(a0: int, a1: int, b0: int, b1: int) -> int:
    return max(0, min(a1, b1) - max(a0, b0))


def _number_group(new: list[int], rec: Records, prev: list[int], prec: Records | None,
                  prev_occ: np.ndarray | None, out: np.ndarray) -> None:
    """Number the records ``new`` (indices into ``rec``, in time order) of one line/point."""
    taken: set[int] = set()  # previous records already matched
    kept: dict[int, int] = {}
    if prec is not None and prev:
        tests = (
            lambda i, j: rec.node[i] == prec.node[j] and _overlap(
                rec.start[i], rec.end[i], prec.start[j], prec.end[j]) > 0,
            lambda i, j: _overlap(rec.start[i], rec.end[i], prec.start[j], prec.end[j]) > 0,
            lambda i, j: rec.node[i] == prec.node[j],
        )
        for test in tests:
            for i in new:
                if i in kept:
                    continue
                cands = [j for j in prev if j not in taken and prec.index[j] == rec.index[i]
                         and test(i, j)]
                if not cands:
                    continue
                best = max(cands, key=lambda j: (_overlap(rec.start[i], rec.end[i],
                                                          prec.start[j], prec.end[j]),
                                                 -abs(int(prec.start[j]) - int(rec.start[i]))))
                kept[i] = int(prev_occ[best])
                taken.add(best)
    used = set(kept.values())
    before = {int(prev_occ[j]) for j in prev} if prev_occ is not None else set()
    reserved = {int(rec.index[i]) for i in new}
    for i in new:
        if i in kept:
            out[i] = kept[i]
            continue
        own = int(rec.index[i])
        if own not in used and own not in before:
            k = own
        else:
            k = max(used | before | reserved) + 1
        used.add(k)
        out[i] = k


def number_occupations(rec: Records, prev: Records | None = None,
                       prev_occ: np.ndarray | None = None) -> np.ndarray:
    """The delivered point index of every record (see the module doc), as int64.

    ``prev``/``prev_occ`` are the previous deployments version and its indices (None for a
    first version). Only lines/points with more than one record, or whose previous numbering
    differs from the station index, are numbered one by one; the rest keep their station's
    index.
    """
    n = len(rec)
    out = rec.index.astype(np.int64).copy()
    if n == 0:
        return out
    key = pd.MultiIndex.from_arrays([rec.line, rec.point])
    codes = pd.factorize(key)[0]
    count = np.bincount(codes)
    busy = count[codes] > 1
    prev_groups: dict[tuple[float, float], list[int]] = {}
    if prev is not None and len(prev):
        assert prev_occ is not None
        pkey = list(zip(prev.line.tolist(), prev.point.tolist(), strict=True))
        for j, k in enumerate(pkey):
            prev_groups.setdefault(k, []).append(j)
        odd = {k for k, js in prev_groups.items()
               if len(js) > 1 or any(int(prev_occ[j]) != int(prev.index[j]) for j in js)}
        if odd:
            busy |= np.array([(a, b) in odd for a, b in zip(rec.line.tolist(),
                                                             rec.point.tolist(),
                                                             strict=True)], dtype=bool)
    todo = np.flatnonzero(busy)
    if len(todo) == 0:
        return out
    todo = todo[np.lexsort((rec.order[todo], rec.start[todo], rec.point[todo], rec.line[todo]))]
    groups: dict[tuple[float, float], list[int]] = {}
    for i in todo.tolist():  # one entry per re-occupied line/point, not per fix
        groups.setdefault((float(rec.line[i]), float(rec.point[i])), []).append(i)
    for k, members in groups.items():
        _number_group(members, rec, prev_groups.get(k, []), prev, prev_occ, out)
    return out


def occupation_array(table: pa.Table) -> np.ndarray:
    """The ``occupation`` column of a deployments table, or its numbering when it has none."""
    if "occupation" in table.column_names:
        return table["occupation"].to_numpy().astype(np.int64)
    return number_occupations(Records.of(table))


def with_occupations(table: pa.Table, previous: pa.Table | None = None) -> pa.Table:
    """``table`` (deployments) with its ``occupation`` column, numbered against ``previous``.

    A table that already carries the column is returned as it is. ``previous`` is the
    deployments version this one follows (None for the first).
    """
    from archive.survey.schema import DEPLOYMENT_SCHEMA

    if "occupation" in table.column_names:
        return table
    prev = prev_occ = None
    if previous is not None and previous.num_rows:
        prev, prev_occ = Records.of(previous), occupation_array(previous)
    occ = number_occupations(Records.of(table), prev, prev_occ)
    if len(occ) and int(occ.max()) > MAX_INDEX:
        raise ValueError(f"more than {MAX_INDEX} occupations at one line and point")
    cols = [table[f.name] if f.name != "occupation" else pa.array(occ, pa.int8())
            for f in DEPLOYMENT_SCHEMA]
    return pa.Table.from_arrays(cols, schema=DEPLOYMENT_SCHEMA)


def occupation_warnings(table: pa.Table) -> list[dict[str, Any]]:
    """Warnings about the numbering: an index SPS rev 2.1 cannot write (above 9)."""
    from archive.survey.parsed import problem

    occ = occupation_array(table)
    over = np.flatnonzero(occ > SPS_MAX_INDEX)
    line, point = table["line"].to_numpy(), table["point"].to_numpy()
    src = table["src_line"].to_numpy()
    return [problem("index-beyond-sps", f"station {line[i]:g}/{point[i]:g} is occupied so often "
                    f"that this occupation gets point index {occ[i]}; SPS rev 2.1 writes 1-9, "
                    "so deliver it as CSV or GIS", int(src[i])) for i in over]


def occupation_summary(table: pa.Table) -> dict[str, int]:
    """How many occupations, stations (line/point) occupied more than once, and top index."""
    if table.num_rows == 0:
        return {"occupations": 0, "reoccupied": 0, "max_index": 0}
    key = pd.MultiIndex.from_arrays([table["line"].to_numpy(), table["point"].to_numpy()])
    counts = np.bincount(pd.factorize(key)[0])
    return {"occupations": table.num_rows, "reoccupied": int((counts > 1).sum()),
            "max_index": int(occupation_array(table).max())}


def occupations_at(table: pa.Table, line: float, point: float) -> list[dict[str, Any]]:
    """Every occupation at (line, point) of a deployments table, oldest first, as dicts with
    ``index`` (delivered point index), ``station_index``, ``node``, ``deployed``,
    ``retrieved`` (None while still out) and ``src_line``."""
    mask = pc.and_(pc.equal(table["line"], float(line)), pc.equal(table["point"], float(point)))
    sub = table.filter(mask)
    occ = occupation_array(table)[np.asarray(mask.to_numpy(zero_copy_only=False), dtype=bool)]
    rows = sub.to_pylist()
    out = [{"index": int(o), "station_index": int(r["index"]), "node": r["node"],
            "deployed": r["deployed"], "retrieved": r["retrieved"], "src_line": r["src_line"]}
           for r, o in zip(rows, occ.tolist(), strict=True)]
    return sorted(out, key=lambda d: (d["deployed"], d["src_line"]))


def window_text(o: dict[str, Any]) -> str:
    """'index 2: node 310004, 2025-04-08T10:00:00Z to 2025-04-09T08:00:00Z' for one
    occupation dict (as :func:`occupations_at` gives, or a delivered row)."""
    def t(v: Any) -> str:
        return "still deployed" if v is None else v.strftime("%Y-%m-%dT%H:%M:%SZ")

    return f"index {o['index']}: node {o['node']}, {t(o['deployed'])} to {t(o['retrieved'])}"


def choose(occupations: Sequence[dict[str, Any]], index: int | None, node: str | None
           ) -> list[dict[str, Any]]:
    """The occupations matching ``index`` and/or ``node`` (all of them when both are None)."""
    out = list(occupations)
    if index is not None:
        out = [o for o in out if o["index"] == int(index)]
    if node is not None:
        out = [o for o in out if str(o["node"]) == str(node)]
    return out


def current_occupations(arc: Any, survey_id: int, line: float, point: float
                        ) -> tuple[Any, list[dict[str, Any]]]:
    """The current deployments version (or None) and its occupations at (line, point)."""
    from archive.survey.inputs import current_input

    found = current_input(arc, survey_id, "deployments")
    if found is None or found[1] is None:
        return None, []
    return found[0], occupations_at(found[1], line, point)


def listing(occupations: Sequence[dict[str, Any]]) -> str:
    """'index 1: node 310002, ... ; index 2: node 310004, ...' for a refusal message."""
    return "; ".join(window_text(o) for o in occupations)


def pick_one(occupations: Sequence[dict[str, Any]], line: float, point: float,
             index: int | None, node: str | None, *, what: str) -> dict[str, Any] | None:
    """The one occupation of (line, point) that ``index``/``node`` name, for an edit.

    None when the station has no occupation at all (never deployed). :class:`UsageError`,
    listing the occupations, when several match (none chosen, or a node deployed there
    twice) or none does: an edit never lands on more than one occupation.
    """
    from archive.errors import UsageError

    where = f"station {line:g}/{point:g}"
    if not occupations:
        if node is not None:
            raise UsageError(f"no node was deployed at {where}, so --node {node} names no "
                             "occupation there", hint="check the line, point and serial")
        return None
    chosen = choose(occupations, index, node)
    if len(chosen) == 1:
        return chosen[0]
    if not chosen:
        asked = " and ".join(x for x in (f"index {index}" if index is not None else "",
                                         f"node {node}" if node is not None else "") if x)
        raise UsageError(f"{where} has no occupation with {asked}; its occupations: "
                         f"{listing(occupations)}",
                         hint="choose one with --index N or --node SERIAL")
    raise UsageError(f"{where} was occupied {len(chosen)} times and {what} must name one "
                     f"occupation: {listing(chosen)}",
                     hint="choose one with --index N or --node SERIAL")
