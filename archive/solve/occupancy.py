"""A run's positions with their occupations, whatever the run's format.

Runs of manifest format 3 store each row's occupation, the point index it is delivered
under and the time that position holds. Runs of format 2 store the occupation (delivered
point index, logged window, ``from_margins``) and delivered only the last part of a moved
node, under the occupation's index for its whole stay: those are the values their rows get
here (``point_index``, ``held_from``/``held_to``; ``dof`` null, the normal quantile). Runs of
format 1 were solved before occupations were numbered: their rows are matched here to the
run's own deployments table (numbered by :mod:`archive.survey.occupations`): same station
and node, the row's window start inside the deployment's logged window. So an old run is
delivered, traced and compared by occupation exactly like a new one, and its stored table
(what ``reproduce`` checks) is never changed.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa

from archive.solve.schema import POSITION_SCHEMA, POSITION_SCHEMA_V2
from archive.survey.occupations import Records, number_occupations, with_occupations
from archive.times import us_array

UPGRADE_COLUMNS = ("occupation", "deployed", "retrieved", "from_margins")
PART_COLUMNS = ("point_index", "held_from", "held_to", "dof")


NULL_US = np.iinfo(np.int64).min  # a null timestamp while the columns are int64


def _us(col: pa.ChunkedArray) -> np.ndarray:
    return us_array(col, NULL_US)


def _from_deployments(positions: pa.Table, deployments: pa.Table) -> dict[str, np.ndarray]:
    """Occupation columns of v1 rows, matched to the numbered deployment records."""
    import pandas as pd  # runs of the first table version only

    dep = with_occupations(deployments)
    d = pd.DataFrame({
        "node": dep["node"].to_pylist(), "line": dep["line"].to_numpy(),
        "point": dep["point"].to_numpy(), "index": dep["index"].to_numpy(),
        "occupation": dep["occupation"].to_numpy(), "d0": _us(dep["deployed"]),
        "d1": _us(dep["retrieved"]),
    })
    n = positions.num_rows
    pos = pd.DataFrame({
        "row": np.arange(n), "node": positions["node"].to_pylist(),
        "line": positions["line"].to_numpy(), "point": positions["point"].to_numpy(),
        "index": positions["index"].to_numpy(), "kind": positions["kind"].to_pylist(),
        "t_start": _us(positions["t_start"]),
    })
    m = pos[pos["kind"] == "logged"].merge(d, on=["node", "line", "point", "index"])
    inside = (m["t_start"] >= m["d0"]) & ((m["d1"] == NULL_US) | (m["t_start"] <= m["d1"]))
    m = m[inside].sort_values(["row", "d0"]).drop_duplicates("row", keep="first")
    occ = np.zeros(n, dtype=np.int8)
    deployed = np.full(n, NULL_US, dtype=np.int64)
    retrieved = np.full(n, NULL_US, dtype=np.int64)
    rows = m["row"].to_numpy()
    occ[rows] = m["occupation"].to_numpy()
    deployed[rows] = m["d0"].to_numpy()
    retrieved[rows] = m["d1"].to_numpy()
    return {"occupation": occ, "deployed": deployed, "retrieved": retrieved}


def _from_rows(positions: pa.Table) -> dict[str, np.ndarray]:
    """Occupation columns numbered from the rows alone (a run without a deployments table):
    one occupation per station and node, in order of the rows' window starts."""
    import pandas as pd  # runs of the first table version only

    n = positions.num_rows
    df = pd.DataFrame({
        "row": np.arange(n),
        "line": positions["line"].to_numpy(), "point": positions["point"].to_numpy(),
        "index": positions["index"].to_numpy(), "node": positions["node"].to_pylist(),
        "kind": positions["kind"].to_pylist(), "t": _us(positions["t_start"]),
    })
    logged = df[df["kind"] == "logged"]
    first = logged.groupby(["line", "point", "index", "node"], sort=False)["t"].min()
    first = first.reset_index()
    rec = Records(line=first["line"].to_numpy(float), point=first["point"].to_numpy(float),
                  index=first["index"].to_numpy(np.int64),
                  node=first["node"].to_numpy(object), start=first["t"].to_numpy(np.int64),
                  end=first["t"].to_numpy(np.int64), order=np.arange(len(first)))
    first["occupation"] = number_occupations(rec).occupation
    m = logged.merge(first.drop(columns="t"), on=["line", "point", "index", "node"])
    occ = np.zeros(n, dtype=np.int8)
    occ[m["row"].to_numpy()] = m["occupation"].to_numpy()
    none = np.full(n, NULL_US, dtype=np.int64)
    return {"occupation": occ, "deployed": none, "retrieved": none.copy()}


