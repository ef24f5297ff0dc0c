"""Coordinate reference systems through pyproj: validation and the transforms nodekeep needs.

Axis order: every transformer here is built with ``always_xy=True``, so geographic
coordinates go in and come out as (longitude, latitude) and projected ones as
(easting, northing), whatever the EPSG axis order says.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError

from archive.errors import CRSProblem

WGS84_GEOGRAPHIC = 4326


@dataclass(frozen=True)
class SurveyCRS:
    """A validated projected CRS: its EPSG code, name, linear unit and factor to metres."""

    epsg: int
    name: str
    unit: str
    unit_factor: float
    datum: str
    ellipsoid: str
    area_of_use: tuple[float, float, float, float] | None  # west, south, east, north (deg)


def parse_epsg(text: str | int) -> int:
    """'EPSG:32631', 'epsg:32631' or '32631' -> 32631."""
    raw = str(text).strip()
    code = raw.split(":", 1)[1] if ":" in raw else raw
    if raw.count(":") > 1 or (":" in raw and raw.split(":")[0].upper() != "EPSG"):
        raise CRSProblem(f"{text!r} is not an EPSG code", hint="write it as EPSG:NNNN")
    try:
        return int(code)
    except ValueError:
        raise CRSProblem(f"{text!r} is not an EPSG code", hint="write it as EPSG:NNNN") from None


@lru_cache(maxsize=64)
def crs_from_epsg(epsg: int) -> CRS:
    """The pyproj CRS of an EPSG code, or a CRSProblem naming the code."""
    try:
        return CRS.from_epsg(epsg)
    except CRSError:
        raise CRSProblem(f"EPSG:{epsg} is not a known coordinate reference system") from None


def survey_crs(code: str | int) -> SurveyCRS:
    """Validate a survey CRS: known, projected, with a linear unit."""
    epsg = parse_epsg(code)
    crs = crs_from_epsg(epsg)
    if not crs.is_projected:
        kind = "geographic" if crs.is_geographic else crs.type_name
        raise CRSProblem(
            f"EPSG:{epsg} ({crs.name}) is {kind}, not a projected CRS",
            hint="survey coordinates must be grid eastings/northings, e.g. a UTM zone",
        )
    axis = crs.axis_info[0]
    area = crs.area_of_use
    return SurveyCRS(
        epsg=epsg,
        name=crs.name,
        unit=axis.unit_name,
        unit_factor=float(axis.unit_conversion_factor),
        datum=crs.datum.name if crs.datum else "",
        ellipsoid=crs.ellipsoid.name if crs.ellipsoid else "",
        area_of_use=(area.west, area.south, area.east, area.north) if area else None,
    )


@lru_cache(maxsize=64)
def transformer(src: int, dst: int) -> Transformer:
    """An always_xy Transformer between two EPSG codes (cached)."""
    return Transformer.from_crs(crs_from_epsg(src), crs_from_epsg(dst), always_xy=True)
