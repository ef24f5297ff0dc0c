"""The survey input kinds: name -> how a file of that kind is read, checked and described.

Each kind (preplot ``stations``, ``deployments`` log, ``control`` check points, elevation
model ``dem``) registers a parse function ``(LoadContext) -> ParsedInput`` (the table, the
warnings, format details), the load options it takes (described plainly, so the command line
can build ``nodekeep load KIND`` from them without the library knowing click), whether it has
a table, and a one-line description. :func:`archive.survey.inputs.load_input` stores any
registered kind as versioned inputs; docs/maintainer-guide.md has the recipe for a new kind.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from archive.registry import Registry

if TYPE_CHECKING:
    from archive.store.archive import Archive
    from archive.store.models import Survey
    from archive.survey.parsed import ParsedInput


@dataclass(frozen=True)
class LoadOption:
    """One option of ``nodekeep load KIND`` (the library's keyword ``name``)."""

    name: str
    help: str
    kind: str = "text"  # "text" | "choice" | "flag"
    choices: tuple[str, ...] = ()
    required: bool = False
    metavar: str = "TEXT"


@dataclass(frozen=True)
class LoadContext:
    """What a parse function gets: the archive (to read current inputs), the survey, the
    file and the load options."""

    arc: Archive
    survey: Survey
    path: Path
    options: dict[str, Any] = field(default_factory=dict)

    def read(self) -> bytes:
        """The file's bytes; InputError naming the file when it cannot be read."""
        from archive.errors import InputError

        try:
            return self.path.read_bytes()
        except OSError as exc:
            raise InputError(str(self.path), f"cannot read the file: {exc.strerror or exc}") \
                from None


@dataclass(frozen=True)
class InputKind:
    """How one kind of survey input is read and what ``load`` offers for it."""

    parse: Callable[[LoadContext], ParsedInput]
    file_help: str  # what the file is (the command's help)
    options: tuple[LoadOption, ...] = ()
    has_table: bool = True
    summary: Callable[[dict[str, Any], int], str] | None = None  # (meta, rows) -> text


def _dem_summary(meta: dict[str, Any], _rows: int) -> str:
    crs = f"EPSG:{meta['crs_epsg']}" if meta.get("crs_epsg") else "custom CRS"
    return (f"{meta['width']}x{meta['height']} pixels, {crs}, pixel-is-"
            f"{str(meta['area_or_point']).lower()}, heights in {meta['vertical_datum']}")


FORMAT_OPTION = LoadOption("format", "File format (default: guessed from the name and "
                           "content).", kind="choice", choices=("sps", "csv"))

CRS_OPTION = LoadOption("crs_from_survey", "The file's header names another CRS than the "
                        "survey's, but its coordinates are in the survey's CRS: load it "
                        "anyway, for this reason (kept in the ledger).", metavar="REASON")
REPLACE_OPTION = LoadOption("replace", "Accept a preplot that lacks more than 5 % of the "
                            "current preplot's stations (a version replaces the whole "
                            "preplot).", kind="flag")

INPUT_KINDS: Registry[InputKind] = Registry("input kind")
INPUT_KINDS.register(
    "stations", "the preplot: receiver and source stations",
    InputKind(parse=lambda ctx: _load("parse_stations")(ctx),
              file_help="Load a preplot: SPS rev 2.1 R/S records or CSV "
                        "line,point,easting,northing[,elevation][,index][,code].",
              options=(FORMAT_OPTION, CRS_OPTION, REPLACE_OPTION)))
INPUT_KINDS.register(
    "deployments", "the deployment log: which node sat at which station, when",
    InputKind(parse=lambda ctx: _load("parse_deployments")(ctx),
              file_help="Load a deployment log: CSV node,line,point,deployed_utc,"
                        "retrieved_utc (ISO 8601).",
              options=(LoadOption("columns", "Header names when they differ: "
                                  "node=Serial,line=Line,point=Station,...",
                                  metavar="MAPPING"),
                       LoadOption("strict", "Refuse the log if any problem is found.",
                                  kind="flag"))))
INPUT_KINDS.register(
    "control", "RTK check points, which survey the sensor",
    InputKind(parse=lambda ctx: _load("parse_control")(ctx),
              file_help="Load RTK check points (they survey the sensor position): CSV or "
                        "SPS records.",
              options=(FORMAT_OPTION, CRS_OPTION)))
INPUT_KINDS.register(
    "dem", "the bare-earth elevation model, a GeoTIFF",
    InputKind(parse=lambda ctx: _load("parse_dem")(ctx),
              file_help="Load a bare-earth elevation model (single-band GeoTIFF, any CRS).",
              options=(LoadOption("vertical_datum", "Vertical datum of the model's heights, "
                                  "e.g. 'NAVD88 (GEOID18)'.", required=True),),
              has_table=False, summary=_dem_summary))


def _load(name: str) -> Callable[[LoadContext], ParsedInput]:
    from archive.survey import loaders

    return getattr(loaders, name)


def input_kind(name: str) -> InputKind:
    """The registered kind called ``name`` (UsageError naming the known kinds otherwise)."""
    return INPUT_KINDS.get(name)
