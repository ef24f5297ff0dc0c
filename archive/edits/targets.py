"""Which station and occupation an edit names, checked against the current inputs.

An edit names one *occupation* of a station (one deployment of a node there) by the point
index it is delivered under (:mod:`archive.survey.occupations`), chosen with ``index``
and/or ``node``: a station occupied more than once must be given one of them, so an edit
never lands on more than one occupation. A station never deployed is named by its preplot
index. The preplot station must exist in the current stations version.
"""

from __future__ import annotations

from datetime import datetime
from typing import Any

from archive.errors import UsageError
from archive.store.archive import Archive
from archive.survey.inputs import require_input
from archive.survey.keys import rows_at, station_text
from archive.survey.occupations import (
    choose,
    current_occupations,
    listing,
    pick_one,
    window_text,
)


def station_row(arc: Archive, survey_id: int, line: float, point: float,
                index: int = 1) -> dict[str, Any]:
    """The preplot row of a station, or UsageError naming the station and stations version."""
    version, table = require_input(arc, survey_id, "stations", "no station can be edited")
    rows = rows_at(table, line, point, index).to_pylist()
    if not rows:
        raise UsageError(
            f"unknown station {station_text(line, point, index)}: not in the preplot "
            f"(stations version {version.version}, {version.original_name})",
            hint="check the line and point numbers (and --index), or load a corrected preplot")
    return rows[0] | {"stations_version": version.version, "stations_hash": version.table_hash}


def control_row(arc: Archive, survey_id: int, line: float, point: float, index: int,
                occupation: dict[str, Any] | None = None) -> dict[str, Any]:
    """The RTK check point of a preplot station that surveyed ``occupation``.

    A check point surveys the sensor of the node then in the ground. At a station occupied
    more than once it is the check point surveyed inside the occupation's logged window
    (the last such record when surveyed again); a station occupied once takes the last
    record. UsageError, listing the check points and their survey times, when none belongs
    to the occupation.
    """
    version, table = require_input(arc, survey_id, "control", "use another --from source")
    rows = rows_at(table, line, point, index).to_pylist()
    where = station_text(line, point, index)
    if not rows:
        raise UsageError(f"no check point at station {where} (control version "
                         f"{version.version})",
                         hint="use --from preplot or --from given with coordinates")
    _, occs = current_occupations(arc, survey_id, line, point)
    if occupation is not None and len([o for o in occs
                                        if o["station_index"] == index]) > 1:
        inside = [r for r in rows if r.get("surveyed") is not None
                  and r["surveyed"] >= occupation["deployed"]
                  and (occupation["retrieved"] is None
                       or r["surveyed"] < occupation["retrieved"])]
        if not inside:
            told = "; ".join(
                "surveyed " + (r["surveyed"].strftime("%Y-%m-%dT%H:%M:%SZ")
                               if r.get("surveyed") else "at an unknown time")
                for r in rows)
            raise UsageError(f"no check point at station {where} was surveyed while node "
                             f"{occupation['node']} was there ({window_text(occupation)}); "
                             f"the station's check points: {told}",
                             hint="a check point surveys the sensor of the node then in the "
                                  "ground: use --from preplot or --from given")
        rows = inside
    return rows[-1] | {"control_version": version.version, "control_hash": version.table_hash}


def target(arc: Archive, survey_id: int, line: float, point: float, index: int | None,
           node: str | None, what: str) -> tuple[int, int, dict[str, Any] | None]:
    """(delivered point index, preplot station index, occupation) an edit names.

    The occupation comes from the current deployment log: ``index`` (its delivered point
    index) and/or ``node`` choose it; a station occupied more than once with neither given
    is refused with the list of its occupations (``what`` names the edit in the message).
    """
    _, occs = current_occupations(arc, survey_id, line, point)
    if (index is not None and node is None and occs
            and not any(o["index"] == index or o["station_index"] == index for o in occs)):
        # a preplot station of this line and point that was never laid out
        try:
            station_row(arc, survey_id, line, point, index)
        except UsageError:
            pass
        else:
            return int(index), int(index), None
    occ = pick_one(occs, line, point, index, node, what=what)
    if occ is None:
        idx = 1 if index is None else int(index)
        station_row(arc, survey_id, line, point, idx)
        return idx, idx, None
    station_row(arc, survey_id, line, point, occ["station_index"])
    return int(occ["index"]), int(occ["station_index"]), occ


def occupation_payload(occ: dict[str, Any] | None) -> dict[str, Any]:
    """What an edit records of the occupation it names (node and logged window)."""
    if occ is None:
        return {}
    return {"occupation": {"node": occ["node"], "deployed": occ["deployed"].isoformat(),
                           "retrieved": occ["retrieved"].isoformat() if occ["retrieved"]
                           else None}}


def span_occupation(arc: Archive, survey_id: int, line: float, point: float,
                    index: int | None, node: str, t0: datetime, t1: datetime) -> dict[str, Any]:
    """The occupation of ``node`` at the station whose logged window [t0, t1) overlaps.

    UsageError (naming the occupations there) when the node was never deployed at the
    station, when the span overlaps none of its windows (it could have no effect) or more
    than one (an edit names one occupation: split it).
    """
    where = f"station {station_text(line, point)}"
    version, occs = current_occupations(arc, survey_id, line, point)
    if version is None:
        require_input(arc, survey_id, "deployments",
                      f"no node is known at {where} and the span could not take effect")
    if not occs:
        raise UsageError(f"no node was deployed at {where} (deployments version "
                         f"{version.version}), so the span would leave out nothing",
                         hint="check the line and point numbers")
    mine = choose(occs, index, node)
    if not mine:
        raise UsageError(f"node {node} was never deployed at {where}"
                         + (f" under index {index}" if index is not None else "")
                         + f"; occupations there: {listing(occs)}",
                         hint="give one of those nodes with --node")
    hit = [o for o in mine if (o["retrieved"] is None or t0 < o["retrieved"])
           and t1 > o["deployed"]]
    if not hit:
        raise UsageError(f"the span {t0.isoformat()} to {t1.isoformat()} overlaps no "
                         f"deployment of node {node} at {where}; occupations there: "
                         f"{listing(occs)}", hint="give --start/--end inside one of those windows")
    if len(hit) > 1:
        raise UsageError(f"the span {t0.isoformat()} to {t1.isoformat()} overlaps "
                         f"{len(hit)} occupations of node {node} at {where}: {listing(hit)}",
                         hint="make one exclude edit per occupation (--index N)")
    return hit[0]
