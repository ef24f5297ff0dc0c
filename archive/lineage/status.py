"""Where a survey stands, for the evening loop: what is loaded, what is still in the ground,
whether the newest run is behind its inputs, what waits for review, and what changed since
the last delivery.

Everything here comes from the catalog and from small tables (the deployment log, the
newest run's positions, the delivered final tables); no fix table is read, so the work
stays under a second on an archive of 10^8 fixes (bench/status.py). The newest run's
positions are read once, for the review counts and the comparison with the last delivery.

Counts of review flags are **stations** (occupations), counted the one way ``solve``, ``qc``
and ``review`` count them (:func:`archive.review.queue.review_counts`).
"""

from __future__ import annotations

import json
from dataclasses import asdict, dataclass, field
from datetime import datetime
from typing import Any

from sqlalchemy import func, select

from archive import __version__
from archive.deliver.changes import (
    DEFAULT_SHIFT,
    DEFAULT_TOLERANCE,
    compare_final,
    merged_mode,
    unit_factor_of,
)
from archive.review.queue import review_counts
from archive.store.archive import Archive
from archive.store.models import Delivery, Run, Survey
from archive.survey.inputs import list_inputs
from archive.survey.status import harvest_status, parsed_logs

LIST_LIMIT = 20
"""How many deployments, nodes or stations a list keeps (the counts are always whole)."""


@dataclass
class SurveyStatus:
    """The answer of :func:`survey_status` (plain data with :meth:`as_dict`)."""

    survey: dict[str, Any]
    loaded: dict[str, Any]
    inputs: list[dict[str, Any]]
    awaiting_harvest: dict[str, Any]
    nodes_without_deployment: dict[str, Any]
    run: dict[str, Any] | None
    review: dict[str, Any] | None
    delivery: dict[str, Any] | None
    notes: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, Any]:
        """Plain data for printing or JSON."""
        return asdict(self)


def _run_behind(arc: Archive, survey_id: int, run: Run, current: dict[str, dict[str, Any]],
                fixes: set[str]) -> list[str]:
    """What changed in the inputs since ``run`` was made (empty: it is up to date);
    ``fixes``: the fix tables of the survey's loaded logs."""
    from archive.edits.log import exclude_spans_in_force
    from archive.solve.run import run_manifest

    manifest = run_manifest(arc, run)
    ins = manifest.get("inputs") or {}
    versions = manifest.get("input_versions") or {}
    changes = []
    for kind, key in (("stations", "table_hash"), ("deployments", "table_hash"),
                      ("dem", "source_hash")):
        now = current.get(kind)
        now_hash = now[key] if now is not None else None
        if now_hash != ins.get(kind):
            was = versions.get(kind)
            changes.append(f"{kind} v{was if was is not None else '-'} -> "
                           f"v{now['version'] if now is not None else '-'}")
    used = set(ins.get("fixes") or [])
    if (manifest.get("selection") or {}).get("stations") or \
            (manifest.get("selection") or {}).get("nodes"):
        changes.append("the run solved a selection of stations or nodes")
    elif fixes - used:
        changes.append(f"{len(fixes - used)} log(s) loaded since")
    if used - fixes:
        changes.append(f"{len(used - fixes)} log(s) it used are no longer loaded")
    spans = exclude_spans_in_force(arc, survey_id)
    if json.dumps(spans, sort_keys=True, default=str) != json.dumps(
            manifest.get("edits") or [], sort_keys=True, default=str):
        changes.append("exclude-span edits changed since")
    if run.code_version != __version__:
        changes.append(f"code version {run.code_version} -> {__version__}")
    return changes


def survey_status(arc: Archive, survey_id: int, shift: float = DEFAULT_SHIFT
                  ) -> SurveyStatus:
    """Where survey ``survey_id`` stands (see module doc). ``shift``: metres a delivered
    position must have moved to count as moved since the last delivery."""
    from archive.deliver.changes import delivered_state
    from archive.deliver.final import final_positions
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run

    with arc.session() as s:
        survey = s.get(Survey, survey_id)
        sdict = {"id": survey.id, "name": survey.name, "crs": f"EPSG:{survey.crs_epsg}"}
        any_run = s.scalar(select(func.count(Run.id)).where(Run.survey_id == survey_id))
        last = s.scalars(select(Delivery).where(Delivery.survey_id == survey_id)
                         .order_by(Delivery.id.desc()).limit(1)).first()
        n_deliveries = s.scalar(select(func.count(Delivery.id))
                                .where(Delivery.survey_id == survey_id)) or 0
        n_runs = int(any_run or 0)
    run = get_run(arc, survey_id, None) if n_runs else None  # the newest, as solve names it
    current = {v["kind"]: v for v in list_inputs(arc, survey_id)}
    inputs = [{"kind": k, "version": v["version"], "rows": v["rows"], "name": v["name"],
               "table": v["table_hash"] is not None, "loaded_at": v["created_at"]}
              for k, v in current.items()]
    logs = parsed_logs(arc, survey_id)  # read once for the harvest and the run's inputs
    harvest = harvest_status(arc, survey_id, limit=LIST_LIMIT, logs=logs)
    notes: list[str] = []
    run_info = review = delivery = None
    if run is not None:
        behind = _run_behind(arc, survey_id, run, current, {r[4] for r in logs})
        run_info = {"id": run.id, "label": run.label, "created_at": run.created_at,
                    "positions": run.n_positions, "runs": int(n_runs),
                    "inputs_changed": behind, "up_to_date": not behind}
        positions = run_occupations(arc, run)  # read once for the counts and the changes
        review = review_counts(arc, survey_id, run.id, positions=positions) | {"run": run.id}
        if last is not None:
            # the comparison 'deliver --changed-since' would make, in the delivery's own mode
            merge = merged_mode(arc, last)
            final = final_positions(arc, survey_id, run, merge=merge, positions=positions)
            ch = compare_final(delivered_state(arc, last), final, last.id, DEFAULT_TOLERANCE,
                               unit_factor_of(arc, survey_id))
            counts = ch.counts()
            delivery = {
                "id": last.id, "format": last.format, "file_name": last.file_name,
                "recipient": last.recipient, "at": last.created_at, "run": last.run_id,
                "merge_occupations": merge, "deliveries": int(n_deliveries),
                "shift_m": shift, "tolerance_m": DEFAULT_TOLERANCE,
                "since": {"records": len(ch.records), "new": counts.get("new", 0),
                          "moved": counts.get("position", 0),
                          "moved_beyond_shift": sum(1 for r in ch.records
                                                    if r.get("shift_m", 0.0) > shift),
                          "height": counts.get("height", 0), "node": counts.get("node", 0),
                          "time": counts.get("time", 0),
                          "flags": counts.get("flags", 0), "edited": counts.get("edited", 0),
                          "removed": counts.get("removed", 0),
                          "unchanged": ch.unchanged},
                "changes": ch.records[:LIST_LIMIT]}
    else:
        notes.append("no run yet: 'nodekeep solve' makes one")
    if last is None:
        notes.append("nothing delivered yet")
    awaiting, orphans = harvest["awaiting"], harvest["nodes_without_deployment"]
    return SurveyStatus(
        survey=sdict, loaded=harvest["counts"], inputs=inputs,
        awaiting_harvest={"deployments": harvest["counts"]["n_awaiting"],
                          "nodes": harvest["counts"]["n_awaiting_nodes"],
                          "list": awaiting},
        nodes_without_deployment={"nodes": len(orphans), "list": orphans[:LIST_LIMIT]},
        run=run_info, review=review, delivery=delivery, notes=notes)


