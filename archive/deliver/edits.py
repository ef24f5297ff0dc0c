"""Manual edits: immutable, reasoned decisions on stations, each ledgered on its own.

An edit names one *occupation* of a station (one deployment of a node there) by its delivered
point index (``index``; :mod:`archive.survey.occupations`), chosen with ``index`` and/or
``node``. A station occupied more than once must be given one of them: an edit never lands on
more than one occupation. A station never deployed is named by its preplot index.

Kinds (payloads in :mod:`archive.store.edit_log`): ``set-position`` (from a check point,
the preplot or given coordinates), ``set-height``, ``exclude-span`` (a time span of a node's
fixes left out at the next solve), ``reject-station`` (not delivered), ``ack-flag`` (a review
flag accepted by a person) and ``undo`` (takes an edit out of force).

Superseding: a new ``set-position``, ``set-height`` or ``reject-station`` for a station
supersedes the edit of the same kind in force for that station, and a new ``ack-flag`` the
one in force for the same station and flag. ``exclude-span`` edits add up (a station may
have several bad spans); take one out with ``undo``. An undo returns the station to what
the solver gives (it does not bring back an edit the undone one had replaced).
"""

from __future__ import annotations

import json
from datetime import UTC, datetime
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive.errors import UsageError
from archive.solve.schema import FLAGS
from archive.store.archive import Archive
from archive.store.edit_log import edits_in_force
from archive.store.hashing import canonical_hash, canonical_json
from archive.store.ledger import row_digest
from archive.store.models import Edit, utcnow

SOURCES = ("control", "preplot", "given")
AUTO_SUPERSEDE = ("set-position", "set-height", "reject-station", "ack-flag")


def _station_text(line: float, point: float, index: int) -> str:
    def n(v: float) -> str:
        return str(int(v)) if float(v).is_integer() else f"{v:g}"

    return f"{n(line)}/{n(point)}" + (f" index {index}" if index != 1 else "")


def _match(table: pa.Table, line: float, point: float, index: int) -> pa.Table:
    mask = pc.and_(pc.and_(pc.equal(table["line"], line), pc.equal(table["point"], point)),
                   pc.equal(table["index"], index))
    return table.filter(mask)


def _stations(arc: Archive, survey_id: int) -> tuple[Any, pa.Table]:
    from archive.survey.inputs import current_input

    found = current_input(arc, survey_id, "stations")
    if found is None or found[1] is None:
        raise UsageError("the survey has no stations (preplot) loaded, so no station can be "
                         "edited", hint="load them with 'nodekeep load stations FILE'")
    return found


def station_row(arc: Archive, survey_id: int, line: float, point: float,
                index: int = 1) -> dict[str, Any]:
    """The preplot row of a station, or UsageError naming the station and stations version."""
    version, table = _stations(arc, survey_id)
    rows = _match(table, line, point, index).to_pylist()
    if not rows:
        raise UsageError(
            f"unknown station {_station_text(line, point, index)}: not in the preplot "
            f"(stations version {version.version}, {version.original_name})",
            hint="check the line and point numbers (and --index), or load a corrected preplot")
    return rows[0] | {"stations_version": version.version, "stations_hash": version.table_hash}


def _control_row(arc: Archive, survey_id: int, line: float, point: float,
                 index: int) -> dict[str, Any]:
    from archive.survey.inputs import current_input

    found = current_input(arc, survey_id, "control")
    if found is None or found[1] is None:
        raise UsageError("the survey has no check points loaded",
                         hint="load them with 'nodekeep load control FILE', or use another "
                              "--from source")
    version, table = found
    rows = _match(table, line, point, index).to_pylist()
    if not rows:
        raise UsageError(f"no check point at station {_station_text(line, point, index)} "
                         f"(control version {version.version})",
                         hint="use --from preplot or --from given with coordinates")
    row = rows[-1]  # surveyed again: the last record of the file
    return row | {"control_version": version.version, "control_hash": version.table_hash}


def _target(arc: Archive, survey_id: int, line: float, point: float, index: int | None,
            node: str | None, what: str) -> tuple[int, int, dict[str, Any] | None]:
    """(delivered point index, preplot station index, occupation) an edit addresses.

    The occupation comes from the current deployment log: ``index`` (its delivered point
    index) and/or ``node`` choose it; a station occupied more than once with neither given is
    refused with the list of its occupations. A station never deployed is addressed by its
    preplot index (``index``, default 1). The preplot station must exist.
    """
    from archive.survey.occupations import current_occupations, pick_one

    _, occs = current_occupations(arc, survey_id, line, point)
    occ = pick_one(occs, line, point, index, node, what=what)
    if occ is None:
        idx = 1 if index is None else int(index)
        station_row(arc, survey_id, line, point, idx)
        return idx, idx, None
    station_row(arc, survey_id, line, point, occ["station_index"])
    return int(occ["index"]), int(occ["station_index"]), occ


