"""``nodekeep load fixes``: raw node logs into the archive."""

from __future__ import annotations

import datetime as dt

import click

from archive.cli.options import CliState, RegistryOption, output_options, pass_state, survey_option
from archive.cli.output import Bar, emit, table
from archive.ingest.formats import LOG_FORMATS


def _summary(report) -> str:
    rows = []
    for f in report.files:
        rej = ", ".join(f"{k} {v}" for k, v in f.rejects.items())
        rows.append((f.path, f.node or "", f.status, f.n_lines, f.n_fixes, f.n_valid,
                     f.n_rejected, rej))
    text = table(rows, ["file", "node", "status", "lines", "fixes", "valid", "rejected",
                        "rejects by reason"])
    errors = [f"error: {f.error}" for f in report.failed]
    tail = (f"{len(report.loaded)} loaded, {len(report.already)} already in the archive, "
            f"{len(report.failed)} failed")
    return "\n".join([text, *errors, tail])


def _prestart(paths: list[str], workers: int | None) -> None:
    """Start the parsing processes before the catalog is opened, so that the loading of
    their compiled reader overlaps it (see :mod:`archive.ingest.workers`)."""
    import os

    from archive.errors import UsageError
    from archive.ingest import workers as parsing
    from archive.ingest.paths import expand_paths

    try:
        n_files = len(expand_paths(paths))
    except UsageError:
        return  # the load reports it
    parsing.prestart(min(workers or os.cpu_count() or 1, n_files))


@click.command("fixes")
@click.argument("paths", nargs=-1, required=True, metavar="PATH...")
@click.option("--format", "fmt", cls=RegistryOption, registry=LOG_FORMATS, default=None,
              help="Log format (default: nmea, or delimited when --profile is given).")
@click.option("--profile", "profile_path", type=click.Path(exists=True, dir_okay=False),
              default=None, help="TOML mapping profile for delimited (CSV/TSV) logs.")
@click.option("--node", default=None, metavar="SERIAL",
              help="Node serial of every file (default: the file name without suffix).")
@click.option("--node-pattern", default=None, metavar="REGEX",
              help="Regular expression finding the serial in each file name "
                   "(group 'node', else the first group, else the whole match).")
@click.option("--date", "date_", default=None, metavar="YYYY-MM-DD",
              help="UTC date of the first GGA for logs without RMC/ZDA sentences.")
@click.option("--workers", type=click.IntRange(1, 256), default=None,
              help="Parallel parsing processes (default: one per core).")
@survey_option
@output_options
@pass_state
def load_fixes(state: CliState, paths: tuple[str, ...], fmt: str | None,
               profile_path: str | None, node: str | None, node_pattern: str | None,
               date_: str | None, workers: int | None, survey_name: str | None) -> None:
    """Load node GPS logs (files, folders or glob patterns) into the survey.

    Raw bytes are kept as received; every line is accepted, rejected (with a reason) or
    ignored. A file already loaded (same bytes) is reported and skipped.
    """
    from archive.errors import UsageError
    from archive.ingest import workers as parsing

    day = None
    if date_:
        try:
            day = dt.date.fromisoformat(date_)
        except ValueError:
            raise UsageError(f"--date {date_!r} is not a date", hint="use YYYY-MM-DD") from None
    _prestart(list(paths), workers)
    try:
        from archive.ingest.load import load_fix_files

        arc = state.archive(write=True)
        survey_id = state.survey_id(survey_name)
        bar = Bar(state)
        report = load_fix_files(arc, survey_id, list(paths), fmt=fmt,
                                profile_path=profile_path, node=node,
                                node_pattern=node_pattern, date=day, workers=workers,
                                progress=bar)
    finally:
        pool, _ = parsing.take()  # not taken when the load stopped before parsing
        if pool is not None:
            pool.shutdown(wait=True, cancel_futures=True)  # its processes hold nothing yet
    emit(state, report.as_dict(), lambda: _summary(report))
    if not report.ok:
        raise click.exceptions.Exit(1)
