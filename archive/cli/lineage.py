"""``nodekeep trace``, ``reproduce``, ``diff`` and ``where``: read-only lineage views."""

from __future__ import annotations

from typing import Any

import click

from archive.cli.options import CliState, output_options, pass_state, survey_option
from archive.cli.output import emit, table


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
    return [f"  edit {e['id']} {e['kind']} {e['payload'] or ''} by {e['created_by']} at "
            f"{_when(e['created_at'])}: {e['reason']}"
            + ("" if e.get("in_force", True) else " (no longer in force)") for e in edits]


def _station_text(t: dict[str, Any]) -> str:
    st = t["station"]
    out = [f"station {st['line']:g}/{st['point']:g} index {st['index']}"]
    d = t["delivery"]
    if d:
        p = d["position"]
        out.append(f"last delivered in delivery {d['id']} ({d['format']}, {d['file_name']}, "
                   f"to {d['recipient']}, {_when(d['created_at'])} by {d['created_by']}): "
                   f"E {_f(p['easting'])} N {_f(p['northing'])} H {_f(p['height'])} "
                   f"source {p['source']}")
        out.append(f"delivered {len(t['deliveries'])} time(s): "
                   + ", ".join(str(x["id"]) for x in t["deliveries"]))
    else:
        out.append("never delivered")
    out += _run_text(t["run"])
    for s in t["solution"]:
        out.append(f"  solved part {s['part']} node {s['node']}: E {_f(s['easting'])} "
                   f"N {_f(s['northing'])} r95 {_f(s['r95'], '{:.2f}')} m, window "
                   f"{_when(s['t_start'])} to {_when(s['t_end'])}, flags {s['flags'] or 'none'}"
                   + (" (delivered part)" if s["delivered"] else ""))
    fx = t["fixes"]
    out.append("fixes in the station's windows, all parts: "
               + (", ".join(f"{k} {v}" for k, v in fx.items()) or "none"))
    out += [f"  part {p['part']} node {p['node']}: used {p['used']}, rejected "
            f"{p['rejected']}, screened {p['screened']}"
            + (" (delivered part)" if p["delivered"] else "") for p in t["fixes_by_part"]]
    out.append(f"raw files ({len(t['raw_files'])}):")
    out += _raw_text(t["raw_files"])
    out.append(f"edits ({len(t['edits'])}):")
    out += _edits_text(t["edits"])
    return "\n".join(out)


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
    return "\n".join(out)


@click.command()
@click.argument("line", type=float, required=False)
@click.argument("point", type=float, required=False)
@click.option("--index", type=int, default=1, show_default=True, help="SPS point index.")
@click.option("--file", "path", type=click.Path(exists=True, dir_okay=False), default=None,
              help="Trace a delivered file (found by its SHA-256) instead of a station.")
@survey_option
@output_options
@pass_state
def trace(state: CliState, line: float | None, point: float | None, index: int,
          path: str | None, survey_name: str | None) -> None:
    """The whole chain behind station LINE POINT, or behind a delivered --file."""
    from archive.errors import UsageError

    arc = state.archive()
    if path is not None:
        if line is not None:
            raise UsageError("give either LINE POINT or --file, not both")
        from archive.deliver.lineage import trace_file

        t = trace_file(arc, path)
        emit(state, t, lambda: _file_text(t))
        return
    if line is None or point is None:
        raise UsageError("trace needs LINE POINT or --file FILE")
    from archive.deliver.lineage import trace_station

    t = trace_station(arc, state.survey_id(survey_name), line, point, index)
    emit(state, t, lambda: _station_text(t))


