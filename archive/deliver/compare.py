"""Reproduce a run, compare two runs, and find what had been delivered as of a date.

- :func:`reproduce` recomputes a run from its archived inputs (the solver's ``recompute``)
  and compares the table digest with the one recorded; a missing or altered input object is
  an :class:`IntegrityError` raised by the solver, never a silent "different". When the
  digests differ, :func:`table_differences` says what differs over all rows.
- :func:`diff_runs` gives per-station horizontal/vertical movement between two runs, a
  summary, the stations beyond a threshold, and the stations added or removed.
- :func:`where` answers "which coordinate had we delivered for this station on that date,
  and in which delivery".
"""

from __future__ import annotations

from datetime import UTC, date, datetime, time
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive import __version__
from archive.deliver.deliveries import delivery_dict
from archive.deliver.runs import get_run, plain, run_positions
from archive.errors import UsageError
from archive.store.archive import Archive
from archive.store.hashing import table_digest
from archive.store.models import Delivery

KEY = ["line", "point", "index"]


def _frame(table: pa.Table, delivered_only: bool = True) -> pd.DataFrame:
    if delivered_only and "delivered" in table.column_names:
        table = table.filter(pc.equal(table["delivered"], True))
    cols = [c for c in (*KEY, "easting", "northing", "height") if c in table.column_names]
    return table.select(cols).to_pandas()


def compare_positions(a: pa.Table, b: pa.Table, threshold: float = 1.0) -> dict[str, Any]:
    """Per-station movement from table ``a`` to table ``b`` (delivered rows, metres)."""
    fa, fb = _frame(a), _frame(b)
    m = fa.merge(fb, on=KEY, how="outer", suffixes=("_a", "_b"), indicator=True)
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

    def stations(frame: pd.DataFrame) -> list[dict[str, Any]]:
        return [{"line": float(r["line"]), "point": float(r["point"]), "index": int(r["index"])}
                for r in frame[KEY].to_dict("records")]

    moved_rows = [
        {"line": float(r["line"]), "point": float(r["point"]), "index": int(r["index"]),
         "de": float(r["de"]), "dn": float(r["dn"]), "moved": float(r["moved"]),
         "dh": None if pd.isna(r["dh"]) else float(r["dh"])}
        for r in beyond[[*KEY, "de", "dn", "dh", "moved"]].to_dict("records")
    ]
    return {"threshold": threshold, "summary": summary, "beyond": moved_rows,
            "added": stations(m[m["_merge"] == "right_only"]),
            "removed": stations(m[m["_merge"] == "left_only"])}


ROW_KEY = ["line", "point", "index", "node", "kind", "part"]


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


def diff_runs(arc: Archive, a: str, b: str, threshold: float = 1.0,
              survey_id: int | None = None) -> dict[str, Any]:
    """Per-station movement between runs ``a`` and ``b`` (ids or unique prefixes)."""
    if threshold < 0:
        raise UsageError("the threshold must be zero or more metres")
    ra, rb = get_run(arc, survey_id, a), get_run(arc, survey_id, b)
    out = compare_positions(run_positions(arc, ra), run_positions(arc, rb), threshold)
    return plain({"run_a": ra.id, "run_b": rb.id} | out)


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


def parse_as_of(value: str | date | datetime | None) -> datetime | None:
    """A cut-off time in UTC: a date means the end of that day (UTC); a time with an offset
    is converted to UTC, one without is taken as UTC."""
    if value is None or isinstance(value, datetime):
        if isinstance(value, datetime) and value.tzinfo is None:
            raise UsageError("as-of time has no time zone", hint="add Z for UTC")
        return value.astimezone(UTC) if value is not None else None
    if isinstance(value, date):
        return datetime.combine(value, time.max, tzinfo=UTC)
    text = str(value).strip()
    try:
        if len(text) == 10:
            return datetime.combine(date.fromisoformat(text), time.max, tzinfo=UTC)
        dt = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise UsageError(f"--as-of {text!r} is not an ISO 8601 date or time",
                         hint="write 2025-06-30 or 2025-06-30T12:00:00Z") from None
    return dt.astimezone(UTC) if dt.tzinfo else dt.replace(tzinfo=UTC)


def where(arc: Archive, survey_id: int, line: float, point: float, index: int = 1,
          as_of: str | date | datetime | None = None) -> dict[str, Any]:
    """The coordinate of a station delivered most recently as of ``as_of`` (default: now).

    ``as_of`` is converted to UTC. A station not in the current stations input is refused
    (:class:`UsageError`).
    """
    from archive.deliver.edits import station_row

    cutoff = parse_as_of(as_of)
    station_row(arc, survey_id, line, point, index)
    with arc.session() as s:
        q = select(Delivery).where(Delivery.survey_id == survey_id).order_by(Delivery.id)
        if cutoff is not None:
            q = q.where(Delivery.created_at <= cutoff)
        deliveries = s.scalars(q).all()
    history = []
    for d in deliveries:
        t = arc.objects.read_table(d.final_hash)
        m = pc.and_(pc.and_(pc.equal(t["line"], float(line)), pc.equal(t["point"], float(point))),
                    pc.equal(t["index"], int(index)))
        rows = t.filter(m).to_pylist()
        if rows:
            r = rows[0]
            history.append(delivery_dict(d) | {
                "easting": r["easting"], "northing": r["northing"], "height": r["height"],
                "lat": r.get("lat"), "lon": r.get("lon"), "source": r["source"],
                "flags": r["flags"]})
    return plain({"station": {"line": float(line), "point": float(point), "index": int(index)},
                  "as_of": cutoff, "delivered": history[-1] if history else None,
                  "history": history})
