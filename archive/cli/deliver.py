"""``nodekeep deliver``: write final positions in an exchange format and record the delivery."""

from __future__ import annotations

import click

from archive.cli.options import (
    CliState,
    RegistryOption,
    force_option,
    output_options,
    pass_state,
    run_option,
    survey_option,
)
from archive.cli.output import emit
from archive.deliver.changes import DEFAULT_TOLERANCE
from archive.deliver.formats import FORMATS
from archive.survey.keys import station_text


@click.command()
@run_option
@click.option("--format", "fmt", cls=RegistryOption, registry=FORMATS, required=True,
              help="Exchange format:")
@click.option("--to", "to", required=True, metavar="FILE", type=click.Path(dir_okay=False),
              help="File to write (a FILE.lineage.json is written beside it).")
@click.option("--recipient", default=None, metavar="TEXT", help="Who receives it (required).")
@click.option("--note", default="", metavar="TEXT", help="A note kept with the delivery.")
@click.option("--allow-flags", is_flag=True,
              help="Deliver even though some stations carry unacknowledged review flags.")
@click.option("--merge-occupations", "merge", is_flag=True,
              help="Deliver the occupations of a station as one position when they cannot be "
                   "told apart (difference inside its 95 % radius); default: one record each.")
@click.option("--changed-since", "changed_since", type=click.IntRange(min=1), default=None,
              metavar="DELIVERY",
              help="Write only the records that are new or whose position, height, flags, "
                   "node, time or edits changed since that delivery (its id); the lineage "
                   "lists each with its reasons.")
@click.option("--tolerance", type=click.FloatRange(min=0), default=DEFAULT_TOLERANCE,
              show_default=True, metavar="METRES",
              help="With --changed-since: a position or height that moved less than this "
                   "counts as unchanged.")
@force_option
@survey_option
@output_options
@pass_state
def deliver(state: CliState, run_ref: str | None, fmt: str, to: str, recipient: str | None,
            note: str, allow_flags: bool, merge: bool, changed_since: int | None,
            tolerance: float, force: bool, survey_name: str | None) -> None:
    """Deliver a run's final positions (run + edits in force) as a file."""
    from archive.deliver.deliveries import deliver as run

    arc = state.archive(write=True)
    sid = state.survey_id(survey_name)
    res = run(arc, sid, run_ref, fmt, to, recipient or "", note=note, allow_flags=allow_flags,
              force=force, merge_occupations=merge, changed_since=changed_since,
              tolerance=tolerance)
    d = res.as_dict()
    flags = res.unacknowledged_flags
    records = (f" ({res.n_records} records: one per occupation, and one per part of a node "
               "that moved during its stay)" if res.n_records != res.n_stations else "")
    text = (f"delivery {res.delivery_id}: {res.n_stations} stations{records} of run "
            f"{res.run_id[:12]} "
            f"with {len(res.edit_ids)} edit(s) in force, as {fmt}, to {res.path} for "
            f"{res.recipient}\n  file sha256 {res.file_hash}\n  lineage {res.lineage_path}")
    if flags:
        text += "\n  delivered with unacknowledged flags: " + ", ".join(
            f"{k} ({v})" for k, v in flags.items())
    merged = [m for m in res.merges if m["merged"]]
    if res.merges:
        text += (f"\n  occupations merged at {len(merged)} of {len(res.merges)} station(s) "
                 "with more than one record (occupied again, or a node that moved)")
        for m in res.merges:
            if not m["merged"]:
                text += f"\n    {station_text(m['line'], m['point'])} kept apart: {m['reason']}"
    if res.changes is not None:
        from archive.deliver.changes import describe

        ch = res.changes
        counts = ", ".join(f"{k} {v}" for k, v in ch["counts"].items())
        text += (f"\n  only what changed since delivery {ch['delivery']}: {len(ch['records'])} "
                 f"record(s) ({counts}); {ch['unchanged']} unchanged not written")
        for c in ch["records"][:10]:
            text += "\n    " + describe(c)
        if len(ch["records"]) > 10:
            text += f"\n    ... and {len(ch['records']) - 10} more (the lineage lists all)"
        for r in ch["removed"][:10]:
            text += (f"\n    no longer delivered: {station_text(r['line'], r['point'], r['index'])}"
                     f" (node {r['node']})")
    if res.awaiting:
        text += (f"\n  held back {res.n_awaiting} deployment(s) awaiting harvest (no log of "
                 "their node loaded yet; the next solve after loading positions them):")
        for a in res.awaiting[:20]:
            text += f"\n    {station_text(a['line'], a['point'], a['index'], a['node'])}"
        if res.n_awaiting > 20:
            text += f"\n    ... and {res.n_awaiting - 20} more (--json lists every one)"
    for w in res.warnings:
        text += f"\n  warning: {w}"
    emit(state, d, text)