def _occupation_payload(occ: dict[str, Any] | None) -> dict[str, Any]:
    """What an edit records of the occupation it names (node and logged window)."""
    if occ is None:
        return {}
    return {"occupation": {"node": occ["node"], "deployed": occ["deployed"].isoformat(),
                           "retrieved": occ["retrieved"].isoformat() if occ["retrieved"]
                           else None}}


def _require_reason(reason: str | None) -> str:
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


def _utc(value: str | datetime, what: str) -> datetime:
    if isinstance(value, datetime):
        dt = value
    else:
        try:
            dt = datetime.fromisoformat(str(value).strip().replace("Z", "+00:00"))
        except ValueError:
            raise UsageError(f"{what} {value!r} is not an ISO 8601 time",
                             hint="write it like 2024-03-14T05:00:00Z") from None
    if dt.tzinfo is None:
        raise UsageError(f"{what} {value!r} has no time zone", hint="add Z for UTC")
    return dt.astimezone(UTC)


def _create(arc: Archive, survey_id: int, kind: str, line: float, point: float, index: int,
            payload: dict[str, Any], reason: str, *, supersedes: int | None = None) -> Edit:
    """Insert one edit, superseding what it replaces, with its ledger event."""
    with arc.transaction() as tx:
        if supersedes is None and kind in AUTO_SUPERSEDE:
            for live in edits_in_force(tx, survey_id, kinds=(kind,)):
                same = (live.line, live.point, live.point_index) == (line, point, index)
                if same and (kind != "ack-flag"
                             or json.loads(live.payload).get("flag") == payload.get("flag")):
                    supersedes = live.id
        edit = Edit(survey_id=survey_id, kind=kind, line=float(line), point=float(point),
                    point_index=int(index), payload=canonical_json(payload).decode("utf-8"),
                    reason=reason, supersedes=supersedes, created_at=utcnow(),
                    created_by=arc.actor)
        tx.add(edit)
        tx.flush()
        arc.log(tx, f"edit.{kind}",
                {"edit": edit.id, "kind": kind, "station": [edit.line, edit.point, index],
                 "payload": payload, "reason": reason, "supersedes": supersedes},
                survey_id=survey_id, rows=[edit])
    return edit


def set_position(arc: Archive, survey_id: int, line: float, point: float,
                 index: int | None = None, *, reason: str, source: str = "given",
                 easting: float | None = None, northing: float | None = None,
                 node: str | None = None) -> Edit:
    """Set an occupation's delivered position from a check point, the preplot or coordinates.

    ``index``/``node`` choose the occupation (see :func:`_target`).
    """
    reason = _require_reason(reason)
    index, st_index, occ = _target(arc, survey_id, line, point, index, node, "set-position")
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
        c = _control_row(arc, survey_id, line, point, st_index)
        payload = {"source": "control", "easting": c["easting"], "northing": c["northing"],
                   "sigma_e": c.get("sigma_e"), "sigma_n": c.get("sigma_n"),
                   "height": c.get("height"),
                   "input": {"kind": "control", "version": c["control_version"],
                             "table": c["control_hash"]}}
    else:
        raise UsageError(f"unknown position source {source!r}", hint=f"use one of {SOURCES}")
    payload = {k: (None if isinstance(v, float) and v != v else v) for k, v in payload.items()}
    payload |= _occupation_payload(occ)
    return _create(arc, survey_id, "set-position", line, point, index, payload, reason)


def set_height(arc: Archive, survey_id: int, line: float, point: float,
               index: int | None = None, *, reason: str, source: str = "given",
               height: float | None = None, node: str | None = None) -> Edit:
    """Set an occupation's delivered height from a check point, the preplot or a value."""
    reason = _require_reason(reason)
    index, st_index, occ = _target(arc, survey_id, line, point, index, node, "set-height")
    pre = station_row(arc, survey_id, line, point, st_index)
    if source == "given":
        if height is None:
            raise UsageError("--from given needs --height")
        payload: dict[str, Any] = {"source": "given", "height": _finite(height, "height")}
    elif source == "preplot":
        if pre.get("elevation") is None:
            raise UsageError(f"the preplot has no elevation for station "
                             f"{_station_text(line, point, index)}",
                             hint="use --from control or --from given --height H")
        payload = {"source": "preplot", "height": pre["elevation"],
                   "input": {"kind": "stations", "version": pre["stations_version"],
                             "table": pre["stations_hash"]}}
    elif source == "control":
        c = _control_row(arc, survey_id, line, point, st_index)
        if c.get("height") is None:
            raise UsageError(f"the check point at {_station_text(line, point, index)} has "
                             "no height", hint="use --from given --height H")
        payload = {"source": "control", "height": c["height"],
                   "input": {"kind": "control", "version": c["control_version"],
                             "table": c["control_hash"]}}
    else:
        raise UsageError(f"unknown height source {source!r}", hint=f"use one of {SOURCES}")
    payload |= _occupation_payload(occ)
    return _create(arc, survey_id, "set-height", line, point, index, payload, reason)