def _when(t: datetime | None) -> str:
    return t.strftime("%Y-%m-%d %H:%M UTC") if t else "-"


def status_text(st: SurveyStatus) -> str:
    """The status for people, a few lines per section."""
    from archive.survey.keys import station_text

    ld = st.loaded
    lines = [f"survey    {st.survey['name']} ({st.survey['crs']})",
             f"loaded    {ld['n_logs']:,} log(s) from {ld['n_nodes']:,} node(s), "
             f"{ld['n_fixes']:,} fixes ({ld['n_usable_fixes']:,} usable), fixes "
             f"{_when(ld['first_fix'])} to {_when(ld['last_fix'])}; last received "
             f"{_when(ld['last_received'])}"]
    if ld["n_logs"] > ld["n_logs_with_fixes"]:
        lines.append(f"          {ld['n_logs'] - ld['n_logs_with_fixes']:,} log(s) hold no "
                     "usable fix ('nodekeep logs' says why)")
    lines.append("inputs    " + (", ".join(
        f"{i['kind']} v{i['version']} "
        + (f"({i['rows']:,} rows)" if i.get("table", True) else f"({i['name']})")
        for i in st.inputs) or "none loaded"))
    aw = st.awaiting_harvest
    lines.append(f"harvest   {aw['deployments']:,} deployment(s) of {aw['nodes']:,} node(s) "
                 "awaiting harvest (no loaded log covers the window)")
    for d in aw["list"]:
        lines.append(f"            node {d['node']} at {station_text(d['line'], d['point'], d['index'])}"
                     f", deployed {_when(d['deployed'])}, "
                     + (f"retrieved {_when(d['retrieved'])}" if d["retrieved"] else "still out"))
    if aw["deployments"] > len(aw["list"]):
        lines.append(f"            ... and {aw['deployments'] - len(aw['list']):,} more (--json)")
    nw = st.nodes_without_deployment
    lines.append(f"          {nw['nodes']:,} logged node(s) without a deployment"
                 + (": " + ", ".join(f"{n['node']} ({n['n_logs']:,} log(s), {n['n_fixes']:,} fixes)"
                                     for n in nw["list"]) if nw["list"] else ""))
    if st.run:
        r = st.run
        state = ("up to date with the inputs" if r["up_to_date"] else
                 "inputs changed since: " + "; ".join(r["inputs_changed"]))
        lines.append(f"run       {r['id'][:12]} ({_when(r['created_at'])}"
                     + (f", {r['label']}" if r["label"] else "")
                     + f"): {r['positions']:,} positions; {state}")
    if st.review:
        rv = st.review
        per = ", ".join(f"{k} {v:,}" for k, v in rv["open_per_flag"].items())
        lines.append(f"review    {rv['n_waiting']:,} station(s) wait for review"
                     + (f" ({per}; counted by station)" if per else "")
                     + f"; {rv['n_decided']:,} decided ('nodekeep review list' shows them)")
    if st.delivery:
        d, since = st.delivery, st.delivery["since"]
        lines.append(f"delivery  #{d['id']} {d['format']} {d['file_name']} to {d['recipient']} "
                     f"({_when(d['at'])}); since then: {since['new']:,} new, "
                     f"{since['moved']:,} moved ({since['moved_beyond_shift']:,} by more than "
                     f"{d['shift_m']:g} m), {since['height']:,} other height, {since['node']:,} "
                     f"other node, {since['time']:,} other time, {since['flags']:,} other flags, "
                     f"{since['edited']:,} edited, {since['removed']:,} no longer delivered")
        if since["records"]:
            lines.append(f"          'nodekeep deliver ... --changed-since {d['id']}' writes "
                         f"those {since['records']:,} record(s)")
    lines += [f"note      {n}" for n in st.notes]
    return "\n".join(lines)
