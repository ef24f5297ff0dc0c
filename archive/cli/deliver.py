"""``nodekeep deliver``: write final positions in an exchange format and record the delivery."""

from __future__ import annotations

import click

from archive.cli.options import (
    CliState,
    force_option,
    output_options,
    pass_state,
    run_option,
    survey_option,
)
from archive.cli.output import emit

FORMATS = ("sps", "segp1", "csv", "geojson", "gpkg")  # archive.deliver.formats.FORMATS


@click.command()
@run_option
@click.option("--format", "fmt", type=click.Choice(FORMATS), required=True,
              help="sps: SPS rev 2.1 R records; segp1: SEG-P1 80 columns; csv: full "
                   "precision; geojson: WGS 84 lon/lat; gpkg: GeoPackage in the survey CRS.")
@click.option("--to", "to", required=True, metavar="FILE", type=click.Path(dir_okay=False),
              help="File to write (a FILE.lineage.json is written beside it).")
@click.option("--recipient", default=None, metavar="TEXT", help="Who receives it (required).")
@click.option("--note", default="", metavar="TEXT", help="A note kept with the delivery.")
@click.option("--allow-flags", is_flag=True,
              help="Deliver even though some stations carry unacknowledged review flags.")
@force_option
@survey_option
@output_options
@pass_state
def deliver(state: CliState, run_ref: str | None, fmt: str, to: str, recipient: str | None,
            note: str, allow_flags: bool, force: bool, survey_name: str | None) -> None:
    """Deliver a run's final positions (run + edits in force) as a file."""
    from archive.deliver.deliveries import deliver as run

    arc = state.archive()
    sid = state.survey_id(survey_name)
    res = run(arc, sid, run_ref, fmt, to, recipient or "", note=note, allow_flags=allow_flags,
              force=force)
    d = res.as_dict()
    flags = res.unacknowledged_flags
    text = (f"delivery {res.delivery_id}: {res.n_stations} stations of run {res.run_id[:12]} "
            f"with {len(res.edit_ids)} edit(s) in force, as {fmt}, to {res.path} for "
            f"{res.recipient}\n  file sha256 {res.file_hash}\n  lineage {res.lineage_path}")
    if flags:
        text += "\n  delivered with unacknowledged flags: " + ", ".join(
            f"{k} ({v})" for k, v in flags.items())
    for w in res.warnings:
        text += f"\n  warning: {w}"
    emit(state, d, text)