def _span_occupation(arc: Archive, survey_id: int, line: float, point: float,
                     index: int | None, node: str, t0: datetime, t1: datetime) -> dict[str, Any]:
    """The occupation of ``node`` at the station whose logged window the span overlaps.

    UsageError (naming the occupations there) when the node was never deployed at the
    station, when the span overlaps none of its windows (it could have no effect) or more
    than one (split it: an edit names one occupation).
    """
    from archive.survey.occupations import choose, current_occupations, listing

    where = f"station {line:g}/{point:g}"
    version, occs = current_occupations(arc, survey_id, line, point)
    if version is None:
        raise UsageError(f"the survey has no deployment log, so no node is known at {where} "
                         "and the span could not take effect",
                         hint="load it with 'nodekeep load deployments FILE'")
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


def exclude_span(arc: Archive, survey_id: int, line: float, point: float,
                 index: int | None = None, *, node: str, start: str | datetime,
                 end: str | datetime, reason: str) -> Edit:
    """Leave a node's fixes between ``start`` and ``end`` (UTC) out of the next solve.

    The edit names the occupation of ``node`` at the station whose logged window the span
    overlaps (``index`` narrows the choice). Refused (UsageError naming the occupations
    there) when ``node`` was never deployed at the station in the current deployment log, or
    when the span overlaps none of its deployment windows there: such a span could have no
    effect.
    """
    reason = _require_reason(reason)
    node = (node or "").strip()
    if not node:
        raise UsageError("exclude needs the node serial (--node)")
    t0, t1 = _utc(start, "start"), _utc(end, "end")
    if t1 <= t0:
        raise UsageError(f"the span ends ({t1.isoformat()}) before it starts ({t0.isoformat()})")
    occ = _span_occupation(arc, survey_id, line, point, index, node, t0, t1)
    station_row(arc, survey_id, line, point, occ["station_index"])
    payload = {"node": node, "start": t0.isoformat(), "end": t1.isoformat()}
    return _create(arc, survey_id, "exclude-span", line, point, occ["index"], payload, reason)


def reject_station(arc: Archive, survey_id: int, line: float, point: float,
                   index: int | None = None, *, reason: str, node: str | None = None) -> Edit:
    """Mark an occupation of a station as not to be delivered (``index``/``node`` choose it)."""
    reason = _require_reason(reason)
    index, _, occ = _target(arc, survey_id, line, point, index, node, "reject")
    return _create(arc, survey_id, "reject-station", line, point, index,
                   _occupation_payload(occ), reason)


def _station_flags(arc: Archive, survey_id: int, line: float, point: float,
                   index: int) -> tuple[str, list[str]]:
    """The newest run's id and the flags of the occupation's delivered row in it."""
    from archive.solve.occupancy import run_occupations, station_rows
    from archive.solve.run import get_run

    where = _station_text(line, point, index)
    try:
        run = get_run(arc, survey_id)
    except UsageError:
        raise UsageError(f"the survey has no solution run yet, so station {where} carries no "
                         "flag to acknowledge", hint="solve first with 'nodekeep solve'") from None
    table = station_rows(run_occupations(arc, run), line, point, index)
    table = table.filter(pc.fill_null(table["delivered"], False))
    if table.num_rows == 0:
        raise UsageError(f"station {where} has no delivered position in the newest run "
                         f"{run.id[:12]}, so it carries no flag to acknowledge",
                         hint="check the line and point numbers (and --index)")
    flags = [f for f in (table["flags"][0].as_py() or "").split(";") if f]
    return run.id, flags


def ack_flag(arc: Archive, survey_id: int, line: float, point: float,
             index: int | None = None, *, flag: str, reason: str,
             node: str | None = None) -> Edit:
    """Acknowledge a review flag of an occupation (it no longer blocks a delivery).

    Refused (UsageError) when there is no run yet, or when the occupation's delivered row in
    the newest run does not carry ``flag`` (the message names the flags it does carry).
    """
    reason = _require_reason(reason)
    if flag not in FLAGS:
        raise UsageError(f"unknown flag {flag!r}", hint=f"flags are: {', '.join(FLAGS)}")
    index, _, occ = _target(arc, survey_id, line, point, index, node, "ack")
    run_id, carried = _station_flags(arc, survey_id, line, point, index)
    if flag not in carried:
        has = ", ".join(carried) if carried else "no flags"
        raise UsageError(f"station {_station_text(line, point, index)} does not carry flag "
                         f"{flag!r} in the newest run {run_id[:12]}; it carries: {has}",
                         hint="acknowledge one of the flags it carries, or solve again first")
    return _create(arc, survey_id, "ack-flag", line, point, index,
                   {"flag": flag} | _occupation_payload(occ), reason)


