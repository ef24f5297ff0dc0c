"""``nodekeep fixes`` (export one node's fixes) and ``nodekeep logs`` (list raw logs)."""

from __future__ import annotations

import datetime as dt

import click

from archive.cli.options import (
    CliState,
    force_option,
    output_options,
    pass_state,
    survey_option,
)
from archive.cli.output import emit, human_bytes, table


def _time(value: str | None, name: str) -> dt.datetime | None:
    from archive.errors import UsageError

    if value is None:
        return None
    try:
        t = dt.datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        raise UsageError(f"{name} {value!r} is not an ISO 8601 time",
                         hint="e.g. 2024-03-01T06:00:00Z") from None
    return t if t.tzinfo else t.replace(tzinfo=dt.UTC)


@click.command("fixes")
@click.argument("serial")
@click.option("--start", default=None, metavar="T", help="First time (ISO 8601, UTC if no zone).")
@click.option("--end", default=None, metavar="T", help="End time, excluded (ISO 8601).")
@click.option("--to", "to", required=True, type=click.Path(dir_okay=False),
              help="Output FILE.csv or FILE.parquet.")
@force_option
@survey_option
@output_options
@pass_state
def fixes(state: CliState, serial: str, start: str | None, end: str | None, to: str,
          force: bool, survey_name: str | None) -> None:
    """Write the fixes of node SERIAL (all its raw files, one fix per time) to a file."""
    from archive.ingest.read import node_fixes, write_fixes

    arc = state.archive()
    survey_id = state.survey_id(survey_name)
    t = node_fixes(arc, survey_id, serial, _time(start, "--start"), _time(end, "--end"))
    path = write_fixes(t, to, force=force)
    emit(state, {"node": serial, "n_fixes": t.num_rows, "path": str(path)},
         f"wrote {t.num_rows} fixes of node {serial} to {path}")


@click.command("logs")
@click.option("--node", default=None, metavar="SERIAL", help="Only the logs of this node.")
@survey_option
@output_options
@pass_state
def logs(state: CliState, node: str | None, survey_name: str | None) -> None:
    """List the raw fix logs loaded into the survey: line counts, fixes (and those without
    quality information), rejects by reason, lines not used by sentence type, and notes
    such as a GPS week rollover corrected or refused."""
    from archive.ingest.read import list_raw_files

    arc = state.archive()
    survey_id = state.survey_id(survey_name)
    rows = list_raw_files(arc, survey_id, node)

    def text() -> str:
        from archive.ingest.rollover import note_text

        if not rows:
            return "no raw fix logs loaded yet"
        body = [(r["node"], r["name"], human_bytes(r["size"]), r["n_lines"], r["n_fixes"],
                 r["n_valid"], r["n_no_quality"], r["n_rejected"],
                 ", ".join(f"{k} {v}" for k, v in r["rejects"].items()),
                 r["t_first"].strftime("%Y-%m-%d %H:%M") if r["t_first"] else "",
                 r["t_last"].strftime("%Y-%m-%d %H:%M") if r["t_last"] else "",
                 r["raw_hash"][:12]) for r in rows]
        out = [table(body, ["node", "file", "size", "lines", "fixes", "valid", "no quality",
                            "rejected", "rejects by reason", "first (UTC)", "last (UTC)",
                            "raw"])]
        ignored = [(r["node"], r["name"], r["n_ignored"],
                    ", ".join(f"{k} {v}" for k, v in r["ignored"].items()))
                   for r in rows if r["ignored"]]
        if ignored:
            out.append("\nlines not used, by sentence type:\n"
                       + table(ignored, ["node", "file", "ignored", "by type"]))
        notes = [f"  {r['node']} {r['name']}: {note_text(n)}" for r in rows for n in r["notes"]]
        if notes:
            out.append("\nnotes:\n" + "\n".join(notes))
        return "\n".join(out)

    emit(state, rows, text)
