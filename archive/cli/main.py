"""The ``nodekeep`` command: a thin click layer over the library.

Commands are imported only when called (``--help`` stays fast). Every expected failure is a
:class:`archive.errors.NodekeepError`; :func:`main` turns it into a one-line reason on
stderr and an exit code, in this one place. ``--debug`` shows the traceback instead.
"""

from __future__ import annotations

import importlib
import os
from typing import Any

import click

from archive import __version__
from archive.cli.options import CliState

# name -> "module:attribute". Groups nest with the same mechanism.
COMMANDS: dict[str, str] = {
    "init": "archive.cli.init:init",
    "upgrade": "archive.cli.init:upgrade",
    "survey": "archive.cli.survey:survey",
    "history": "archive.cli.history:history",
    "verify": "archive.cli.verify:verify",
    "status": "archive.cli.status:status",
    "load": "archive.cli.main:load",
    "logs": "archive.cli.fixes:logs",
    "fixes": "archive.cli.fixes:fixes",
    "inputs": "archive.cli.inputs:inputs",
    "dem": "archive.cli.inputs:dem",
    "params": "archive.cli.solve:params",
    "solve": "archive.cli.solve:solve",
    "runs": "archive.cli.solve:runs",
    "show": "archive.cli.solve:show",
    "edit": "archive.cli.edit:edit",
    "edits": "archive.cli.edit:edits",
    "review": "archive.cli.review:review",
    "deliver": "archive.cli.deliver:deliver",
    "trace": "archive.cli.lineage:trace",
    "reproduce": "archive.cli.lineage:reproduce",
    "diff": "archive.cli.lineage:diff",
    "where": "archive.cli.lineage:where",
    "bundle": "archive.cli.bundle:bundle",
    "qc": "archive.cli.qc:qc",
    "report": "archive.cli.qc:report",
    "demo": "archive.cli.demo:demo",
    "migrate": "archive.cli.migrate:migrate",
}

LOAD_COMMANDS: dict[str, str] = {
    "fixes": "archive.cli.load_fixes:load_fixes",
}
"""``load`` subcommands besides one per registered survey input kind (LoadGroup)."""


class LazyGroup(click.Group):
    """A group whose commands are imported from ``module:attribute`` on first use."""

    def __init__(self, *args: Any, lazy: dict[str, str] | None = None, **kwargs: Any) -> None:
        super().__init__(*args, **kwargs)
        self.lazy = lazy or {}

    def list_commands(self, ctx: click.Context) -> list[str]:
        return sorted(set(super().list_commands(ctx)) | set(self.lazy))

    def get_command(self, ctx: click.Context, name: str) -> click.Command | None:
        if name in self.lazy:
            module_name, attr = self.lazy[name].split(":")
            return getattr(importlib.import_module(module_name), attr)
        return super().get_command(ctx, name)


class RootGroup(LazyGroup):
    """The top group: the one place where failures become a message and an exit code."""

    def invoke(self, ctx: click.Context) -> Any:
        from archive.errors import NodekeepError

        try:
            return super().invoke(ctx)
        except (click.exceptions.Exit, click.ClickException, click.exceptions.Abort):
            raise
        except NodekeepError as exc:
            if _debug(ctx):
                raise
            click.echo(f"error: {exc}", err=True)
            ctx.exit(exc.exit_code)
        except KeyboardInterrupt:
            click.echo("interrupted", err=True)
            ctx.exit(130)
        except Exception as exc:
            if _debug(ctx):
                raise
            from archive.store.db import mask_url
            from archive.store.faults import world_fault

            fault = world_fault(exc, getattr(ctx.obj, "catalog", None))
            if fault is not None:
                click.echo(f"error: {mask_url(str(fault))}", err=True)
                ctx.exit(fault.exit_code)
            click.echo(f"internal error: {type(exc).__name__}: {mask_url(str(exc))} "
                       "(run with --debug for the traceback)", err=True)
            ctx.exit(70)


def _debug(ctx: click.Context) -> bool:
    state = ctx.obj
    return bool(getattr(state, "debug", False)) or bool(os.environ.get("NODEKEEP_DEBUG"))


@click.group(cls=RootGroup, lazy=COMMANDS, context_settings={"help_option_names": ["-h", "--help"]})
@click.option("--archive", "-A", "archive_dir", metavar="DIR", default=None,
              help="Archive folder (default: $NODEKEEP_ARCHIVE, else the nearest folder above "
                   "the current one that holds an archive).")
@click.option("--actor", default=None, metavar="NAME",
              help="Who is acting, for the ledger (default: $NODEKEEP_ACTOR, else the OS user).")
@click.option("--read-only", "read_only", is_flag=True, default=False,
              envvar="NODEKEEP_READ_ONLY",
              help="Open the archive without any write (SQLite read-only URI, PostgreSQL "
                   "read-only transactions): a command that would change it is refused. "
                   "An archive you cannot write is opened this way by itself.")
