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

1. an occupation that continues an earlier one keeps the index it had: the earlier ones are
   the previous deployments version's records, then those retired before (see 4), matched
   at the same station by, in turn: same node with overlapping windows, overlapping
   windows, same node;
2. any other occupation takes its station's own point index when no occupation at that line
   and point holds it and none ever held it (the first occupation of a station is delivered
   under the preplot's index);
3. otherwise it takes the next index above every index used at that line and point: by this
   version, by any earlier occupation, by the station indices of the log there, and by the
   point indices the current preplot has there (so a second occupation of 1001/5002 index 1
   never takes index 2 when the preplot holds a 1001/5002 index 2);
4. an earlier occupation the new log no longer holds (a record removed as a mistake) is
   *retired*: kept with the version's meta with the index it had, which is never given to
   another occupation; should the record come back, it gets its index back.

So numbers follow deployment time, a later occupation never renumbers an earlier one, and a
corrected log (a serial or a time fixed, a forgotten deployment added, a record removed and
restored) keeps every index already given and never reuses one. The index is stored with
the deployments version when it is loaded, so runs and deliveries read it from the
deployment data, never from the order of a run. A deployments table written before
occupations were numbered has no such column: :func:`with_occupations` numbers it by the
same rule without any earlier version.
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime, timedelta
from typing import Any

import numpy as np
import pyarrow as pa

from archive.survey.keys import station_mask, station_text
from archive.times import us_array

OPEN_END = np.iinfo(np.int64).max  # retrieved unknown: still in the ground
EPOCH = datetime(1970, 1, 1, tzinfo=UTC)
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
        order = (table["src_line"].to_numpy() if "src_line" in table.column_names
                 else np.arange(n))
        return cls(line=table["line"].to_numpy().astype(np.float64),
                   point=table["point"].to_numpy().astype(np.float64),
                   index=table["index"].to_numpy().astype(np.int64),
                   node=np.array(table["node"].to_pylist(), dtype=object),
                   start=us_array(table["deployed"], OPEN_END),
                   end=us_array(table["retrieved"], OPEN_END),
                   order=np.asarray(order, dtype=np.int64))


def _overlap(a0: int, a1: int, b0: int, b1: int) -> int:
    return max(0, min(a1, b1) - max(a0, b0))


def _records_of(rows: Sequence[dict[str, Any]]) -> Records:
    """Records from retired-occupation dicts (as the version meta keeps them)."""
    def us(v: Any) -> int:
        if v is None:
            return OPEN_END
        t = datetime.fromisoformat(str(v)) if not isinstance(v, datetime) else v
        return (t - EPOCH) // timedelta(microseconds=1)

    return Records(line=np.array([float(r["line"]) for r in rows], dtype=np.float64),
                   point=np.array([float(r["point"]) for r in rows], dtype=np.float64),
                   index=np.array([int(r["station_index"]) for r in rows], dtype=np.int64),
                   node=np.array([str(r["node"]) for r in rows], dtype=object),
                   start=np.array([us(r["deployed"]) for r in rows], dtype=np.int64),
                   end=np.array([us(r["retrieved"]) for r in rows], dtype=np.int64),
                   order=np.arange(len(rows), dtype=np.int64))


def _concat(a: Records, b: Records) -> Records:
    return Records(*(np.concatenate([getattr(a, f), getattr(b, f)])
                     for f in Records.__dataclass_fields__))


def _number_group(new: list[int], rec: Records, earlier: list[int], erec: Records | None,
                  eocc: np.ndarray | None, is_retired: np.ndarray | None, reserved: set[int],
                  out: np.ndarray, matched: np.ndarray, later: frozenset[int] = frozenset()) -> None:
    """Number the records ``new`` (indices into ``rec``, in time order) of one line/point
    against the ``earlier`` occupations there (indices into ``erec``); ``later`` holds the
    indices moved nodes' later parts were delivered under there, which no new occupation
    takes, not even as its own station index."""
    taken: set[int] = set()
    kept: dict[int, int] = {}
    if erec is not None and earlier:
        tests = (
            lambda i, j: rec.node[i] == erec.node[j] and _overlap(
                rec.start[i], rec.end[i], erec.start[j], erec.end[j]) > 0,
            lambda i, j: _overlap(rec.start[i], rec.end[i], erec.start[j], erec.end[j]) > 0,
            lambda i, j: rec.node[i] == erec.node[j],
        )
        for test in tests:
            for i in new:
                if i in kept:
                    continue
                cands = [j for j in earlier if j not in taken
                         and erec.index[j] == rec.index[i] and test(i, j)]
                if not cands:
                    continue
                best = max(cands, key=lambda j: (
                    not is_retired[j],  # the previous version first, then retired ones
                    _overlap(rec.start[i], rec.end[i], erec.start[j], erec.end[j]),
                    -abs(int(erec.start[j]) - int(rec.start[i]))))
                kept[i] = int(eocc[best])
                taken.add(best)
                matched[best] = True
    used = set(kept.values())
    before = {int(eocc[j]) for j in earlier} if eocc is not None else set()
    taken_idx = used | before | reserved | set(later) | {int(rec.index[i]) for i in new}
    for i in new:
        if i in kept:
            out[i] = kept[i]
            continue
        own = int(rec.index[i])
        k = (own if own not in used and own not in before and own not in later
             else max(taken_idx) + 1)
        used.add(k)
        taken_idx.add(k)
        out[i] = k


@dataclass
class Numbering:
    """The point index of every record, and which earlier occupations it continued."""

    occupation: np.ndarray  # int64, one per record
    continued: np.ndarray  # bool, one per earlier occupation: matched by a record


def station_codes(line: np.ndarray, point: np.ndarray) -> np.ndarray:
    """One integer per record, the same for records of the same (line, point)."""
    pairs = np.column_stack([np.asarray(line, dtype=np.float64),
                             np.asarray(point, dtype=np.float64)])
    return np.unique(pairs, axis=0, return_inverse=True)[1].reshape(-1)


def number_occupations(rec: Records, earlier: Records | None = None,
                       earlier_occ: np.ndarray | None = None, *,
                       retired: np.ndarray | None = None,
                       reserved: dict[tuple[float, float], set[int]] | None = None,
                       later: dict[tuple[float, float], set[int]] | None = None
                       ) -> Numbering:
    """The delivered point index of every record (see the module doc).

    ``earlier``/``earlier_occ`` are the occupations numbered before (the previous version's
    records, then the retired ones, ``retired`` marking those) with their indices; an index
    any of them held is never given to a new occupation. ``reserved`` holds the point
    indices the preplot uses at each (line, point), which a later occupation never takes;
    ``later`` those moved nodes' later parts were delivered under, which no occupation
    takes (a record whose own index is one of them is numbered above them).
    Only lines/points with more than one record, or with an earlier numbering other than
    the station index, are numbered one by one; the rest keep their station's index.
    """
    n = len(rec)
    out = rec.index.astype(np.int64).copy()
    n_earlier = len(earlier) if earlier is not None else 0
    continued = np.zeros(n_earlier, dtype=bool)
    if n == 0:
        return Numbering(out, continued)
    codes = station_codes(rec.line, rec.point)
    busy = np.bincount(codes)[codes] > 1
    groups_earlier: dict[tuple[float, float], list[int]] = {}
    if n_earlier:
        assert earlier is not None and earlier_occ is not None
        for j, k in enumerate(zip(earlier.line.tolist(), earlier.point.tolist(), strict=True)):
            groups_earlier.setdefault(k, []).append(j)
        odd = {k for k, js in groups_earlier.items()
               if len(js) > 1 or any(int(earlier_occ[j]) != int(earlier.index[j]) for j in js)}
        if odd:
            busy |= np.array([(a, b) in odd for a, b in zip(rec.line.tolist(),
                                                             rec.point.tolist(),
                                                             strict=True)], dtype=bool)
    if later:  # a record whose own index a delivered later part holds is numbered too
        busy |= np.array([int(k) in later.get((float(a), float(b)), ())
                          for a, b, k in zip(rec.line.tolist(), rec.point.tolist(),
                                             rec.index.tolist(), strict=True)], dtype=bool)
    todo = np.flatnonzero(busy)
    if len(todo):
        todo = todo[np.lexsort((rec.order[todo], rec.start[todo], rec.point[todo],
                                rec.line[todo]))]
        groups: dict[tuple[float, float], list[int]] = {}
        for i in todo.tolist():  # one entry per re-occupied line/point, not per fix
            groups.setdefault((float(rec.line[i]), float(rec.point[i])), []).append(i)
        is_ret = retired if retired is not None else np.zeros(n_earlier, dtype=bool)
        for k, members in groups.items():
            _number_group(members, rec, groups_earlier.get(k, []), earlier, earlier_occ,
                          is_ret, (reserved or {}).get(k, set()), out, continued,
                          frozenset((later or {}).get(k, ())))
    if n_earlier:  # a single record that keeps its station index continues its match
        lone = np.flatnonzero(~busy)
        if len(lone):
            for i in lone.tolist():
                for j in groups_earlier.get((float(rec.line[i]), float(rec.point[i])), []):
                    if int(earlier_occ[j]) == int(out[i]):
                        continued[j] = True
    return Numbering(out, continued)


def occupation_array(table: pa.Table) -> np.ndarray:
    """The ``occupation`` column of a deployments table, or its numbering when it has none."""
    if "occupation" in table.column_names:
        return table["occupation"].to_numpy().astype(np.int64)
    return number_occupations(Records.of(table)).occupation


def _table_with(table: pa.Table, occ: np.ndarray) -> pa.Table:
    from archive.survey.schema import DEPLOYMENT_SCHEMA

    if len(occ) and int(occ.max()) > MAX_INDEX:
        raise ValueError(f"more than {MAX_INDEX} occupations at one line and point")
    cols = [table[f.name] if f.name != "occupation" else pa.array(occ, pa.int8())
            for f in DEPLOYMENT_SCHEMA]
    return pa.Table.from_arrays(cols, schema=DEPLOYMENT_SCHEMA)


def with_occupations(table: pa.Table) -> pa.Table:
    """``table`` (deployments) with its ``occupation`` column: as stored, or numbered by the
    rule without any earlier version (a table stored before occupations were numbered)."""
    if "occupation" in table.column_names:
        return table
    return _table_with(table, number_occupations(Records.of(table)).occupation)


def _by_station(entries: Iterable[tuple[Any, Any, Any]]) -> dict[tuple[float, float], set[int]]:
    """The point indices of (line, point, index) entries, gathered per line and point."""
    out: dict[tuple[float, float], set[int]] = {}
    for a, b, k in entries:
        out.setdefault((float(a), float(b)), set()).add(int(k))
    return out


def number_log(table: pa.Table, previous: pa.Table | None = None,
               retired: Sequence[dict[str, Any]] = (),
               preplot: pa.Table | None = None,
               later_parts: Sequence[dict[str, Any]] = ()
               ) -> tuple[pa.Table, list[dict[str, Any]]]:
    """A newly read deployment log with its ``occupation`` column numbered against the
    previous version (``previous``) and the occupations retired before (``retired``, as the
    previous version's meta keeps them), keeping clear of the point indices the ``preplot``
    uses and of those moved nodes' later parts have been delivered under (``later_parts``:
    line, point, occupation, index). Returns the table and the retired occupations to keep
    with it: every earlier occupation this log no longer holds, with the index it had
    (never given out again)."""
    rec = Records.of(table)
    parts, occs, flags = [], [], []
    if previous is not None and previous.num_rows:
        parts.append(Records.of(previous))
        occs.append(occupation_array(previous))
        flags.append(np.zeros(previous.num_rows, dtype=bool))
    if retired:
        parts.append(_records_of(retired))
        occs.append(np.array([int(r["index"]) for r in retired], dtype=np.int64))
        flags.append(np.ones(len(retired), dtype=bool))
    earlier = earlier_occ = is_retired = None
    if parts:
        earlier = parts[0] if len(parts) == 1 else _concat(parts[0], parts[1])
        earlier_occ, is_retired = np.concatenate(occs), np.concatenate(flags)
    reserved = _by_station(zip(preplot["line"].to_pylist(), preplot["point"].to_pylist(),
                               preplot["index"].to_pylist(), strict=True)
                           if preplot is not None else ())
    later = _by_station((p["line"], p["point"], p["index"]) for p in later_parts)
    numbered = number_occupations(rec, earlier, earlier_occ, retired=is_retired,
                                  reserved=reserved, later=later)
    gone: list[dict[str, Any]] = []
    if earlier is not None:
        for j in np.flatnonzero(~numbered.continued).tolist():
            gone.append({"line": float(earlier.line[j]), "point": float(earlier.point[j]),
                         "station_index": int(earlier.index[j]), "index": int(earlier_occ[j]),
                         "node": str(earlier.node[j]), "deployed": _iso(earlier.start[j]),
                         "retrieved": _iso(earlier.end[j])})
    return _table_with(table, numbered.occupation), gone


def _iso(us: int) -> str | None:
    if int(us) >= OPEN_END:
        return None
    return (EPOCH + timedelta(microseconds=int(us))).isoformat()


def occupation_warnings(table: pa.Table) -> list[dict[str, Any]]:
    """Warnings about the numbering: an index SPS rev 2.1 cannot write (above 9)."""
    from archive.survey.parsed import problem

    occ = occupation_array(table)
    over = np.flatnonzero(occ > SPS_MAX_INDEX)
    line, point = table["line"].to_numpy(), table["point"].to_numpy()
    src = table["src_line"].to_numpy()
    return [problem("index-beyond-sps", f"station {station_text(line[i], point[i])} is "
                    f"occupied so often that this occupation gets point index {occ[i]}; SPS "
                    "rev 2.1 writes 1-9, so deliver it as CSV or GIS", int(src[i]))
            for i in over]


def occupation_summary(table: pa.Table) -> dict[str, int]:
    """How many occupations, stations (line/point) occupied more than once, and top index."""
    if table.num_rows == 0:
        return {"occupations": 0, "reoccupied": 0, "max_index": 0}
    counts = np.bincount(station_codes(table["line"].to_numpy(), table["point"].to_numpy()))
    return {"occupations": table.num_rows, "reoccupied": int((counts > 1).sum()),
            "max_index": int(occupation_array(table).max())}


def occupations_at(table: pa.Table, line: float, point: float) -> list[dict[str, Any]]:
    """Every occupation at (line, point) of a deployments table, oldest first, as dicts with
    ``index`` (delivered point index), ``station_index``, ``node``, ``deployed``,
    ``retrieved`` (None while still out) and ``src_line``."""
    mask = station_mask(table, line, point)
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

    where = f"station {station_text(line, point)}"
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