@click.command()
@click.argument("run_ref", metavar="RUN")
@survey_option
@output_options
@pass_state
def reproduce(state: CliState, run_ref: str, survey_name: str | None) -> None:
    """Recompute RUN from its archived inputs and say whether it is identical."""
    from archive.deliver.compare import reproduce as run

    r = run(state.archive(), run_ref, state.survey_id(survey_name))
    lines = [f"run {r['run'][:12]}: " + ("identical (same positions digest "
                                          f"{r['recorded_digest'][:16]}…)" if r["identical"]
                                          else "NOT identical")]
    if not r["identical"]:
        w = r.get("worst_station")
        lines.append(f"  {r['what_differs']}")
        lines.append(f"  {r['n_differing']} row(s) differ; largest horizontal difference "
                     f"{r['max_difference']:.6g} m"
                     + (f" at {w['line']:g}/{w['point']:g}" if w else "")
                     + f", largest vertical difference {r['max_vertical']:.6g} m")
    if r["code_version_differs"]:
        lines.append(f"  note: the run was made by nodekeep {r['run_code_version']}, this is "
                     f"{r['current_code_version']}")
    emit(state, r, "\n".join(lines))


@click.command()
@click.argument("run_a", metavar="RUN_A")
@click.argument("run_b", metavar="RUN_B")
@click.option("--threshold", type=float, default=1.0, show_default=True, metavar="M",
              help="List stations that moved more than M metres.")
@survey_option
@output_options
@pass_state
def diff(state: CliState, run_a: str, run_b: str, threshold: float,
         survey_name: str | None) -> None:
    """Per-station movement from RUN_A to RUN_B."""
    from archive.deliver.compare import diff_runs

    d = diff_runs(state.archive(), run_a, run_b, threshold, state.survey_id(survey_name))

    def text() -> str:
        s = d["summary"]
        out = [f"{d['run_a'][:12]} -> {d['run_b'][:12]}: {s['n_common']} common stations"]
        if s.get("n_compared"):
            out.append(f"horizontal movement (m): mean {s['mean']:.3f}, median "
                       f"{s['median']:.3f}, 95th percentile {s['p95']:.3f}, rms "
                       f"{s['rms']:.3f}, max {s['max']:.3f}")
        out.append(f"{len(d['beyond'])} station(s) moved more than {threshold:g} m")
        if d["beyond"]:
            out.append(table([(f"{b['line']:g}", f"{b['point']:g}", b["index"],
                               f"{b['de']:+.3f}", f"{b['dn']:+.3f}", f"{b['moved']:.3f}",
                               _f(b["dh"], "{:+.3f}")) for b in d["beyond"][:200]],
                             ["line", "point", "idx", "dE", "dN", "moved", "dH"]))
        for what in ("added", "removed"):
            st = d[what]
            out.append(f"{what}: {len(st)}" + (": " + ", ".join(
                f"{x['line']:g}/{x['point']:g}" for x in st[:50]) if st else ""))
        return "\n".join(out)

    emit(state, d, text)


@click.command()
@click.argument("line", type=float)
@click.argument("point", type=float)
@click.option("--index", type=int, default=1, show_default=True, help="SPS point index.")
@click.option("--as-of", "as_of", default=None, metavar="DATE",
              help="ISO 8601 date (end of that day, UTC) or time; default now.")
@survey_option
@output_options
@pass_state
def where(state: CliState, line: float, point: float, index: int, as_of: str | None,
          survey_name: str | None) -> None:
    """The coordinate delivered for station LINE POINT as of a date, and in which delivery."""
    from archive.deliver.compare import where as run

    w = run(state.archive(), state.survey_id(survey_name), line, point, index, as_of)

    def text() -> str:
        when = f" as of {_when(w['as_of'])}" if w["as_of"] else ""
        d = w["delivered"]
        if d is None:
            return f"station {line:g}/{point:g} had not been delivered{when}"
        return (f"station {line:g}/{point:g}{when}: E {_f(d['easting'])} N {_f(d['northing'])} "
                f"H {_f(d['height'])} (source {d['source']}) in delivery {d['id']} "
                f"({d['format']}, {d['file_name']}, to {d['recipient']}, "
                f"{_when(d['created_at'])}, sha256 {d['file_hash'][:16]}…)"
                + "".join(f"\n  earlier: delivery {e['id']} ({e['format']}, {e['file_name']}, "
                          f"{_when(e['created_at'])}): E {_f(e['easting'])} "
                          f"N {_f(e['northing'])} H {_f(e['height'])}"
                          for e in reversed(w["history"][:-1])))

    emit(state, w, text)
