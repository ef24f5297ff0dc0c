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

from archive import __version__
from archive.deliver.runs import get_run, plain, run_positions
from archive.errors import UsageError
from archive.store.archive import Archive
from archive.store.hashing import table_digest

KEY = ["line", "point", "index"]


def _frame(table: pa.Table, delivered_only: bool = True) -> pd.DataFrame:
    """Delivered rows keyed by occupation: ``index`` is the occupation's point index (the
    ``occupation`` column of a positions table, the ``index`` of a final table)."""
    if delivered_only and "delivered" in table.column_names:
        table = table.filter(pc.equal(table["delivered"], True))
    cols = [c for c in (*KEY, "node", "easting", "northing", "height")
            if c in table.column_names]
    df = table.select(cols).to_pandas()
    if "occupation" in table.column_names:
        df["index"] = table["occupation"].to_pandas().fillna(df["index"]).astype("int64")
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


def diff_runs(arc: Archive, a: str, b: str, threshold: float = 1.0,
              survey_id: int | None = None, *, station: tuple[float, float] | None = None,
              index: int | None = None, node: str | None = None) -> dict[str, Any]:
    """Per-occupation movement between runs ``a`` and ``b`` (ids or unique prefixes).

    Occupations are paired by (line, point, point index of the occupation), whatever the
    format of either run. ``station`` (line, point) with ``index``/``node`` narrows the
    comparison to one station or one of its occupations.
    """
    from archive.solve.occupancy import run_occupations, station_rows

    if threshold < 0:
        raise UsageError("the threshold must be zero or more metres")
    if station is None and (index is not None or node is not None):
        raise UsageError("--index and --node choose an occupation of one station",
                         hint="give the station too with --station LINE:POINT")
    ra, rb = get_run(arc, survey_id, a), get_run(arc, survey_id, b)
    pa_, pb = run_occupations(arc, ra), run_occupations(arc, rb)
    if station is not None:
        pa_ = station_rows(pa_, station[0], station[1], index, node)
        pb = station_rows(pb, station[0], station[1], index, node)
        if pa_.num_rows == 0 and pb.num_rows == 0:
            raise UsageError(f"station {station[0]:g}/{station[1]:g} is in neither run"
                             + (" with that occupation" if index or node else ""),
                             hint="check the line and point numbers")
    out = compare_positions(pa_, pb, threshold)
    return plain({"run_a": ra.id, "run_b": rb.id, "station": station} | out)


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


def parse_at(value: str | datetime | None) -> datetime | None:
    """A moment in UTC (``--at``): an ISO 8601 time; one without a zone is taken as UTC."""
    if value is None or isinstance(value, datetime):
        if isinstance(value, datetime) and value.tzinfo is None:
            raise UsageError("--at time has no time zone", hint="add Z for UTC")
        return value.astimezone(UTC) if value is not None else None
    text = str(value).strip()
    try:
        dt = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise UsageError(f"--at {text!r} is not an ISO 8601 time",
                         hint="write 2025-04-09T13:20:00Z") from None
    return dt.astimezone(UTC) if dt.tzinfo else dt.replace(tzinfo=UTC)


def _nearest(occupations: list[dict[str, Any]], t: datetime) -> list[dict[str, Any]]:
    """The occupations closest in time to ``t`` (one ending before it, one starting after)."""
    before = [o for o in occupations if o["retrieved"] is not None and o["retrieved"] <= t]
    after = [o for o in occupations if o["deployed"] is not None and o["deployed"] > t]
    out = []
    if before:
        o = max(before, key=lambda o: o["retrieved"])
        out.append({"index": o["index"], "node": o["node"], "ended": o["retrieved"],
                    "seconds_before": (t - o["retrieved"]).total_seconds()})
    if after:
        o = min(after, key=lambda o: o["deployed"])
        out.append({"index": o["index"], "node": o["node"], "started": o["deployed"],
                    "seconds_after": (o["deployed"] - t).total_seconds()})
    return out


def where(arc: Archive, survey_id: int, line: float, point: float, index: int | None = None,
          as_of: str | date | datetime | None = None, *, node: str | None = None,
          at: str | datetime | None = None) -> dict[str, Any]:
    """The coordinates delivered for station (line, point) as of ``as_of`` (default: now).

    One entry per occupation in ``occupations`` (its latest delivered record and the
    history of its records); ``index``/``node`` keep one occupation. ``at`` (a UTC moment,
    e.g. a shot time) picks the occupation whose logged window [deployed, retrieved)
    contains it; a moment in no window gives ``delivered`` None and the ``nearest``
    occupations. ``delivered`` is the chosen record, or the only occupation's. ``as_of``
    is converted to UTC. A station not in the current stations input is refused
    (:class:`UsageError`).
    """
    from archive.deliver.records import by_occupation, holds, station_records
    from archive.survey.inputs import current_input

    cutoff, moment = parse_as_of(as_of), parse_at(at)
    found = current_input(arc, survey_id, "stations")
    if found is None or found[1] is None or _station_absent(found[1], line, point):
        raise UsageError(f"unknown station {line:g}/{point:g}: not in the preplot"
                         + (f" (stations version {found[0].version})" if found else ""),
                         hint="check the line and point numbers")
    records = station_records(arc, survey_id, line, point, cutoff=cutoff)
    if index is not None:
        records = [r for r in records if r["record"]["index"] == int(index)]
    if node is not None:
        records = [r for r in records if str(r["record"]["node"]) == str(node)]
    occupations = by_occupation(records)
    chosen, nearest = None, []
    if moment is not None:
        inside = [o for o in occupations if holds(o["delivered"]["record"], moment)]
        chosen = inside[-1] if inside else None
        nearest = [] if inside else _nearest(occupations, moment)
    elif len(occupations) == 1:
        chosen = occupations[0]
    return plain({"station": {"line": float(line), "point": float(point)},
                  "index": index, "node": node, "as_of": cutoff, "at": moment,
                  "n_occupations": len(occupations),
                  "delivered": _flat(chosen["delivered"]) if chosen else None,
                  "occupations": [o | {"delivered": _flat(o["delivered"]),
                                       "history": [_flat(h) for h in o["history"]]}
                                  for o in occupations],
                  "nearest": nearest})


def _flat(entry: dict[str, Any]) -> dict[str, Any]:
    """A delivery entry with its record's values at the top level."""
    out = {k: v for k, v in entry.items() if k != "record"}
    return out | entry["record"]


def _station_absent(stations: pa.Table, line: float, point: float) -> bool:
    mask = pc.and_(pc.equal(stations["line"], float(line)),
                   pc.equal(stations["point"], float(point)))
    return not bool(pc.any(mask).as_py())
