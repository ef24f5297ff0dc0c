"""The deployment log: which node sat at which station, from when to when.

CSV ``node,line,point,deployed_utc,retrieved_utc`` (optionally ``index``), times in ISO 8601
(a time without an offset is UTC); an empty ``retrieved_utc`` means the node is still in the
ground. Other header names are mapped with ``field=Header`` pairs.

Problems found (each with the line of the record): a station not in the preplot, retrieved
before deployed, two deployments of one node overlapping in time, one station holding two
nodes at once. They are warnings by default; a strict load refuses the file instead.
Intervals are half-open [deployed, retrieved): a node retrieved at 10:00 and deployed again
at 10:00 does not overlap itself.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from archive.errors import InputError
from archive.survey.csvtable import parse_column_mapping, read_csv_columns
from archive.survey.keys import station_text
from archive.survey.occupations import OPEN_END, number_log
from archive.survey.parsed import ParsedInput, problem
from archive.survey.schema import DEPLOYMENT_LOG_SCHEMA
from archive.survey.stations import unknown_stations
from archive.times import us_array

REQUIRED = ("node", "line", "point", "deployed_utc", "retrieved_utc")
OPTIONAL = ("index",)
FIELDS = REQUIRED + OPTIONAL


def read_deployments(data: bytes, path: str,
                     columns: str | dict[str, str] | None = None) -> ParsedInput:
    """Parse a deployment log CSV into DEPLOYMENT_LOG_SCHEMA (no cross-record checks, no
    occupation numbering yet: the loader numbers occupations against the previous version)."""
    mapping = parse_column_mapping(columns, FIELDS)
    c = read_csv_columns(data, path, REQUIRED, OPTIONAL, mapping)
    if len(c) == 0:
        raise InputError(path, "no deployment records found",
                         expected="one row per deployment under the header")
    node = c.text("node")
    if (node == "").any():
        i = int(np.argmax(node == ""))
        raise InputError(path, "the node serial is empty", line=int(c.lines[i]),
                         columns=mapping.get("node", "node"), expected="a node serial")
    n = len(c)
    table = pa.table(
        {
            "node": node,
            "line": c.floats("line"),
            "point": c.floats("point"),
            "index": (c.ints("index", default=1, lo=1, hi=9) if c.has("index")
                      else np.ones(n, dtype=np.int64)).astype(np.int8),
            "deployed": c.times("deployed_utc"),
            "retrieved": c.times("retrieved_utc", required=False),
            "src_line": c.lines,
        },
        schema=DEPLOYMENT_LOG_SCHEMA,
    )
    return ParsedInput(table=table, meta={"format": "csv", "columns": mapping})


def number_occupations(table: pa.Table, path: str, previous: pa.Table | None = None,
                       retired: list[dict[str, Any]] | tuple = (),
                       preplot: pa.Table | None = None,
                       later_parts: list[dict[str, Any]] | tuple = ()
                       ) -> tuple[pa.Table, list[dict[str, Any]]]:
    """The log with its ``occupation`` column numbered against the previous version, the
    occupations retired before and the preplot's point indices
    (:func:`archive.survey.occupations.number_log`); a station occupied too often is
    refused. Returns the table and the retired occupations to keep with the version.
    ``later_parts`` are the indices moved nodes' later parts were delivered under, which
    no new occupation takes."""
    try:
        return number_log(table, previous, retired, preplot, later_parts)
    except ValueError as exc:
        raise InputError(path, str(exc), expected="at most 127 occupations of one station "
                         "(SPS rev 2.1 writes point indices 1-9)") from None


def drop_repeated(table: pa.Table) -> tuple[pa.Table, list[dict[str, Any]]]:
    """The log without records that repeat an earlier one field for field (node, station,
    index, both times): a record copied twice is one occupation, not two at the same place
    and time (which would be solved and delivered twice). Each dropped record is a
    ``repeated-record`` problem on its line, naming the line it repeats."""
    if table.num_rows < 2:
        return table, []
    key = pd.DataFrame({
        "node": table["node"].to_numpy(zero_copy_only=False),
        "line": table["line"].to_numpy(), "point": table["point"].to_numpy(),
        "index": table["index"].to_numpy(),
        "deployed": table["deployed"].cast(pa.int64()).to_numpy(),
        "retrieved": us_array(table["retrieved"], OPEN_END),
    })
    again = key.duplicated(keep="first").to_numpy()
    if not again.any():
        return table, []
    src = table["src_line"].to_numpy()
    group = key.groupby(list(key.columns), sort=False).ngroup().to_numpy()
    first_src = pd.Series(src).groupby(group).transform("first").to_numpy()
    out = [problem("repeated-record", f"this record repeats the one on line {int(first_src[i])}"
                   " field for field: kept once", int(src[i])) for i in np.flatnonzero(again)]
    return table.filter(pa.array(~again)), out


def check_deployments(table: pa.Table, stations: pa.Table | None) -> list[dict[str, Any]]:
    """Every problem of a deployment table, sorted by line."""
    out = unknown_stations(table, stations, "deployment")
    start = table["deployed"].cast(pa.int64()).to_numpy()
    end = us_array(table["retrieved"], OPEN_END)  # still out: "for ever"
    src = table["src_line"].to_numpy()
    backwards = np.flatnonzero(end < start)
    dep = table["deployed"].to_pylist()
    ret = table["retrieved"].to_pylist()
    out += [problem("retrieved-before-deployed", f"retrieved {ret[i].isoformat()} before "
                    f"deployed {dep[i].isoformat()}", int(src[i])) for i in backwards]
    node = table["node"].to_numpy(zero_copy_only=False)
    out += _overlaps(pd.factorize(node)[0], start, end, src,
                     lambda i: f"node {node[i]} is deployed twice at once",
                     "overlap")
    line, point, index = (table[k].to_numpy() for k in ("line", "point", "index"))
    station = pd.DataFrame({"l": line, "p": point, "i": index}).groupby(["l", "p", "i"]).ngroup()
    out += _overlaps(station.to_numpy(), start, end, src,
                     lambda i: f"station {station_text(line[i], point[i], index[i])} holds two "
                               "nodes at once",
                     "station-occupied")
    return sorted(out, key=lambda w: (w["line"] or 0, w["code"]))


def _overlaps(group: np.ndarray, start: np.ndarray, end: np.ndarray, src: np.ndarray,
              label: Callable[[int], str], code: str) -> list[dict[str, Any]]:
    """Records whose interval starts before an earlier interval of the same group ends.

    Sorted by (group, start); the running maximum of the end within a group says whether an
    earlier interval is still open. Intervals with end < start are left to their own check.
    """
    order = np.lexsort((start, group))
    order = order[(end >= start)[order]]
    if len(order) < 2:
        return []
    g, s, e = group[order], start[order], end[order]
    cm = pd.Series(e).groupby(g).cummax().to_numpy(dtype=np.int64)
    first = np.r_[True, g[1:] != g[:-1]]
    prev = np.r_[np.int64(0), cm[:-1]]
    hit = np.flatnonzero(~first & (s < prev))
    out = []
    for j in hit:  # one iteration per problem found, not per record
        earlier = np.flatnonzero((g[:j] == g[j]) & (e[:j] == cm[j - 1]))
        other = int(src[order[earlier[-1]]])
        i = int(order[j])
        out.append(problem(code, f"{label(i)}: this record overlaps the one on line {other}",
                           int(src[i])))
    return out
