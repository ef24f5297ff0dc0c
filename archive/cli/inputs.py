"""``nodekeep load stations|deployments|control|dem``, ``nodekeep inputs``, ``nodekeep dem sample``."""

from __future__ import annotations

from typing import Any

import click

from archive.cli.options import CliState, output_options, pass_state, survey_option
from archive.cli.output import emit, table

file_argument = click.argument("file", type=click.Path(exists=True, dir_okay=False))


def _load(state: CliState, survey_name: str | None, kind: str, file: str,
          **options: Any) -> None:
    from archive.survey.inputs import load_input, survey_for
    from archive.survey.parsed import format_problem

    arc = state.archive()
    survey = survey_for(arc, survey_name)
    res = load_input(arc, survey.id, kind, file, **options)
    data = res.as_dict()
    v = res.version

    def text() -> str:
        counts = res.meta.get("counts")
        extra = (" (" + ", ".join(f"{k} {n}" for k, n in sorted(counts.items())) + ")"
                 if counts else "")
        what = f"{v.n_rows} rows{extra}" if kind != "dem" else (
            f"{res.meta['width']}x{res.meta['height']} pixels, "
            f"{'EPSG:' + str(res.meta['crs_epsg']) if res.meta['crs_epsg'] else 'custom CRS'}, "
            f"pixel-is-{res.meta['area_or_point'].lower()}, "
            f"heights in {res.meta['vertical_datum']}")
        lines = [f"loaded {kind} version {v.version} of {survey.name} from {v.original_name}: "
                 f"{what}; source {v.source_hash[:12]}"]
        if res.warnings and not state.quiet:
            lines.append(f"{len(res.warnings)} warning(s):")
            lines += [f"  {format_problem(v.original_name, w)}" for w in res.warnings]
        elif res.warnings:
            lines.append(f"{len(res.warnings)} warning(s) (nodekeep inputs --json lists them)")
        return "\n".join(lines)

    emit(state, data, text)


@click.command("stations")
@file_argument
@click.option("--format", "fmt", type=click.Choice(["sps", "csv"]), default=None,
              help="File format (default: guessed from the name and content).")
@survey_option
@output_options
@pass_state
def load_stations(state: CliState, file: str, fmt: str | None, survey_name: str | None) -> None:
    """Load a preplot: SPS rev 2.1 R/S records or CSV line,point,easting,northing[,elevation][,index][,code]."""
    _load(state, survey_name, "stations", file, format=fmt)


@click.command("deployments")
@file_argument
@click.option("--columns", default=None, metavar="MAPPING",
              help="Header names when they differ: node=Serial,line=Line,point=Station,...")
@click.option("--strict", is_flag=True, help="Refuse the log if any problem is found.")
@survey_option
@output_options
@pass_state
def load_deployments(state: CliState, file: str, columns: str | None, strict: bool,
                     survey_name: str | None) -> None:
    """Load a deployment log: CSV node,line,point,deployed_utc,retrieved_utc (ISO 8601)."""
    _load(state, survey_name, "deployments", file, columns=columns, strict=strict)


@click.command("control")
@file_argument
@click.option("--format", "fmt", type=click.Choice(["csv", "sps"]), default=None,
              help="File format (default: guessed from the name and content).")
@survey_option
@output_options
@pass_state
def load_control(state: CliState, file: str, fmt: str | None, survey_name: str | None) -> None:
    """Load RTK check points (they survey the sensor position): CSV or SPS records."""
    _load(state, survey_name, "control", file, format=fmt)


@click.command("dem")
@file_argument
@click.option("--vertical-datum", required=True, metavar="TEXT",
              help="Vertical datum of the model's heights, e.g. 'NAVD88 (GEOID18)'.")
@survey_option
@output_options
@pass_state
def load_dem(state: CliState, file: str, vertical_datum: str, survey_name: str | None) -> None:
    """Load a bare-earth elevation model (single-band GeoTIFF, any CRS)."""
    _load(state, survey_name, "dem", file, vertical_datum=vertical_datum)


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
        [(r["kind"], r["version"], "yes" if r["current"] else "", r["name"], r["rows"],
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
