"""The delivered records of a station, across deliveries, each tied to its occupation.

A delivery's final-positions table holds one record per occupation, keyed (line, point,
index) with ``index`` the occupation's point index and ``deployed``/``retrieved`` its logged
window. Deliveries made before occupations were numbered hold one record per deployment
under the station's own index (so two occupations could share a key): their records are tied
to an occupation through the run they came from (same node and station, same end of the fix
window), which gives them the index and window a delivery of that run would carry today.
Read-only.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from sqlalchemy import select

from archive.deliver.deliveries import delivery_dict
from archive.deliver.precision import as_delivered, file_decimals
from archive.store.archive import Archive
from archive.store.models import Delivery
from archive.survey.keys import rows_at

RECORD_KEYS = ("index", "station_index", "node", "deployed", "retrieved", "easting",
               "northing", "height", "height_source", "lat", "lon", "sigma_e", "sigma_n",
               "r95", "source", "flags", "flags_acknowledged", "merged", "windows",
               "t_start", "t_end", "file_index", "occupation", "part")


def _legacy_lookup(arc: Archive, run_id: str, line: float, point: float
                   ) -> list[dict[str, Any]]:
    """The delivered rows of (line, point) in a run, with their occupation columns."""
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run

    rows = rows_at(run_occupations(arc, get_run(arc, None, run_id)), line, point)
    return [r for r in rows.to_pylist() if r["delivered"]]


def _tie_legacy(record: dict[str, Any], solved: list[dict[str, Any]]) -> dict[str, Any]:
    """A legacy record with the occupation columns of the run row it came from."""
    same = [r for r in solved if r["node"] == record.get("node")
            and r["index"] == record.get("index")]
    exact = [r for r in same if r["t_end"] == record.get("t_end")]
    row = (exact or same or [None])[0]
    out = dict(record)
    out["station_index"] = record.get("index")
    out["file_index"] = record.get("index")  # the key as that file holds it
    if row is not None:
        out |= {"index": row["occupation"] if row["occupation"] is not None else row["index"],
                "deployed": row["deployed"], "retrieved": row["retrieved"]}
    else:
        out |= {"deployed": None, "retrieved": None}
    out.setdefault("merged", "")
    return out


def station_records(arc: Archive, survey_id: int, line: float, point: float, *,
                    cutoff: datetime | None = None) -> list[dict[str, Any]]:
    """Every delivered record of (line, point), oldest delivery first (see module doc).

    Each is the delivery (:func:`delivery_dict`) with ``record`` (the delivered values,
    ``index`` being the occupation's point index) and ``legacy`` (True for a delivery made
    before occupations were numbered, tied to its occupation through its run).
    """
    with arc.session() as s:
        q = select(Delivery).where(Delivery.survey_id == survey_id).order_by(Delivery.id)
        if cutoff is not None:
            q = q.where(Delivery.created_at <= cutoff)
        deliveries = s.scalars(q).all()
    out: list[dict[str, Any]] = []
    solved: dict[str, list[dict[str, Any]]] = {}
    for d in deliveries:
        table = arc.objects.read_table(d.final_hash)
        rows = rows_at(table, line, point).to_pylist()
        if not rows:
            continue
        legacy = "station_index" not in table.column_names
        places = file_decimals(d.format, table)
        if legacy and d.run_id not in solved:
            solved[d.run_id] = _legacy_lookup(arc, d.run_id, line, point)
        for r in rows:  # one entry per delivered record of the station
            rec = _tie_legacy(r, solved[d.run_id]) if legacy else r
            out.append(delivery_dict(d) | {
                "record": {k: rec.get(k) for k in RECORD_KEYS}, "legacy": legacy,
                "as_delivered": as_delivered(rec, places)})
    return out


def holds(record: dict[str, Any], t: datetime) -> bool:
    """Whether ``t`` falls in the record's occupation window [deployed, retrieved), or in
    the window of one of the occupations merged into it."""
    if record.get("windows"):
        for part in record["windows"].split(";"):
            a, _, b = part.partition("/")
            start = datetime.fromisoformat(a) if a else None
            end = datetime.fromisoformat(b) if b else None
            if start is not None and start <= t and (end is None or t < end):
                return True
        return False
    start, end = record.get("deployed"), record.get("retrieved")
    return start is not None and start <= t and (end is None or t < end)


def by_occupation(records: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """Records grouped by occupation (point index), each with its latest record and history,
    ordered by index."""
    groups: dict[int, list[dict[str, Any]]] = {}
    for r in records:
        groups.setdefault(int(r["record"]["index"]), []).append(r)
    out = []
    for k in sorted(groups):
        latest = groups[k][-1]
        rec = latest["record"]
        out.append({"index": k, "node": rec["node"], "deployed": rec["deployed"],
                    "retrieved": rec["retrieved"], "delivered": latest,
                    "history": groups[k]})
    return out
