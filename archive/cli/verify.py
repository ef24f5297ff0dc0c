"""``nodekeep verify``."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import Bar, emit, human_bytes


@click.command()
@click.option("--no-rehash", is_flag=True, help="Check presence only, do not re-hash objects.")
@output_options
@pass_state
def verify(state: CliState, no_rehash: bool) -> None:
    """Re-hash every object, walk the ledger chain and check every reference."""
    from archive.store.verify import verify_archive

    report = verify_archive(state.archive(), rehash=not no_rehash, progress=Bar(state))

    def text() -> str:
        lines = [f"checked {report.objects_checked} objects ({human_bytes(report.bytes_checked)}), "
                 f"{report.events_checked} ledger events, {report.rows_checked} catalog rows"]
        for p in report.problems:
            lines.append(f"PROBLEM {p.kind}: {p.subject}: {p.detail}")
        if report.dangling:
            lines.append(f"{len(report.dangling)} unreferenced object(s) (left by interrupted "
                         "writes; not corruption):")
            lines += [f"  {h}" for h in report.dangling[:20]]
        lines.append(f"ledger head {report.head}")
        lines.append("archive OK" if report.ok else f"archive NOT OK: {len(report.problems)} problem(s)")
        return "\n".join(lines)

    emit(state, report.as_dict(), text)
    if not report.ok:
        click.get_current_context().exit(3)
