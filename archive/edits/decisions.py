"""The edits people make: set a position or a height, exclude a span, reject, undo.

Each names one occupation (:mod:`archive.edits.targets`), needs a reason, is checked so that
it could have an effect, and is recorded with its ledger event (:mod:`archive.edits.log`).
An undo returns the occupation to what the solver gives; it does not bring back an edit the
undone one had replaced.
"""

from __future__ import annotations

from datetime import datetime, timedelta
from typing import Any

from sqlalchemy import select

from archive.edits.kinds import SOURCES
from archive.edits.log import record_edit
from archive.edits.targets import (
    control_row,
    occupation_payload,
    span_occupation,
    station_row,
    target,
)
from archive.errors import UsageError
from archive.store.archive import Archive
from archive.store.models import Edit
from archive.survey.keys import station_text
from archive.times import parse_utc


def require_reason(reason: str | None) -> str:
    """The reason of an edit, which is required."""
    text = (reason or "").strip()
    if not text:
        raise UsageError("an edit needs a reason", hint="say why with --reason TEXT")
    return text


def _finite(value: Any, what: str) -> float:
    try:
        v = float(value)
    except (TypeError, ValueError):
        raise UsageError(f"{what} must be a number, got {value!r}") from None
    if v != v or v in (float("inf"), float("-inf")):
        raise UsageError(f"{what} must be a finite number")
    return v


def _unknown_source(source: str, what: str) -> UsageError:
    return UsageError(f"unknown {what} source {source!r}", hint=f"use one of {', '.join(SOURCES)}")


def set_position(arc: Archive, survey_id: int, line: float, point: float,
                 index: int | None = None, *, reason: str, source: str = "given",
                 easting: float | None = None, northing: float | None = None,
                 node: str | None = None) -> Edit:
    """Set an occupation's delivered position from a check point, the preplot or coordinates.

    ``index``/``node`` choose the occupation (:func:`archive.edits.targets.target`).
    """
    reason = require_reason(reason)
    index, st_index, occ = target(arc, survey_id, line, point, index, node, "set-position")
    pre = station_row(arc, survey_id, line, point, st_index)
    if source == "given":
        if easting is None or northing is None:
            raise UsageError("--from given needs --easting and --northing")
        payload = {"source": "given", "easting": _finite(easting, "easting"),
                   "northing": _finite(northing, "northing")}
    elif source == "preplot":
        payload = {"source": "preplot", "easting": pre["easting"], "northing": pre["northing"],
                   "height": pre.get("elevation"),
                   "input": {"kind": "stations", "version": pre["stations_version"],
                             "table": pre["stations_hash"]}}
    elif source == "control":
        c = control_row(arc, survey_id, line, point, st_index, occ)
        payload = {"source": "control", "easting": c["easting"], "northing": c["northing"],
                   "sigma_e": c.get("sigma_e"), "sigma_n": c.get("sigma_n"),
                   "height": c.get("height"),
                   "input": {"kind": "control", "version": c["control_version"],
                             "table": c["control_hash"]}}
    else:
        raise _unknown_source(source, "position")
    payload = {k: (None if isinstance(v, float) and v != v else v) for k, v in payload.items()}
    payload |= occupation_payload(occ)
    return record_edit(arc, survey_id, "set-position", line, point, index, payload, reason)


def set_height(arc: Archive, survey_id: int, line: float, point: float,
               index: int | None = None, *, reason: str, source: str = "given",
               height: float | None = None, node: str | None = None) -> Edit:
    """Set an occupation's delivered height from a check point, the preplot or a value."""
    reason = require_reason(reason)
    index, st_index, occ = target(arc, survey_id, line, point, index, node, "set-height")
    pre = station_row(arc, survey_id, line, point, st_index)
    where = station_text(line, point, index)
    if source == "given":
        if height is None:
            raise UsageError("--from given needs --height")
        payload: dict[str, Any] = {"source": "given", "height": _finite(height, "height")}
    elif source == "preplot":
        if pre.get("elevation") is None:
            raise UsageError(f"the preplot has no elevation for station {where}",
                             hint="use --from control or --from given --height H")
        payload = {"source": "preplot", "height": pre["elevation"],
                   "input": {"kind": "stations", "version": pre["stations_version"],
                             "table": pre["stations_hash"]}}
    elif source == "control":
        c = control_row(arc, survey_id, line, point, st_index, occ)
        if c.get("height") is None:
            raise UsageError(f"the check point at {where} has no height",
                             hint="use --from given --height H")
        payload = {"source": "control", "height": c["height"],
                   "input": {"kind": "control", "version": c["control_version"],
                             "table": c["control_hash"]}}
    else:
        raise _unknown_source(source, "height")
    payload |= occupation_payload(occ)
    return record_edit(arc, survey_id, "set-height", line, point, index, payload, reason)


