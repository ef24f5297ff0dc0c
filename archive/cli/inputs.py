"""``nodekeep load KIND`` for every registered survey input kind, ``nodekeep inputs``,
``nodekeep dem sample``."""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import click

from archive.cli.options import CliState, output_options, pass_state, survey_option
from archive.cli.output import emit, table

file_argument = click.argument("file", type=click.Path(exists=True, dir_okay=False))


def _load(state: CliState, survey_name: str | None, kind: str, file: str,
          **options: Any) -> None:
    from archive.survey.inputs import load_input, survey_for
    from archive.survey.kinds import input_kind
    from archive.survey.parsed import format_problem

    arc = state.archive(write=True)
    survey = survey_for(arc, survey_name)
    res = load_input(arc, survey.id, kind, file, **options)
    data = res.as_dict()
    v = res.version
    spec = input_kind(kind)

    def text() -> str:
        counts = res.meta.get("counts")
        extra = (" (" + ", ".join(f"{k} {n}" for k, n in sorted(counts.items())) + ")"
                 if counts else "")
        what = (spec.summary(res.meta, v.n_rows) if spec.summary is not None
                else f"{v.n_rows} rows{extra}")
        lines = [f"loaded {kind} version {v.version} of {survey.name} from {v.original_name}: "
                 f"{what}; source {v.source_hash[:12]}"]
        if res.warnings and not state.quiet:
            lines.append(f"{len(res.warnings)} warning(s):")
            lines += [f"  {format_problem(v.original_name, w)}" for w in res.warnings]
        elif res.warnings:
            lines.append(f"{len(res.warnings)} warning(s) (nodekeep inputs --json lists them)")
        return "\n".join(lines)

    emit(state, data, text)


def _click_option(opt: Any) -> Callable[[Callable[..., Any]], Callable[..., Any]]:
    flag = "--" + opt.name.replace("_", "-")
    if opt.kind == "flag":
        return click.option(flag, opt.name, is_flag=True, help=opt.help)
    kind = click.Choice(list(opt.choices)) if opt.kind == "choice" else str
    return click.option(flag, opt.name, type=kind, default=None, required=opt.required,
                        metavar=None if opt.kind == "choice" else opt.metavar, help=opt.help)


def load_command(name: str) -> click.Command:
    """``nodekeep load NAME FILE [options]`` for a registered input kind: the options and
    help come from its registry entry (:mod:`archive.survey.kinds`)."""
    from archive.survey.kinds import input_kind

    spec = input_kind(name)

    @pass_state
    def command(state: CliState, file: str, survey_name: str | None, **options: Any) -> None:
        _load(state, survey_name, name, file, **options)

    command = survey_option(output_options(command))
    for opt in reversed(spec.options):
        command = _click_option(opt)(command)
    return click.command(name, help=spec.file_help)(file_argument(command))


@click.command("inputs")
@click.option("--all-versions", is_flag=True, help="List earlier versions too.")
@survey_option
@output_options
@pass_state
def inputs(state: CliState, all_versions: bool, survey_name: str | None) -> None:
    """List the survey's inputs (current versions unless --all-versions)."""
    from archive.survey.inputs import list_inputs, survey_for

    arc = state.archive()
    rows = list_inputs(arc, survey_for(arc, survey_name).id, all_versions=all_versions)
    emit(state, rows, lambda: table(
        [(r["kind"], r["version"], "yes" if r["current"] else "", r["name"],
          r["rows"] if r["table_hash"] is not None else "-",
          r["n_warnings"], r["source_hash"][:12], r["created_at"].strftime("%Y-%m-%d %H:%M:%SZ"),
          r["created_by"]) for r in rows],
        ["kind", "version", "current", "file", "rows", "warnings", "source", "loaded (UTC)",
         "by"]) if rows else "no inputs loaded yet")


@click.group("dem")
def dem() -> None:
    """Spot checks of the survey's elevation model."""


@dem.command("sample", context_settings={"ignore_unknown_options": True})  # negative E/N
@click.argument("easting", type=float)
@click.argument("northing", type=float)
@click.option("--crs", default=None, metavar="EPSG:NNNN",
              help="CRS of the coordinates (default: the survey CRS).")
@click.option("--version", "version", type=int, default=None,
              help="Elevation model version (default: the current one).")
@survey_option
@output_options
@pass_state
def sample(state: CliState, easting: float, northing: float, crs: str | None,
           version: int | None, survey_name: str | None) -> None:
    """Elevation of the model at one point E N (bilinear between pixel centres)."""
    from archive.survey.crs import parse_epsg
    from archive.survey.dem import spot_sample
    from archive.survey.inputs import survey_for

    arc = state.archive()
    res = spot_sample(arc, survey_for(arc, survey_name).id, easting, northing,
                      parse_epsg(crs) if crs else None, version)
    z = res["elevation"]
    emit(state, res, f"E {easting:.2f} N {northing:.2f} ({res['crs']}): " + (
        f"{z:.3f} m ({res['vertical_datum']})" if z is not None
        else "no value (outside the model or on nodata)"))
