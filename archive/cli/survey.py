"""``nodekeep survey create|list``."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import emit, table


@click.group()
def survey() -> None:
    """Create and list the surveys of the archive."""


@survey.command("create")
@click.argument("name")
@click.option("--crs", required=True, metavar="EPSG:NNNN",
              help="Projected CRS of the survey's grid coordinates.")
@click.option("--vertical-datum", default="", help="Vertical datum of delivered heights.")
@click.option("--client", default="", help="Client name (free text).")
@click.option("--contractor", default="", help="Contractor name (free text).")
@click.option("--area", default="", help="Area or prospect (free text).")
@click.option("--heights", "height_mode", type=click.Choice(["gga", "constant", "grid"]),
              default="gga", show_default=True,
              help="How GNSS heights reach the model's datum: GGA geoid separation, a constant "
                   "separation (--height-param metres) or a PROJ geoid grid (--height-param NAME).")
@click.option("--height-param", default="", help="Separation in metres or geoid grid name.")
@output_options
@pass_state
def create(state: CliState, name: str, crs: str, vertical_datum: str, client: str,
           contractor: str, area: str, height_mode: str, height_param: str) -> None:
    """Create survey NAME with its projected CRS."""
    from archive.survey.surveys import create_survey, survey_dict

    s = create_survey(state.archive(write=True), name, crs, vertical_datum=vertical_datum, client=client,
                      contractor=contractor, area=area, height_mode=height_mode,
                      height_param=height_param)
    d = survey_dict(s)
    emit(state, d, f"created survey {d['name']} in {d['crs']} ({d['crs_name']}, {d['unit']})")


@survey.command("list")
@output_options
@pass_state
def list_(state: CliState) -> None:
    """List the surveys."""
    from archive.survey.surveys import list_surveys

    rows = list_surveys(state.archive())
    emit(state, rows, lambda: table(
        [(r["name"], r["crs"], r["crs_name"], r["vertical_datum"], r["client"]) for r in rows],
        ["name", "crs", "crs name", "vertical datum", "client"]) if rows else "no surveys yet")