@click.option("--debug", is_flag=True, default=False, help="Show tracebacks on errors.")
@click.version_option(__version__, prog_name="nodekeep")
@click.pass_context
def cli(ctx: click.Context, archive_dir: str | None, actor: str | None, read_only: bool,
        debug: bool) -> None:
    """nodekeep: receiver positions from node GPS logs, with their chain of custody.

    Load node logs and survey inputs, solve one position per deployed station, check
    them, deliver them, and trace any delivered coordinate back to its raw bytes.
    """
    ctx.obj = CliState(archive_dir, actor, debug or bool(os.environ.get("NODEKEEP_DEBUG")),
                       read_only=read_only)


class LoadGroup(LazyGroup):
    """``load``: raw fix logs, and one command per registered survey input kind."""

    def list_commands(self, ctx: click.Context) -> list[str]:
        from archive.survey.kinds import INPUT_KINDS

        return sorted(set(super().list_commands(ctx)) | set(INPUT_KINDS.names()))

    def get_command(self, ctx: click.Context, name: str) -> click.Command | None:
        from archive.survey.kinds import INPUT_KINDS

        if name not in self.lazy and name in INPUT_KINDS:
            from archive.cli.inputs import load_command

            return load_command(name)
        return super().get_command(ctx, name)


@click.group(cls=LoadGroup, lazy=LOAD_COMMANDS)
def load() -> None:
    """Load raw fix logs and survey inputs into the archive."""


def main(argv: list[str] | None = None) -> None:
    """Run one command (``argv``, default the process's arguments) as the ``nodekeep``
    program does; ends with ``SystemExit`` carrying its exit status."""
    from archive.cli import options

    options.ONE_COMMAND_PROCESS = True
    try:
        cli.main(args=argv, prog_name="nodekeep")
    finally:  # a caller that goes on after the command keeps its collector as it was
        options.ONE_COMMAND_PROCESS = False


def entry() -> None:
    """The ``nodekeep`` program (its console script and ``python -m archive``): one
    command by :func:`main`, then the process ends by :func:`end_process`. An exception
    that escaped the command ends it the usual way, with its traceback."""
    try:
        main()
    except SystemExit as exc:
        end_process(exc.code)


def end_process(code: Any) -> None:
    """End this process as the interpreter would after ``sys.exit(code)``, less the
    tearing down of its modules and objects.

    What the interpreter does at exit before that teardown is done, in its order: threads
    that are not daemons are waited for (the thread pools told to stop first), the
    ``atexit`` functions run (temporary folders, child processes, logging), stdout and
    stderr are flushed (a failed flush gives status 120, as it does); an error while
    waiting (Ctrl-C) is reported and the status kept. Then the process ends at once. The
    teardown skipped frees every object, running the finalizers of those still alive
    (an unclosed file flushed, a connection still checked out closed): the commands rely
    on none of that (files are written in ``with`` blocks and made durable before they are
    recorded, the archive's catalog closes with the command's context, child processes
    and temporary folders end by the commands or ``atexit``). After a solve it took
    0.3-0.45 s of one core. Where the interpreter lacks the hooks used here, the exit is
    the usual one.
    """
    import atexit
    import sys
    import threading

    shutdown = getattr(threading, "_shutdown", None)
    run_exitfuncs = getattr(atexit, "_run_exitfuncs", None)
    if shutdown is None or run_exitfuncs is None:
        raise SystemExit(code)
    if code is None:
        status = 0
    elif isinstance(code, int):
        status = code & 0xFF
    else:  # sys.exit("message"): printed, status 1, as the interpreter does
        print(code, file=sys.stderr)
        status = 1
    try:
        try:
            shutdown()
        except BaseException as exc:  # noqa: BLE001 - reported, the status kept
            _ignored("while waiting for threads at exit", exc)
        try:
            run_exitfuncs()  # reports its functions' errors itself
        except BaseException as exc:  # noqa: BLE001
            _ignored("in the exit functions", exc)
        out_ok = _flushed(sys.stdout, report=True)
        err_ok = _flushed(sys.stderr, report=False)
        if not (out_ok and err_ok):
            status = 120
    finally:
        os._exit(status)


def _ignored(where: str, exc: BaseException) -> None:
    """Say on stderr that an error at exit was ignored (the interpreter's wording)."""
    import contextlib
    import sys

    with contextlib.suppress(Exception):  # stderr itself may be gone
        print(f"Exception ignored {where}: {exc!r}", file=sys.stderr, flush=True)


def _flushed(stream: Any, report: bool) -> bool:
    """Flush a standard stream unless it is missing or closed; False when that fails
    (reported for stdout, as the interpreter does)."""
    if stream is None or getattr(stream, "closed", False):
        return True
    try:
        stream.flush()
    except Exception as exc:  # noqa: BLE001 - a closed pipe, a full disk
        if report:
            _ignored("on flushing sys.stdout", exc)
        return False
    return True


if __name__ == "__main__":
    entry()