def undo(arc: Archive, survey_id: int, edit_id: int, *, reason: str) -> Edit:
    """Take edit ``edit_id`` out of force with a new ``undo`` edit."""
    reason = _require_reason(reason)
    with arc.session() as s:
        target = s.get(Edit, int(edit_id))
        if target is None or target.survey_id != survey_id:
            raise UsageError(f"no edit {edit_id} in this survey",
                             hint="list the edits with 'nodekeep edits --all'")
        if target.kind == "undo":
            raise UsageError(f"edit {edit_id} is itself an undo; an undo cannot be undone",
                             hint=f"make a new edit of the kind edit {target.supersedes} was")
        later = s.scalars(select(Edit).where(Edit.supersedes == target.id)).first()
        if later is not None and later.kind == "undo":
            raise UsageError(f"edit {edit_id} was already undone by edit {later.id}",
                             hint=f"make a new {target.kind} edit to restore it")
        if later is not None:
            raise UsageError(f"edit {edit_id} is no longer in force: edit {later.id} "
                             f"({later.kind}) superseded it", hint="undo that edit instead")
    return _create(arc, survey_id, "undo", target.line, target.point, target.point_index,
                   {}, reason, supersedes=target.id)


def edit_dict(e: Edit, *, in_force: bool | None = None) -> dict[str, Any]:
    """An edit as plain data."""
    d = {"id": e.id, "kind": e.kind, "line": e.line, "point": e.point, "index": e.point_index,
         "payload": json.loads(e.payload or "{}"), "reason": e.reason,
         "supersedes": e.supersedes, "created_at": e.created_at, "created_by": e.created_by}
    if in_force is not None:
        d["in_force"] = in_force
    return d


def list_edits(arc: Archive, survey_id: int, *, all_edits: bool = False,
               line: float | None = None, point: float | None = None,
               as_of: datetime | None = None) -> list[dict[str, Any]]:
    """Edits of a survey, oldest first: those in force, or every edit with ``all_edits``."""
    with arc.session() as s:
        live = {e.id for e in edits_in_force(s, survey_id, as_of=as_of)}
        q = select(Edit).where(Edit.survey_id == survey_id).order_by(Edit.id)
        if as_of is not None:
            q = q.where(Edit.created_at <= as_of)
        rows = list(s.scalars(q))
    out = [edit_dict(e, in_force=e.id in live) for e in rows
           if (all_edits or e.id in live)
           and (line is None or e.line == line) and (point is None or e.point == point)]
    return out


def edit_set(arc: Archive, survey_id: int, *, as_of: datetime | None = None,
             ) -> tuple[list[Edit], str]:
    """The edits in force and the hash naming that set (over their row digests)."""
    with arc.session() as s:
        live = edits_in_force(s, survey_id, as_of=as_of)
    return live, canonical_hash([[e.id, row_digest(e)] for e in live])



# Edits the final positions apply; exclude spans act at the solve and come from the run.
FINAL_KINDS = ("set-position", "set-height", "reject-station", "ack-flag")


def delivery_edit_set(arc: Archive, survey_id: int, manifest: dict[str, Any], *,
                      as_of: datetime | None = None) -> tuple[list[Edit], str, list[Edit]]:
    """The edits a delivery of a run rests on, their set hash, and exclude spans it lacks.

    The set is the final-position edits in force plus the exclude-span edits the run's
    manifest applied (whatever became of them since). The third item lists exclude-span
    edits in force that the run did not apply: the run must be solved again to apply them.
    """
    applied_ids = {int(e["id"]) for e in manifest.get("edits") or []
                   if e.get("kind", "exclude-span") == "exclude-span"}
    with arc.session() as s:
        live = edits_in_force(s, survey_id, as_of=as_of)
        applied = [s.get(Edit, i) for i in sorted(applied_ids)]
    final = [e for e in live if e.kind in FINAL_KINDS]
    missing = [e for e in live if e.kind == "exclude-span" and e.id not in applied_ids]
    edits = sorted(final + [e for e in applied if e is not None], key=lambda e: e.id)
    return edits, canonical_hash([[e.id, row_digest(e)] for e in edits]), missing
