"""``nodekeep bundle``: a custody bundle of one or more deliveries."""

from __future__ import annotations

from pathlib import Path

import click

from archive.cli.options import CliState, force_option, output_options, pass_state
from archive.cli.output import Bar, emit, human_bytes


@click.command()
@click.option("--delivery", "deliveries", type=int, multiple=True, required=True,
              metavar="N", help="A delivery to bundle (repeat for several).")
@click.option("--to", "to", required=True, type=click.Path(file_okay=False, path_type=Path),
              metavar="DIR", help="New folder to write the bundle archive into.")
@click.option("--tar", "tar", default=None, type=click.Path(dir_okay=False, path_type=Path),
              metavar="FILE", help="Also pack the bundle folder into this one tar file.")
@force_option
@output_options
@pass_state
def bundle(state: CliState, deliveries: tuple[int, ...], to: Path, tar: Path | None,
           force: bool) -> None:
    """Write a self-contained archive holding exactly what deliveries rest on (raw logs,
    input versions, run, edits, deliveries and the ledger evidence), which opens and
    verifies like any archive, here or years later."""
    from archive.lineage.bundle import make_bundle

    res = make_bundle(state.archive(), list(deliveries), to, tar=tar, force=force,
                      progress=Bar(state))
    d = res.as_dict()

    def text() -> str:
        rows = ", ".join(f"{k} {v}" for k, v in d["rows"].items() if v)
        lines = [f"bundle of deliver{'y' if len(res.deliveries) == 1 else 'ies'} "
                 + ", ".join(map(str, res.deliveries)) + f" in {res.folder}",
                 f"  rows: {rows}",
                 f"  objects: {d['objects']} ({human_bytes(d['bytes'])})",
                 f"  ledger: {d['source_head']['seq']} events of the source "
                 f"({d['events_whole']} whole, {d['events_reduced']} reduced to their payload "
                 f"digest), closed by event {d['closing_event']['seq']}"
                 + (f"; {d['rows_left_out']} row(s) recorded by whole events left out"
                    if d["rows_left_out"] else ""),
                 "  verified: " + ("archive OK" if d["verify_ok"] else "NOT OK")]
        if res.tar:
            lines.append(f"  tar: {res.tar['path']} ({human_bytes(res.tar['bytes'])}, "
                         f"sha256 {res.tar['sha256']})")
        lines.append(f"open it with: nodekeep -A {res.folder} verify")
        return "\n".join(lines)

    emit(state, d, text)