def _with_parts(positions: pa.Table) -> pa.Table:
    """A v2 table with the columns of v3 as a run of its time meant them: the delivered
    row of each occupation under its index, for the occupation's whole logged window."""
    import pyarrow.compute as pc

    dl = pc.fill_null(positions["delivered"], False)
    null_int = pa.scalar(None, pa.int8())
    arrays: list[Any] = [positions[name] for name in POSITION_SCHEMA_V2.names]
    arrays.append(pc.if_else(dl, positions["occupation"], null_int))
    for name in ("deployed", "retrieved"):
        t = POSITION_SCHEMA.field(name).type
        arrays.append(pc.if_else(dl, positions[name], pa.scalar(None, t)))
    arrays.append(pa.nulls(positions.num_rows, pa.float64()))
    # columns added later (n_no_quality) are carried when the table has them, else absent
    # as in any run that predates them (schema.ADDED_COLUMNS)
    later = [c for c in positions.column_names
             if c not in POSITION_SCHEMA_V2.names and c not in PART_COLUMNS]
    arrays += [positions[c] for c in later]
    schema = pa.schema([*POSITION_SCHEMA_V2, *(POSITION_SCHEMA.field(c) for c in PART_COLUMNS),
                        *(positions.schema.field(c) for c in later)],
                       metadata=POSITION_SCHEMA.metadata)
    return pa.Table.from_arrays(arrays, schema=schema)


def upgrade_positions(positions: pa.Table, deployments: pa.Table | None) -> pa.Table:
    """``positions`` in :data:`POSITION_SCHEMA`: a v1 table gets its occupation columns from
    ``deployments`` (the run's own deployments table), or from its rows when there is none;
    a v1 or v2 table gets the part columns of v3 (:func:`_with_parts`)."""
    if all(c in positions.column_names for c in UPGRADE_COLUMNS + PART_COLUMNS):
        return positions
    if all(c in positions.column_names for c in UPGRADE_COLUMNS):
        return _with_parts(positions)
    cols = (_from_deployments(positions, deployments) if deployments is not None
            else _from_rows(positions))
    n = positions.num_rows
    arrays: list[Any] = [positions[name] for name in positions.column_names]
    arrays.append(pa.array(cols["occupation"], pa.int8(), mask=cols["occupation"] == 0))
    for name in ("deployed", "retrieved"):
        v = cols[name]
        arrays.append(pa.array(v, pa.int64(), mask=v == NULL_US).cast(
            POSITION_SCHEMA.field(name).type))
    arrays.append(pa.array(np.zeros(n, dtype=bool)))
    return _with_parts(pa.Table.from_arrays(arrays, schema=POSITION_SCHEMA_V2))


def run_occupations(arc: Any, run: Any) -> pa.Table:
    """The run's positions (checked against its digest) with the occupation columns."""
    from archive.solve.run import run_manifest, run_positions

    positions = run_positions(arc, run)
    if all(c in positions.column_names for c in UPGRADE_COLUMNS):
        return upgrade_positions(positions, None)
    dep_hash = (run_manifest(arc, run).get("inputs") or {}).get("deployments")
    deployments = arc.objects.read_table(dep_hash) if dep_hash else None
    return upgrade_positions(positions, deployments)


def occupation_of_index(rows: list[dict[str, Any]], index: int) -> int:
    """The occupation delivered, wholly or in part, under point index ``index``, among one
    station's rows of :func:`run_occupations` (as dicts): a moved node's later part is
    delivered under an index of its own but belongs to its occupation. ``index`` itself
    when no delivered row carries it (an occupation never delivered keeps its number)."""
    for r in rows:
        if (r.get("delivered") and r.get("point_index") == index
                and r.get("occupation") is not None):
            return int(r["occupation"])
    return int(index)
