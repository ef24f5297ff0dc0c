"""Options shared by several commands, so one flag keeps one meaning everywhere.

Catalogue:
- ``--json`` (every command): machine-readable output on stdout instead of text.
- ``--quiet`` (every command): no progress bar, no chatter; results and errors still print.
- ``--survey NAME`` (commands acting on one survey): which survey; defaults to the only one.
- ``--run RUN`` (show, deliver, qc, report): a run id or a unique prefix of one; defaults to
  the newest run of the survey.
- ``--force`` (commands writing files): overwrite an existing output file.
- ``--index N`` / ``--node SERIAL`` (show, trace, where, diff, every edit): choose one
  occupation of a station by its delivered point index or by the node deployed there; the
  query commands show every occupation when neither is given.
- ``--to FILE`` (commands writing files): where to write.
The archive itself (``--archive/-A``), ``--actor``, ``--read-only`` and ``--debug`` are
options of the ``nodekeep`` group, placed before the command name.
"""

from __future__ import annotations

import gc
from collections.abc import Callable
from typing import Any

import click

ONE_COMMAND_PROCESS = False
"""Set by the console entry point: this process runs one command and exits. The objects of
the modules loaded by the time the archive opens (SQLAlchemy, pyarrow, numpy and the
command's own) are then moved out of the garbage collector's sight (:func:`gc.freeze`):
they live until the process ends anyway, and every full collection, the one at exit
included, no longer walks them (0.3-0.5 s of a 2 s ``nodekeep status`` on a month's
catalog). Commands run in a longer-lived process (tests, a library user) leave the
collector alone."""


def _set_flag(name: str) -> Callable[[click.Context, click.Parameter, Any], Any]:
    def callback(ctx: click.Context, _param: click.Parameter, value: Any) -> Any:
        if value:
            setattr(ctx.find_object(CliState), name, True)
        return value

    return callback


def output_options(f: Callable[..., Any]) -> Callable[..., Any]:
    """Add ``--json`` and ``--quiet`` to a command (stored on the shared state)."""
    f = click.option("--json", "as_json", is_flag=True, expose_value=False, is_eager=True,
                     callback=_set_flag("as_json"),
                     help="Print machine-readable JSON instead of text.")(f)
    f = click.option("--quiet", "-q", is_flag=True, expose_value=False, is_eager=True,
                     callback=_set_flag("quiet"), help="No progress bar or chatter.")(f)
    return f


survey_option = click.option(
    "--survey", "survey_name", default=None, metavar="NAME",
    help="Survey to act on (default: the only survey of the archive).",
)

run_option = click.option(
    "--run", "run_ref", default=None, metavar="RUN",
    help="Run id or unique prefix (default: the newest run).",
)

force_option = click.option("--force", is_flag=True, help="Overwrite an existing output file.")


def occupation_options(f: Callable[..., Any]) -> Callable[..., Any]:
    """Add ``--index N`` and ``--node SERIAL`` (choose one occupation of the station)."""
    f = click.option("--node", default=None, metavar="SERIAL",
                     help="Only the occupation of this node.")(f)
    return click.option("--index", "index", type=click.IntRange(1, 127), default=None,
                        help="Only the occupation delivered under this point index "
                             "(default: every occupation of the station).")(f)


class RegistryChoice(click.Choice):
    """A choice among the names of a registry, read when the command runs (so an entry
    registered after import is offered too)."""

    def __init__(self, registry: Any) -> None:
        self.registry = registry
        super().__init__(list(registry.names()))

    @property  # type: ignore[override]
    def choices(self) -> list[str]:
        return list(self.registry.names())

    @choices.setter
    def choices(self, value: Any) -> None:  # click's __init__ assigns it; the registry rules
        pass


class RegistryOption(click.Option):
    """An option whose help ends with the registry's ``name: description`` list."""

    def __init__(self, *args: Any, registry: Any, **kwargs: Any) -> None:
        self.registry = registry
        kwargs.setdefault("type", RegistryChoice(registry))
        super().__init__(*args, **kwargs)
        self.base_help = self.help or ""

    def get_help_record(self, ctx: click.Context) -> tuple[str, str] | None:
        self.help = f"{self.base_help} {self.registry.describe()}.".strip()
        return super().get_help_record(ctx)


class CliState:
    """What the ``nodekeep`` group knows, shared with every command through ``ctx.obj``."""

    def __init__(self, archive_dir: str | None, actor: str | None, debug: bool,
                 read_only: bool = False) -> None:
        self.archive_dir = archive_dir
        self.actor = actor
        self.debug = debug
        self.read_only = read_only
        self.as_json = False
        self.quiet = False
        self._archive = None
        self.catalog: str | None = None
        """The open archive's catalog (path or masked URL), for messages about it."""

    def archive(self, *, check_schema: bool = True, write: bool = False):
        """Open the archive once per invocation; it is closed when the command ends.

        ``write``: the command is about to change the archive; on an archive that cannot be
        written here it is refused now, with one line, before any work
        (:class:`archive.errors.ReadOnly`)."""
        if self._archive is None:
            from archive.store.archive import Archive

            self._archive = Archive.open(self.archive_dir, actor=self.actor,
                                         check_schema=check_schema, read_only=self.read_only)
            self.catalog = self._archive.catalog_name
            click.get_current_context().call_on_close(self._archive.close)
            if ONE_COMMAND_PROCESS:
                gc.freeze()
        if write:
            ctx = click.get_current_context()
            self._archive.require_writable(f"'nodekeep {ctx.command_path.split(' ', 1)[-1]}'")
        return self._archive

    def survey_id(self, name: str | None) -> int:
        """Id of the survey named by ``--survey`` (or the only one) in the open archive."""
        arc = self.archive()
        with arc.session() as s:
            return arc.survey(s, name).id


pass_state = click.make_pass_decorator(CliState)
