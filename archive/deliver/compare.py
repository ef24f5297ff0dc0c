"""Reproduce a run, compare two runs, and find what had been delivered as of a date.

- :func:`reproduce` recomputes a run from its archived inputs (the solver's ``recompute``)
  and compares the table digest with the one recorded; a missing or altered input object is
  an :class:`IntegrityError` raised by the solver, never a silent "different".
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
        cmp = compare_positions(stored, again, threshold=0.0)
        worst = cmp["beyond"][0] if cmp["beyond"] else None
        result |= {"max_difference": cmp["summary"].get("max", 0.0), "worst_station": worst,
                   "n_differing": len(cmp["beyond"]), "added": cmp["added"],
                   "removed": cmp["removed"]}
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
