"""``reproduce``: solve a run again from its archived inputs and prove it identical.

:func:`reproduce` recomputes a run from its manifest (the solver's ``recompute``) and compares
the table digest with the one recorded; a missing or altered input object is an
:class:`IntegrityError` raised by the solver, never a silent "different". When the digests
differ, :func:`table_differences` says what differs over all rows.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa

from archive import __version__
from archive.solve.run import get_run, run_positions
from archive.store.archive import Archive
from archive.store.hashing import table_digest

ROW_KEY = ["line", "point", "index", "occupation", "node", "kind", "part"]


def table_differences(a: pa.Table, b: pa.Table) -> dict[str, Any]:
    """What differs between two position tables, over all rows (delivered or not).

    Rows are matched by station, node, kind and part (and their order among equal keys).
    Returns the row counts, rows only in ``a`` or only in ``b``, the columns whose values
    differ on matched rows (nulls equal nulls, NaN equals NaN), columns only in one table,
    whether the schemas differ (types or metadata) and whether only the row order differs,
    the number of rows that differ (matched rows with any differing value plus unmatched
    rows), and the largest horizontal (easting/northing) and vertical (height) differences.
    """
    common = [c for c in a.column_names if c in b.column_names]
    key = [c for c in ROW_KEY if c in common]
    fa, fb = a.select(common).to_pandas(), b.select(common).to_pandas()
    for f in (fa, fb):
        f["_nth"] = f.groupby(key, sort=False, dropna=False).cumcount() if key else f.index
        f["_row"] = np.arange(len(f))
    m = fa.merge(fb, on=[*key, "_nth"], how="outer", suffixes=("_a", "_b"), indicator=True)
    both = m[m["_merge"] == "both"]
    differing = np.zeros(len(both), dtype=bool)
    columns = []
    for c in (c for c in common if c not in key):
        x, y = both[f"{c}_a"], both[f"{c}_b"]
        same = (x == y).fillna(False).to_numpy(dtype=bool) | (x.isna() & y.isna()).to_numpy()
        if not same.all():
            columns.append(c)
            differing |= ~same

    def largest(values: Any) -> float:
        v = np.abs(np.asarray(values, dtype=np.float64))
        v = v[np.isfinite(v)]
        return float(v.max()) if v.size else 0.0

    out: dict[str, Any] = {"rows_a": a.num_rows, "rows_b": b.num_rows,
                           "only_a": int((m["_merge"] == "left_only").sum()),
                           "only_b": int((m["_merge"] == "right_only").sum()),
                           "columns": columns,
                           "columns_only_a": [c for c in a.column_names if c not in common],
                           "columns_only_b": [c for c in b.column_names if c not in common],
                           "schema_differs": not a.schema.equals(b.schema, check_metadata=True),
                           "order_differs": bool((both["_row_a"] != both["_row_b"]).any()),
                           "max_horizontal": 0.0, "max_vertical": 0.0, "worst_station": None}
    out["n_rows_differing"] = int(differing.sum()) + out["only_a"] + out["only_b"]
    if {"easting", "northing"} <= set(common) and len(both):
        moved = np.hypot(both["easting_b"].to_numpy(np.float64)
                         - both["easting_a"].to_numpy(np.float64),
                         both["northing_b"].to_numpy(np.float64)
                         - both["northing_a"].to_numpy(np.float64))
        out["max_horizontal"] = largest(moved)
        if out["max_horizontal"] > 0:
            r = both.iloc[int(np.nanargmax(moved))]
            out["worst_station"] = {"line": float(r["line"]), "point": float(r["point"]),
                                    "index": int(r["index"]), "moved": out["max_horizontal"]}
    if "height" in common and len(both):
        out["max_vertical"] = largest(both["height_b"].to_numpy(np.float64)
                                      - both["height_a"].to_numpy(np.float64))
    return out


def difference_text(d: dict[str, Any]) -> str:
    """One sentence naming what differs in a :func:`table_differences` result."""
    parts = []
    if d["rows_a"] != d["rows_b"] or d["only_a"] or d["only_b"]:
        parts.append(f"rows {d['rows_a']} recorded vs {d['rows_b']} recomputed "
                     f"({d['only_a']} only recorded, {d['only_b']} only recomputed)")
    if d["columns"]:
        parts.append(f"values differ in column(s) {', '.join(d['columns'])}")
    if d["columns_only_a"] or d["columns_only_b"]:
        parts.append("columns only recorded: " + (", ".join(d["columns_only_a"]) or "none")
                     + "; only recomputed: " + (", ".join(d["columns_only_b"]) or "none"))
    if d["schema_differs"] and not (d["columns_only_a"] or d["columns_only_b"]):
        parts.append("the schemas differ (column types, order or metadata)")
    if d["order_differs"]:
        parts.append("the rows are in a different order")
    return "; ".join(parts) or "no value, row or schema differs, yet the digests do"


def reproduce(arc: Archive, run_ref: str, survey_id: int | None = None) -> dict[str, Any]:
    """Recompute a run from its archived inputs and say whether it is identical."""
    from archive.solve.run import recompute

    run = get_run(arc, survey_id, run_ref)
    stored = run_positions(arc, run)  # IntegrityError when the stored table was altered
    again = recompute(arc, run.id)
    digest = table_digest(again)
    identical = digest == run.positions_digest
    result: dict[str, Any] = {
        "run": run.id, "identical": identical, "recorded_digest": run.positions_digest,
        "recomputed_digest": digest, "run_code_version": run.code_version,
        "current_code_version": __version__,
        "code_version_differs": run.code_version != __version__,
    }
    if not identical:
        d = table_differences(stored, again)
        result |= {"differences": d, "what_differs": difference_text(d),
                   "max_difference": d["max_horizontal"], "max_vertical": d["max_vertical"],
                   "worst_station": d["worst_station"], "n_differing": d["n_rows_differing"]}
    return result


