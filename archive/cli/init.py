"""``nodekeep init`` and ``nodekeep upgrade``."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import emit


@click.command()
@click.argument("directory", type=click.Path(file_okay=False))
@click.option("--db", "db_url", default=None, metavar="URL",
              help="Catalog database URL (default: SQLite file inside DIR), e.g. "
                   "postgresql+psycopg://user@host/dbname.")
@click.option("--objects", "objects_url", default=None, metavar="URL",
              help="Object store folder or URL (default: DIR/objects), e.g. s3://bucket/prefix.")
@output_options
@pass_state
def init(state: CliState, directory: str, db_url: str | None, objects_url: str | None) -> None:
    """Create a new archive in DIRECTORY."""
    from archive.store import migrate
    from archive.store.archive import Archive

    arc = Archive.init(directory, db_url=db_url, objects_url=objects_url, actor=state.actor)
    try:
        info = arc.describe() | {"schema": migrate.current_revision(arc.engine)}
    finally:
        arc.close()
    emit(state, info, lambda: (
        f"created archive {info['root']}\n  catalog  {info['db']}\n  objects  {info['objects']}\n"
        f"  schema   {info['schema']}\nnext: nodekeep -A {directory} survey create NAME --crs EPSG:NNNN"))


@click.command()
@output_options
@pass_state
def upgrade(state: CliState) -> None:
    """Migrate the archive's catalog to this version of nodekeep."""
    from archive.store import migrate

    arc = state.archive(check_schema=False, write=True)
    before, after = migrate.upgrade(arc.engine, actor=arc.actor)
    info = {"from": before, "to": after, "changed": before != after}
    emit(state, info, f"catalog schema {before} -> {after}" if before != after
         else f"catalog schema already at {after}")
