"""``where``: the coordinates delivered for a station as of a date, or at a moment.

One entry per occupation of the station (its latest delivered record and the history of its
records, :mod:`archive.lineage.records`); ``--at`` picks the occupation whose logged window
contains a moment (a shot time), and names the nearest occupations when none does.
"""

from __future__ import annotations

from datetime import date, datetime
from typing import Any

import pyarrow as pa

from archive.errors import UsageError
from archive.lineage.common import plain
from archive.store.archive import Archive
from archive.survey.keys import station_mask, station_text
from archive.times import parse_optional


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
    and ``at`` follow :mod:`archive.times` (a date for ``as_of`` means the end of that day).
    A station not in the current stations input is refused
    (:class:`UsageError`).
    """
    from archive.lineage.records import by_occupation, holds, station_records
    from archive.survey.inputs import current_input

    cutoff = parse_optional(as_of, "--as-of", date_is_end=True)
    if isinstance(at, str) and len(at.strip()) == 10:
        raise UsageError(f"--at {at.strip()!r} is a date; it needs a moment (a shot time)",
                         hint="write it like 2025-04-08T14:03:00Z")
    moment = parse_optional(at, "--at")
    found = current_input(arc, survey_id, "stations")
    if found is None or found[1] is None or _station_absent(found[1], line, point):
        raise UsageError(f"unknown station {station_text(line, point)}: not in the preplot"
                         + (f" (stations version {found[0].version})" if found else ""),
                         hint="check the line and point numbers")
    every = station_records(arc, survey_id, line, point, cutoff=cutoff)
    records = [r for r in every
               if (index is None or r["record"]["index"] == int(index))
               and (node is None or str(r["record"]["node"]) == str(node))]
    notes = []
    if not records and every and index is not None:
        into = [r for r in every
                if str(index) in (r["record"].get("merged") or "").split(";")]
        if into:  # delivered merged into another record
            records = into
            notes.append(f"index {index} was delivered merged into index "
                         f"{into[-1]['record']['index']} (--merge-occupations)")
    if not records and every:
        have = sorted({(r["record"]["index"], r["record"]["node"]) for r in every})
        notes.append("no delivered occupation of the station has "
                     + " and ".join(x for x in (f"index {index}" if index is not None else "",
                                                f"node {node}" if node is not None else "")
                                    if x)
                     + "; delivered: " + ", ".join(f"index {k} (node {n})" for k, n in have))
    occupations = by_occupation(records)
    chosen, nearest = None, []
    if moment is not None:
        inside = [o for o in occupations if holds(o["delivered"]["record"], moment)]
        chosen = inside[-1] if inside else None
        nearest = [] if inside else _nearest(occupations, moment)
    elif len(occupations) == 1:
        chosen = occupations[0]
    notes += _part_notes(occupations, chosen)
    if chosen is not None:
        rec = chosen["delivered"]["record"]
        moved = {f for f in ((rec.get("flags") or "") + ";"
                             + (rec.get("flags_acknowledged") or "")).split(";") if f}
        if moment is not None and ({"short-span", "few-fixes"} & moved):
            notes.append("the node logged only part of its stay (short-span or few-fixes): "
                         "its position holds for the whole logged window, whether it "
                         "recorded at that moment is for its seismic data to say")
        if "moved" in moved and rec.get("part") not in (1, 2):
            notes.append("the node moved during this occupation: the delivered position is "
                         "where it stood at the end ('nodekeep trace' shows each part)")
        if rec.get("file_index") is not None and rec["file_index"] != rec["index"]:
            notes.append(f"that file, written before occupations were numbered, holds this "
                         f"record under index {rec['file_index']}")
    return plain({"station": {"line": float(line), "point": float(point)},
                  "index": index, "node": node, "as_of": cutoff, "at": moment,
                  "n_occupations": len(occupations),
                  "delivered": _flat(chosen["delivered"]) if chosen else None,
                  "occupations": [o | {"delivered": _flat(o["delivered"]),
                                       "history": [_flat(h) for h in o["history"]]}
                                  for o in occupations],
                  "nearest": nearest, "notes": notes})


def _part_notes(occupations: list[dict[str, Any]], chosen: dict[str, Any] | None
                ) -> list[str]:
    """Notes naming the parts of a node that moved during its stay (each delivered as its
    own record): the chosen one's, or every moved node's when none was chosen."""
    parts: dict[tuple[Any, Any], dict[int, dict[str, Any]]] = {}
    for o in occupations:
        rec = o["delivered"]["record"]
        if rec.get("part") in (1, 2):
            parts.setdefault((rec.get("occupation"), rec["node"]), {})[rec["part"]] = rec
    notes = []
    for (_, node), p in sorted(parts.items(), key=lambda kv: str(kv[0])):
        if chosen is not None and chosen["delivered"]["record"] not in p.values():
            continue
        before, after = p.get(1), p.get(2)
        at = (after or {}).get("deployed") or (before or {}).get("retrieved")
        when = at.strftime("%Y-%m-%dT%H:%M:%SZ") if at is not None else "an unknown time"
        notes.append(f"node {node} moved during its stay, at {when}: index "
                     f"{before['index'] if before else '?'} is where it stood before, index "
                     f"{after['index'] if after else '?'} where it stood after (each holds "
                     "for its own time; --at picks the one in the ground then)")
    return notes


def _flat(entry: dict[str, Any]) -> dict[str, Any]:
    """A delivery entry with its record's values at the top level."""
    out = {k: v for k, v in entry.items() if k != "record"}
    return out | entry["record"]


def _station_absent(stations: pa.Table, line: float, point: float) -> bool:
    import pyarrow.compute as pc

    return not bool(pc.any(station_mask(stations, line, point)).as_py())
