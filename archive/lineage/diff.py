"""``diff``: how far each occupation moved between two runs.

Delivered records are paired by (line, point, delivered point index), whatever the format
of either run (runs made before occupations were numbered are paired through their own
deployment table, :mod:`archive.solve.occupancy`): the occupation's index, or a part's own
for the later part of a node that moved during its stay. Per record: horizontal and vertical
movement, a summary, those beyond a threshold; the records that lost their position (in
both runs, without a position in the second) or gained one; those re-assigned (the same key
now holds another node or another occupation); and those added (gained) or removed (lost).
A record without a position in either run is never counted as "no movement".
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import UsageError
from archive.lineage.common import plain
from archive.solve.run import get_run
from archive.store.archive import Archive
from archive.survey.keys import rows_at, station_text

KEY = ["line", "point", "index"]


def _frame(table: pa.Table, delivered_only: bool = True) -> pd.DataFrame:
    """Delivered rows keyed by delivered record: ``index`` is the point index it is
    delivered under (``point_index``, else the ``occupation`` column of a positions table;
    the ``index`` of a final table); ``occupation`` the occupation (deployment record) it
    belongs to, where the table says."""
    if delivered_only and "delivered" in table.column_names:
        table = table.filter(pc.equal(table["delivered"], True))
    cols = [c for c in (*KEY, "node", "easting", "northing", "height")
            if c in table.column_names]
    df = table.select(cols).to_pandas()
    if "node" not in df.columns:
        df["node"] = None
    df["occupation"] = df["index"].astype("int64")
    if "occupation" in table.column_names:
        index = table["occupation"].to_pandas().fillna(df["index"])
        df["occupation"] = index.astype("int64")
        if "point_index" in table.column_names:
            index = table["point_index"].to_pandas().fillna(index)
        df["index"] = index.astype("int64")
    return df


def _text(v: Any) -> str | None:
    return None if v is None or (isinstance(v, float) and v != v) else str(v)


def _records(frame: pd.DataFrame, extra: tuple[str, ...] = ()) -> list[dict[str, Any]]:
    """One dict per row: line, point, index, node (and ``extra`` columns as they are)."""
    out = []
    for r in frame.to_dict("records"):
        node = r.get("node") if "node" in r else r.get("node_b", r.get("node_a"))
        out.append({"line": float(r["line"]), "point": float(r["point"]),
                    "index": int(r["index"]), "node": _text(node)}
                   | {k: r[k] for k in extra})
    return out


def _reassigned(both: pd.DataFrame) -> list[dict[str, Any]]:
    """Records of both runs whose node or occupation differs: the same key now names
    another deployment (a corrected log, a swapped serial put right)."""
    node_a, node_b = both["node_a"].map(_text), both["node_b"].map(_text)
    changed = (node_a != node_b) | (both["occupation_a"] != both["occupation_b"])
    return [{"line": float(r["line"]), "point": float(r["point"]), "index": int(r["index"]),
             "node_a": _text(r["node_a"]), "node_b": _text(r["node_b"]),
             "occupation_a": int(r["occupation_a"]), "occupation_b": int(r["occupation_b"])}
            for r in both[changed].to_dict("records")]


def compare_positions(a: pa.Table, b: pa.Table, threshold: float = 1.0) -> dict[str, Any]:
    """Record by record from table ``a`` to table ``b`` (delivered rows, metres): the
    movement of those with a position in both, the records that lost or gained a position,
    those re-assigned to another node or occupation, and those added (``b`` only) or
    removed (``a`` only)."""
    fa, fb = _frame(a), _frame(b)
    m = fa.merge(fb, on=KEY, how="outer", suffixes=("_a", "_b"), indicator=True)
    m["node"] = m["node_b"].where(m["node_b"].notna(), m["node_a"])
    both = m[m["_merge"] == "both"].copy()
    both["de"] = both["easting_b"] - both["easting_a"]
    both["dn"] = both["northing_b"] - both["northing_a"]
    both["dh"] = both["height_b"] - both["height_a"]
    both["moved"] = np.hypot(both["de"], both["dn"])
    has_a = np.isfinite(both["easting_a"].to_numpy(np.float64)) & np.isfinite(
        both["northing_a"].to_numpy(np.float64))
    has_b = np.isfinite(both["easting_b"].to_numpy(np.float64)) & np.isfinite(
        both["northing_b"].to_numpy(np.float64))
    d = both["moved"].to_numpy(dtype=np.float64)[has_a & has_b]
    lost = _records(both[has_a & ~has_b])
    gained = _records(both[~has_a & has_b])
    reassigned = _reassigned(both)
    added, removed = _records(m[m["_merge"] == "right_only"]), _records(
        m[m["_merge"] == "left_only"])
    summary = {"n_common": int(len(both)), "n_compared": int(d.size),
               "n_lost_position": len(lost), "n_gained_position": len(gained),
               "n_reassigned": len(reassigned), "n_added": len(added),
               "n_removed": len(removed)}
    if d.size:
        p50, p95 = np.percentile(d, [50, 95])
        summary |= {"mean": float(d.mean()), "median": float(p50), "p95": float(p95),
                    "rms": float(np.sqrt(np.mean(d * d))), "max": float(d.max())}
    beyond = both[both["moved"] > threshold].sort_values("moved", ascending=False)
    moved_rows = [r | {"dh": None if pd.isna(r["dh"]) else float(r["dh"])}
                  for r in _records(beyond, ("de", "dn", "moved", "dh"))]
    for r in moved_rows:
        r |= {"de": float(r["de"]), "dn": float(r["dn"]), "moved": float(r["moved"])}
    return {"threshold": threshold, "summary": summary, "beyond": moved_rows,
            "lost_position": lost, "gained_position": gained, "reassigned": reassigned,
            "added": added, "removed": removed}


def diff_runs(arc: Archive, a: str, b: str, threshold: float = 1.0,
              survey_id: int | None = None, *, station: tuple[float, float] | None = None,
              index: int | None = None, node: str | None = None) -> dict[str, Any]:
    """Per-occupation movement between runs ``a`` and ``b`` (ids or unique prefixes).

    Occupations are paired by (line, point, point index of the occupation), whatever the
    format of either run. ``station`` (line, point) with ``index``/``node`` narrows the
    comparison to one station or one of its occupations.
    """
    from archive.solve.occupancy import run_occupations

    if threshold < 0:
        raise UsageError("the threshold must be zero or more metres")
    if station is None and (index is not None or node is not None):
        raise UsageError("--index and --node choose an occupation of one station",
                         hint="give the station too with --station LINE:POINT")
    ra, rb = get_run(arc, survey_id, a), get_run(arc, survey_id, b)
    pa_, pb = run_occupations(arc, ra), run_occupations(arc, rb)
    if station is not None:
        pa_ = rows_at(pa_, station[0], station[1], index, node, index_column="occupation")
        pb = rows_at(pb, station[0], station[1], index, node, index_column="occupation")
        if pa_.num_rows == 0 and pb.num_rows == 0:
            raise UsageError(f"station {station_text(*station)} is in neither run"
                             + (" with that occupation" if index or node else ""),
                             hint="check the line and point numbers")
    out = compare_positions(pa_, pb, threshold)
    return plain({"run_a": ra.id, "run_b": rb.id, "station": station} | out)


