"""``nodekeep trace``, ``reproduce``, ``diff`` and ``where``: read-only lineage views."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from archive.cli.options import (
    CliState,
    force_option,
    occupation_options,
    output_options,
    pass_state,
    survey_option,
)
from archive.cli.output import emit, table
from archive.survey.keys import station_text


def _f(v: Any, fmt: str = "{:.3f}") -> str:
    return "-" if v is None else fmt.format(v)


def _when(v: Any) -> str:
    return "-" if v is None else v.strftime("%Y-%m-%d %H:%M:%S UTC")


def _run_text(r: dict[str, Any]) -> list[str]:
    out = [f"run {r['id']}  ({r['label'] or 'no label'}) by {r['created_by']} at "
           f"{_when(r['created_at'])}, nodekeep {r['code_version']}",
           f"  parameters: {r['params']}"]
    out += [f"  input {i['kind']}: v{i['version']} {i['name']} (sha256 {i['hash'][:16]}…) "
            f"loaded {_when(i['loaded_at'])} by {i['loaded_by']}" for i in r["inputs"]]
    return out


def _raw_text(raw: list[dict[str, Any]]) -> list[str]:
    from archive.ingest.rollover import note_text

    out = []
    for r in raw:
        out.append(f"  {r['name']}  node {r['node']}  sha256 {r['hash']}  received "
                   f"{_when(r['received_at'])} by {r['received_by']}")
        out += [f"    note: {note_text(n)}" for n in r.get("notes", [])]
    return out


def _edits_text(edits: list[dict[str, Any]]) -> list[str]:
    return [f"  edit {e['id']} {e['kind']} index {e['index']} {e['payload'] or ''} by "
            f"{e['created_by']} at "
            f"{_when(e['created_at'])}: {e['reason']}"
            + ("" if e.get("in_force", True) else " (no longer in force)") for e in edits]


def _occupation_text(o: dict[str, Any], run_id: str = "") -> list[str]:
    out = [f"occupation index {o['index']}: node {o['node']}, {_window(o)}"]
    if o["delivery"]:
        out += _delivered_text(o["delivery"], o["deliveries"], "  ")
    else:
        out.append("  never delivered")
    for p in o.get("parts_delivered") or []:  # a moved node's later part, its own index
        out.append(f"  part delivered as index {p['index']}:")
        out += _delivered_text(p["delivery"], p["deliveries"], "    ")
    for s in o["solution"]:
        out.append(f"  solved part {s['part']} node {s['node']}: E {_f(s['easting'])} "
                   f"N {_f(s['northing'])} r95 {_f(s['r95'], '{:.2f}')} m, window "
                   f"{_when(s['t_start'])} to {_when(s['t_end'])}, flags {s['flags'] or 'none'}"
                   + (_delivered_as(s) if s["delivered"] else "")
                   + (" (from the settle-margin fixes)" if s.get("from_margins") else "")
                   + (f"; solved in earlier run {s['solved_by'][:12]}, inputs unchanged"
                      if s.get("solved_by") and s["solved_by"] != run_id else ""))
    fx = o["fixes"]
    out.append("  fixes in its window, all parts: "
               + (", ".join(f"{k} {v}" for k, v in fx.items()) or "none"))
    out += [f"    part {p['part']} node {p['node']}: used {p['used']}, rejected "
            f"{p['rejected']}, screened {p['screened']}"
            + (_delivered_as(p) if p["delivered"] else "") for p in o["fixes_by_part"]]
    out.append(f"  raw files ({len(o['raw_files'])}):")
    out += ["  " + line for line in _raw_text(o["raw_files"])]
    return out


def _delivered_text(d: dict[str, Any], history: list[dict[str, Any]], pad: str) -> list[str]:
    """The latest delivery of a record and the deliveries that carried it."""
    p = d["position"]
    return [f"{pad}last delivered in delivery {d['id']} ({d['format']}, {d['file_name']}, "
            f"to {d['recipient']}, {_when(d['created_at'])} by {d['created_by']}): "
            f"E {_f(p['easting'])} N {_f(p['northing'])} H {_f(p['height'])} "
            f"source {p['source']}",
            f"{pad}delivered {len(history)} time(s): " + ", ".join(str(x["id"]) for x in history)]


def _delivered_as(part: dict[str, Any]) -> str:
    """' (delivered as index 2)', or ' (delivered part)' when the index is not known."""
    k = part.get("index")
    return f" (delivered as index {k})" if k is not None else " (delivered part)"


def _station_text(t: dict[str, Any]) -> str:
    st = t["station"]
    occs = t["occupations"]
    parts = sum(1 for o in occs if o.get("parts_delivered"))  # one later part a moved node
    out = [f"station {station_text(st['line'], st['point'])}: {len(occs)} occupation(s)"
           + (" (each delivered under its own point index)" if len(occs) > 1 else "")
           + (f"; {parts} later part(s) of a moved node delivered under an index of their "
              "own" if parts else "")]
    out += _run_text(t["run"])
    for o in occs:
        out += _occupation_text(o, t["run"].get("id", ""))
    out.append(f"edits ({len(t['edits'])}):")
    out += _edits_text(t["edits"])
    return "\n".join(out)


def _write_prov(arc: Any, path: str, to: Path, force: bool) -> dict[str, Any]:
    """Write the PROV-JSON of the delivery that wrote ``path``; what was written."""
    from archive.lineage.prov import delivery_provenance
    from archive.store.outfiles import check_target, write_file

    check_target(to, force)
    prov = delivery_provenance(arc, path)
    write_file(to, prov.json_text().encode("utf-8"))
    return {"path": str(to), **prov.counts()}


def _file_text(t: dict[str, Any]) -> str:
    d = t["delivery"]
    out = [f"{t['file']['path']}: delivery {d['id']} ({d['format']}) to {d['recipient']} at "
           f"{_when(d['created_at'])} by {d['created_by']}, {t['n_stations']} stations",
           f"  sha256 {t['file']['hash']}", f"  note: {d['note'] or '-'}"]
    out += _run_text(t["run"])
    out.append(f"raw files ({len(t['raw_files'])}):")
    out += _raw_text(t["raw_files"])
    out.append(f"edits in force ({len(t['edits'])}):")
    out += _edits_text(t["edits"])
    if t.get("prov"):
        p = t["prov"]
        out.append(f"wrote W3C PROV-JSON {p['path']}: {p['entity']} entities, {p['activity']} "
                   f"activities, {p['agent']} agents, {p['relations']} relations")
    return "\n".join(out)


@click.command()
@click.argument("line", type=float, required=False)
@click.argument("point", type=float, required=False)
@occupation_options
@click.option("--file", "path", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Trace a delivered file (found by its SHA-256) instead of a station.")
@click.option("--prov", "prov_to", type=click.Path(dir_okay=False, path_type=Path),
              default=None, metavar="OUT.json",
              help="With --file: also write the delivery's lineage as W3C PROV-JSON.")
@force_option
@survey_option
@output_options
@pass_state
def trace(state: CliState, line: float | None, point: float | None, index: int | None,
          node: str | None, path: str | None, prov_to: Path | None, force: bool,
          survey_name: str | None) -> None:
    """The whole chain behind station LINE POINT (every occupation, or the one --index /
    --node choose), or behind a delivered --file (and, with --prov, that chain as W3C
    PROV-JSON for other tools)."""
    from archive.errors import UsageError

    arc = state.archive()
    if prov_to is not None and path is None:
        raise UsageError("--prov describes a delivered file: give it with --file FILE",
                         hint="e.g. nodekeep trace --file receivers.sps --prov receivers.prov.json")
    if path is not None:
        if line is not None:
            raise UsageError("give either LINE POINT or --file, not both")
        from archive.lineage.trace import trace_file

        t = trace_file(arc, path)
        if prov_to is not None:
            t["prov"] = _write_prov(arc, path, prov_to, force)
        emit(state, t, lambda: _file_text(t))
        return
    if line is None or point is None:
        raise UsageError("trace needs LINE POINT or --file FILE")
    from archive.lineage.trace import trace_station

    t = trace_station(arc, state.survey_id(survey_name), line, point, index, node=node)
    emit(state, t, lambda: _station_text(t))


@click.command()
@click.argument("run_ref", metavar="RUN")
@survey_option
@output_options
@pass_state
def reproduce(state: CliState, run_ref: str, survey_name: str | None) -> None:
    """Recompute RUN from its archived inputs and say whether it is identical."""
    from archive.lineage.reproduce import reproduce as run

    r = run(state.archive(), run_ref, state.survey_id(survey_name))
    lines = [f"run {r['run'][:12]}: " + ("identical (same positions digest "
                                          f"{r['recorded_digest'][:16]}…)" if r["identical"]
                                          else "NOT identical")]
    if not r["identical"]:
        w = r.get("worst_station")
        lines.append(f"  {r['what_differs']}")
        lines.append(f"  {r['n_differing']} row(s) differ; largest horizontal difference "
                     f"{r['max_difference']:.6g} m"
                     + (f" at {station_text(w['line'], w['point'])}" if w else "")
                     + f", largest vertical difference {r['max_vertical']:.6g} m")
    if r["code_version_differs"]:
        lines.append(f"  note: the run was made by nodekeep {r['run_code_version']}, this is "
                     f"{r['current_code_version']}")
    emit(state, r, "\n".join(lines))


@click.command()
@click.argument("run_a", metavar="RUN_A")
@click.argument("run_b", metavar="RUN_B")
@click.option("--threshold", type=float, default=1.0, show_default=True, metavar="M",
              help="List occupations that moved more than M metres.")
@click.option("--station", default=None, metavar="LINE:POINT",
              help="Compare only this station (with --index / --node: one occupation).")
@occupation_options
@survey_option
@output_options
@pass_state
def diff(state: CliState, run_a: str, run_b: str, threshold: float, station: str | None,
         index: int | None, node: str | None, survey_name: str | None) -> None:
    """Per-occupation movement from RUN_A to RUN_B (paired by line, point and point index)."""
    from archive.errors import UsageError
    from archive.lineage.diff import diff_runs

    where = None
    if station is not None:
        try:
            a, b = station.split(":")
            where = (float(a), float(b))
        except ValueError:
            raise UsageError(f"--station {station!r} is not LINE:POINT",
                             hint="e.g. --station 1001:5002") from None
    d = diff_runs(state.archive(), run_a, run_b, threshold, state.survey_id(survey_name),
                  station=where, index=index, node=node)

    def text() -> str:
        return _diff_text(d, threshold)

    emit(state, d, text)


def _keys(rows: list[dict[str, Any]], limit: int = 50) -> str:
    names = [station_text(x["line"], x["point"], x["index"])
             + (f" (node {x['node']})" if x.get("node") else "") for x in rows[:limit]]
    return ", ".join(names) + (f" and {len(rows) - limit} more" if len(rows) > limit else "")


def _diff_text(d: dict[str, Any], threshold: float) -> str:
    """The readable form of a run comparison."""
    s = d["summary"]
    out = [f"{d['run_a'][:12]} -> {d['run_b'][:12]}: {s['n_common']} occupations in both "
           "runs (paired by line, point and point index), "
           f"{s['n_compared']} with a position in both"]
    if s.get("n_compared"):
        out.append(f"horizontal movement (m): mean {s['mean']:.3f}, median "
                   f"{s['median']:.3f}, 95th percentile {s['p95']:.3f}, rms "
                   f"{s['rms']:.3f}, max {s['max']:.3f}")
    out.append(f"{len(d['beyond'])} occupation(s) moved more than {threshold:g} m")
    if d["beyond"]:
        out.append(table([(f"{b['line']:g}", f"{b['point']:g}", b["index"],
                           b.get("node") or "", f"{b['de']:+.3f}", f"{b['dn']:+.3f}",
                           f"{b['moved']:.3f}", _f(b["dh"], "{:+.3f}"))
                          for b in d["beyond"][:200]],
                         ["line", "point", "idx", "node", "dE", "dN", "moved", "dH"]))
    for key, what in (("lost_position", "lost their position (none in the second run)"),
                      ("gained_position", "gained a position (none in the first run)")):
        if d[key]:
            out.append(f"{len(d[key])} {what}: {_keys(d[key])}")
    if d["reassigned"]:
        out.append(f"{len(d['reassigned'])} re-assigned (another node or occupation): "
                   + ", ".join(f"{station_text(r['line'], r['point'], r['index'])} node "
                               f"{r['node_a']} -> {r['node_b']}"
                               + (f", occupation {r['occupation_a']} -> {r['occupation_b']}"
                                  if r["occupation_a"] != r["occupation_b"] else "")
                               for r in d["reassigned"][:50]))
    for key, what in (("added", "gained (second run only)"),
                      ("removed", "lost (first run only)")):
        out.append(f"{what}: {len(d[key])}" + (f": {_keys(d[key])}" if d[key] else ""))
    return "\n".join(out)


def _window(d: dict[str, Any]) -> str:
    start = _when(d.get("deployed"))
    end = "still deployed" if d.get("retrieved") is None else _when(d["retrieved"])
    return f"{start} to {end}" if d.get("deployed") is not None else "window not recorded"


def _held_text(d: dict[str, Any]) -> str:
    """' (the file holds E .. N .. H ..)' for a format that rounds, else ''."""
    held = d.get("as_delivered") or {}
    places = held.get("decimals")
    if not places:
        return ""
    return " (the file holds " + " ".join(
        f"{k} {held[n]:.{places[n]}f}" if held.get(n) is not None else f"{k} -"
        for k, n in (("E", "easting"), ("N", "northing"), ("H", "height"))) + ")"


def _record_text(d: dict[str, Any]) -> str:
    return (f"E {_f(d['easting'])} N {_f(d['northing'])} H {_f(d['height'])}{_held_text(d)} "
            f"(source {d['source']}) in delivery {d['id']} ({d['format']}, {d['file_name']}, "
            f"to {d['recipient']}, {_when(d['created_at'])}, sha256 {d['file_hash'][:16]}…)")


def _where_text(w: dict[str, Any]) -> str:
    st = w["station"]
    name = f"station {station_text(st['line'], st['point'])}"
    when = f" as of {_when(w['as_of'])}" if w["as_of"] else ""
    occs = w["occupations"]
    if not occs:
        return "\n".join([f"{name} had not been delivered{when}"]
                         + [f"  note: {n}" for n in w["notes"]])
    out = []
    if w["at"] is not None:
        d = w["delivered"]
        if d is None:
            near = "; ".join(
                f"index {n['index']} (node {n['node']}) ended {_when(n['ended'])}"
                if "ended" in n else
                f"index {n['index']} (node {n['node']}) started {_when(n['started'])}"
                for n in w["nearest"])
            return (f"{name}{when}: no delivered occupation was in the ground at "
                    f"{_when(w['at'])}" + (f"; nearest: {near}" if near else ""))
        out.append(f"{name} index {d['index']} (node {d['node']}, {_window(d)}) held "
                   f"{_when(w['at'])}{when}: {_record_text(d)}")
    elif len(occs) == 1:
        d = w["delivered"]
        out.append(f"{name} index {d['index']} (node {d['node']}, {_window(d)}){when}: "
                   f"{_record_text(d)}")
    else:
        out.append(f"{name}{when}: {len(occs)} occupations, each delivered under its own "
                   "point index (choose one with --index, --node or --at TIME)")
        for o in occs:
            d = o["delivered"]
            out.append(f"  index {o['index']}: node {d['node']}, {_window(d)}: "
                       f"{_record_text(d)}")
    out += [f"  note: {n}" for n in w["notes"]]
    for o in occs:
        if w["at"] is not None and (w["delivered"] or {}).get("index") != o["index"]:
            continue
        for e in reversed(o["history"][:-1]):
            out.append(f"  earlier (index {o['index']}): delivery {e['id']} ({e['format']}, "
                       f"{e['file_name']}, {_when(e['created_at'])}): E {_f(e['easting'])} "
                       f"N {_f(e['northing'])} H {_f(e['height'])}{_held_text(e)}")
    return "\n".join(out)


@click.command()
@click.argument("line", type=float)
@click.argument("point", type=float)
@occupation_options
@click.option("--at", "at", default=None, metavar="TIME",
              help="ISO 8601 UTC time (e.g. a shot time): the occupation in the ground then.")
@click.option("--as-of", "as_of", default=None, metavar="DATE",
              help="ISO 8601 date (end of that day, UTC) or time; default now.")
@survey_option
@output_options
@pass_state
def where(state: CliState, line: float, point: float, index: int | None, node: str | None,
          at: str | None, as_of: str | None, survey_name: str | None) -> None:
    """The coordinates delivered for station LINE POINT as of a date, and in which delivery:
    every occupation, the one --index / --node choose, or the one in the ground --at a time."""
    from archive.lineage.where import where as run

    w = run(state.archive(), state.survey_id(survey_name), line, point, index, as_of,
            node=node, at=at)
    emit(state, w, lambda: _where_text(w))