def exclude_span(arc: Archive, survey_id: int, line: float, point: float,
                 index: int | None = None, *, node: str, start: str | datetime,
                 end: str | datetime, reason: str) -> Edit:
    """Leave a node's fixes between ``start`` and ``end`` (UTC) out of the next solve.

    The edit names the occupation of ``node`` at the station whose logged window the span
    overlaps (``index`` narrows the choice). Refused (UsageError naming the occupations
    there) when ``node`` was never deployed at the station in the current deployment log, or
    when the span overlaps none of its deployment windows there: such a span could have no
    effect. The span is cut to the occupation's logged window [deployed, retrieved) (the
    payload keeps what was asked under ``asked``), so it never leaves out the node's fixes
    at another station. Times follow :mod:`archive.times` (no zone: UTC).
    """
    reason = require_reason(reason)
    node = (node or "").strip()
    if not node:
        raise UsageError("exclude needs the node serial (--node)")
    t0, t1 = parse_utc(start, "start"), parse_utc(end, "end")
    if t1 <= t0:
        raise UsageError(f"the span ends ({t1.isoformat()}) before it starts ({t0.isoformat()})")
    occ = span_occupation(arc, survey_id, line, point, index, node, t0, t1)
    station_row(arc, survey_id, line, point, occ["station_index"])
    # the span acts on the node's fixes by time: cut it to this occupation's logged window
    # so it never reaches the node's deployment at another station
    c0 = max(t0, occ["deployed"])
    c1 = t1 if occ["retrieved"] is None else min(t1, occ["retrieved"] - timedelta(microseconds=1))
    payload: dict[str, Any] = {"node": node, "start": c0.isoformat(), "end": c1.isoformat()}
    if (c0, c1) != (t0, t1):
        payload["asked"] = {"start": t0.isoformat(), "end": t1.isoformat()}
    payload |= occupation_payload(occ)
    return record_edit(arc, survey_id, "exclude-span", line, point, occ["index"], payload,
                       reason)


def reject_station(arc: Archive, survey_id: int, line: float, point: float,
                   index: int | None = None, *, reason: str, node: str | None = None) -> Edit:
    """Mark an occupation of a station as not to be delivered (``index``/``node`` choose it)."""
    reason = require_reason(reason)
    index, _, occ = target(arc, survey_id, line, point, index, node, "reject")
    return record_edit(arc, survey_id, "reject-station", line, point, index,
                       occupation_payload(occ), reason)


def undo(arc: Archive, survey_id: int, edit_id: int, *, reason: str) -> Edit:
    """Take edit ``edit_id`` out of force with a new ``undo`` edit."""
    reason = require_reason(reason)
    with arc.session() as s:
        undone = s.get(Edit, int(edit_id))
        if undone is None or undone.survey_id != survey_id:
            raise UsageError(f"no edit {edit_id} in this survey",
                             hint="list the edits with 'nodekeep edits --all'")
        if undone.kind == "undo":
            raise UsageError(f"edit {edit_id} is itself an undo; an undo cannot be undone",
                             hint=f"make a new edit of the kind edit {undone.supersedes} was")
        later = s.scalars(select(Edit).where(Edit.supersedes == undone.id)).first()
        if later is not None and later.kind == "undo":
            raise UsageError(f"edit {edit_id} was already undone by edit {later.id}",
                             hint=f"make a new {undone.kind} edit to restore it")
        if later is not None:
            raise UsageError(f"edit {edit_id} is no longer in force: edit {later.id} "
                             f"({later.kind}) superseded it", hint="undo that edit instead")
    return record_edit(arc, survey_id, "undo", undone.line, undone.point, undone.point_index,
                       {}, reason, supersedes=undone.id)
