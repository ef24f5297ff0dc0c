"""``diff``: how far each occupation moved between two runs.

Delivered records are paired by (line, point, delivered point index), whatever the format
of either run (runs made before occupations were numbered are paired through their own
deployment table, :mod:`archive.solve.occupancy`): the occupation's index, or a part's own
for the later part of a node that moved during its stay. Per record: horizontal and vertical
movement, a summary, those beyond a threshold, and those added or removed.
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
    the ``index`` of a final table)."""
    if delivered_only and "delivered" in table.column_names:
        table = table.filter(pc.equal(table["delivered"], True))
    cols = [c for c in (*KEY, "node", "easting", "northing", "height")
            if c in table.column_names]
    df = table.select(cols).to_pandas()
    if "occupation" in table.column_names:
        index = table["occupation"].to_pandas().fillna(df["index"])
        if "point_index" in table.column_names:
            index = table["point_index"].to_pandas().fillna(index)
        df["index"] = index.astype("int64")
    return df


def compare_positions(a: pa.Table, b: pa.Table, threshold: float = 1.0) -> dict[str, Any]:
    """Per-station movement from table ``a`` to table ``b`` (delivered rows, metres)."""
    fa, fb = _frame(a), _frame(b)
    m = fa.merge(fb, on=KEY, how="outer", suffixes=("_a", "_b"), indicator=True)
    if "node_a" in m.columns:
        m["node"] = m["node_b"].where(m["node_b"].notna(), m["node_a"])
    both = m[m["_merge"] == "both"].copy()
    both["de"] = both["easting_b"] - both["easting_a"]
    both["dn"] = both["northing_b"] - both["northing_a"]
    both["dh"] = both["height_b"] - both["height_a"]
    both["moved"] = np.hypot(both["de"], both["dn"])
    d = both["moved"].to_numpy(dtype=np.float64)
    d = d[np.isfinite(d)]
    summary = {"n_common": int(len(both)), "n_compared": int(d.size)}
    if d.size:
        p50, p95 = np.percentile(d, [50, 95])
        summary |= {"mean": float(d.mean()), "median": float(p50), "p95": float(p95),
                    "rms": float(np.sqrt(np.mean(d * d))), "max": float(d.max())}
    beyond = both[both["moved"] > threshold].sort_values("moved", ascending=False)

    def node(r: dict[str, Any]) -> str | None:
        v = r.get("node")
        return None if v is None or (isinstance(v, float) and v != v) else str(v)

    def stations(frame: pd.DataFrame) -> list[dict[str, Any]]:
        cols = [*KEY, "node"] if "node" in frame.columns else KEY
        return [{"line": float(r["line"]), "point": float(r["point"]), "index": int(r["index"]),
                 "node": node(r)} for r in frame[cols].to_dict("records")]

    moved_rows = [
        {"line": float(r["line"]), "point": float(r["point"]), "index": int(r["index"]),
         "node": node(r), "de": float(r["de"]), "dn": float(r["dn"]),
         "moved": float(r["moved"]), "dh": None if pd.isna(r["dh"]) else float(r["dh"])}
        for r in beyond[[c for c in (*KEY, "node", "de", "dn", "dh", "moved")
                         if c in beyond.columns]].to_dict("records")
    ]
    return {"threshold": threshold, "summary": summary, "beyond": moved_rows,
            "added": stations(m[m["_merge"] == "right_only"]),
            "removed": stations(m[m["_merge"] == "left_only"])}


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


