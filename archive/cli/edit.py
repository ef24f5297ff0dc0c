"""``nodekeep edit set-position|set-height|exclude|reject|ack|undo`` and ``nodekeep edits``."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import click

from archive.cli.options import CliState, output_options, pass_state, survey_option
from archive.cli.output import emit, table
from archive.edits.kinds import SOURCES
from archive.survey.keys import station_text


def _station(f: Callable[..., Any]) -> Callable[..., Any]:
    f = click.option("--index", "index", type=click.IntRange(1, 127), default=None,
                     help="Point index of the occupation (needed when the station was "
                          "occupied more than once; default: its only occupation).")(f)
    f = click.argument("point", type=float)(f)
    return click.argument("line", type=float)(f)


def _node(f: Callable[..., Any]) -> Callable[..., Any]:
    return click.option("--node", default=None, metavar="SERIAL",
                        help="Choose the occupation by the node deployed there.")(f)


reason_option = click.option("--reason", default=None, metavar="TEXT",
                             help="Why (required: kept with the edit for good).")


def _done(state: CliState, e: Any) -> None:
    from archive.edits.log import edit_dict

    d = edit_dict(e)
    occ = d["payload"].get("occupation") or {}
    where = station_text(d["line"], d["point"], d["index"])
    if occ.get("node") or d["payload"].get("node"):
        where += f" (node {occ.get('node') or d['payload'].get('node')})"
    sup = f", supersedes edit {d['supersedes']}" if d["supersedes"] else ""
    what = ", ".join(f"{k}={v}" for k, v in d["payload"].items()
                     if k not in ("input", "occupation"))
    emit(state, d, f"edit {d['id']} ({d['kind']}) on {where}{sup}" + (f": {what}" if what else ""))


@click.group()
def edit() -> None:
    """Record a manual decision on a station (immutable, with a reason)."""


@edit.command("set-position")
@_station
@_node
@click.option("--from", "source", type=click.Choice(list(SOURCES)), default="given", show_default=True,
              help="Take the position from the station's check point, its preplot, or "
                   "--easting/--northing.")
@click.option("--easting", type=float, default=None, help="Grid easting (with --from given).")
@click.option("--northing", type=float, default=None, help="Grid northing (with --from given).")
@reason_option
@survey_option
@output_options
@pass_state
def set_position(state: CliState, line: float, point: float, index: int | None,
                 node: str | None, source: str, easting: float | None,
                 northing: float | None, reason: str | None, survey_name: str | None) -> None:
    """Set the delivered position of an occupation of station LINE POINT."""
    from archive.edits.decisions import set_position as run

    _done(state, run(state.archive(write=True), state.survey_id(survey_name), line, point, index,
                     reason=reason, source=source, easting=easting, northing=northing,
                     node=node))


@edit.command("set-height")
@_station
@_node
@click.option("--from", "source", type=click.Choice(list(SOURCES)), default="given", show_default=True,
              help="Take the height from the check point, the preplot, or --height.")
@click.option("--height", type=float, default=None, help="Height in the survey's vertical datum.")
@reason_option
@survey_option
@output_options
@pass_state
def set_height(state: CliState, line: float, point: float, index: int | None,
               node: str | None, source: str, height: float | None, reason: str | None,
               survey_name: str | None) -> None:
    """Set the delivered height of an occupation of station LINE POINT."""
    from archive.edits.decisions import set_height as run

    _done(state, run(state.archive(write=True), state.survey_id(survey_name), line, point, index,
                     reason=reason, source=source, height=height, node=node))


@edit.command("exclude")
@_station
@click.option("--node", required=True, metavar="SERIAL",
              help="Node whose fixes to leave out (it chooses the occupation).")
@click.option("--start", required=True, metavar="TIME", help="Start, ISO 8601 UTC (…Z).")
@click.option("--end", required=True, metavar="TIME", help="End, ISO 8601 UTC (…Z).")
@reason_option
@survey_option
@output_options
@pass_state
def exclude(state: CliState, line: float, point: float, index: int | None, node: str,
            start: str,
            end: str, reason: str | None, survey_name: str | None) -> None:
    """Leave a span of a node's fixes out of the next solve of station LINE POINT."""
    from archive.edits.decisions import exclude_span

    _done(state, exclude_span(state.archive(write=True), state.survey_id(survey_name), line, point,
                              index, node=node, start=start, end=end, reason=reason))


@edit.command("reject")
@_station
@_node
@reason_option
@survey_option
@output_options
@pass_state
def reject(state: CliState, line: float, point: float, index: int | None, node: str | None,
           reason: str | None, survey_name: str | None) -> None:
    """Do not deliver an occupation of station LINE POINT."""
    from archive.edits.decisions import reject_station

    _done(state, reject_station(state.archive(write=True), state.survey_id(survey_name), line, point,
                                index, reason=reason, node=node))


@edit.command("ack")
@_station
@_node
@click.option("--flag", required=True, metavar="NAME", help="The review flag acknowledged.")
@reason_option
@survey_option
@output_options
@pass_state
def ack(state: CliState, line: float, point: float, index: int | None, node: str | None,
        flag: str, reason: str | None, survey_name: str | None) -> None:
    """Acknowledge a review flag of an occupation of station LINE POINT (it no longer
    blocks delivery)."""
    from archive.review.acknowledge import ack_flag

    _done(state, ack_flag(state.archive(write=True), state.survey_id(survey_name), line, point, index,
                          flag=flag, reason=reason, node=node))


@edit.command("undo")
@click.argument("edit_id", type=int)
@reason_option
@survey_option
@output_options
@pass_state
def undo(state: CliState, edit_id: int, reason: str | None, survey_name: str | None) -> None:
    """Take edit EDIT_ID out of force (recorded as a new edit)."""
    from archive.edits.decisions import undo as run

    _done(state, run(state.archive(write=True), state.survey_id(survey_name), edit_id, reason=reason))


@click.command()
@click.option("--all", "all_edits", is_flag=True, help="Also edits no longer in force.")
@click.option("--line", type=float, default=None, help="Only this line.")
@click.option("--point", type=float, default=None, help="Only this point.")
@survey_option
@output_options
@pass_state
def edits(state: CliState, all_edits: bool, line: float | None, point: float | None,
          survey_name: str | None) -> None:
    """List the edits in force (or all of them)."""
    from archive.edits.log import list_edits

    rows = list_edits(state.archive(), state.survey_id(survey_name), all_edits=all_edits,
                      line=line, point=point)

    def text() -> str:
        if not rows:
            return "no edits" + ("" if all_edits else " in force")
        def node(r: dict[str, Any]) -> str:
            p = r["payload"] or {}
            return str((p.get("occupation") or {}).get("node") or p.get("node") or "")

        return table([(r["id"], r["kind"], f"{r['line']:g}", f"{r['point']:g}", r["index"],
                       node(r), "yes" if r["in_force"] else "no", r["supersedes"] or "",
                       r["created_at"].strftime("%Y-%m-%d %H:%M"), r["created_by"],
                       r["reason"][:50]) for r in rows],
                     ["id", "kind", "line", "point", "idx", "node", "in force", "supersedes",
                      "UTC", "by", "reason"])

    emit(state, rows, text)
