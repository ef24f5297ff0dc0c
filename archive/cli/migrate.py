"""``nodekeep migrate``: move the archive to another catalog database and object store."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import Bar, emit, human_bytes


@click.command()
@click.option("--to-db", "to_db", required=True, metavar="URL",
              help="New, empty catalog database, e.g. postgresql+psycopg://user@host/dbname.")
@click.option("--to-objects", "to_objects", default=None, metavar="URL",
              help="New object store, e.g. s3://bucket/prefix (endpoint and credentials from "
                   "the AWS_* environment variables), or a folder. Default: keep the objects "
                   "where they are.")
@output_options
@pass_state
def migrate(state: CliState, to_db: str, to_objects: str | None) -> None:
    """Copy the archive to a new catalog and object store, verify both ends, switch over.

    The old catalog and objects are left untouched; nodekeep.toml is rewritten to point at
    the new places and the previous one is kept as nodekeep.toml.before-migrate.
    """
    from archive.scale.migrate import migrate_archive

    report = migrate_archive(state.archive(write=True), to_db, to_objects, progress=Bar(state))

    def text() -> str:
        rows = sum(report.tables.values())
        lines = [
            f"source verified: {report.source_verify.objects_checked} objects, "
            f"{report.source_verify.events_checked} ledger events",
            f"copied {report.objects} objects ({human_bytes(report.bytes)}), re-hashed on arrival",
            f"copied {rows} catalog rows in {len(report.tables)} tables, keys unchanged",
            f"target verified: ledger head {report.head} at both ends",
            f"recorded archive.migrate as ledger event {report.event_seq}",
            f"catalog  {report.target['db']}",
            f"objects  {report.target['objects']}",
            f"previous settings kept in {report.backup}",
        ]
        if report.dangling_left:
            lines.append(f"{report.dangling_left} unreferenced object(s) left behind in the "
                         "old store (not part of the archive)")
        return "\n".join(lines)

    emit(state, report.as_dict(), text)
