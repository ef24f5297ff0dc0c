"""Coordinate reference systems through pyproj: validation and the transforms nodekeep needs.

Axis order: every transformer here is built with ``always_xy=True``, so geographic
coordinates go in and come out as (longitude, latitude) and projected ones as
(easting, northing), whatever the EPSG axis order says.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from pyproj import CRS, Transformer
from pyproj.exceptions import CRSError
from pyproj.transformer import TransformerGroup

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


def outside_area_of_use(epsg: int, x: np.ndarray, y: np.ndarray, *,
                        margin_deg: float = 0.0) -> np.ndarray:
    """Mask of projected coordinates (metres of ``epsg``) outside that CRS's area of use.

    The coordinates are converted to WGS 84 longitude/latitude and compared with the EPSG
    area of use (a bounding box in degrees, possibly crossing the antimeridian), widened by
    ``margin_deg``. A coordinate the projection cannot invert counts as outside.
    """
    x = np.asarray(x, dtype=np.float64)
    y = np.asarray(y, dtype=np.float64)
    area = crs_from_epsg(epsg).area_of_use
    lon, lat = transformer(epsg, WGS84_GEOGRAPHIC).transform(x, y)
    lon = np.asarray(lon, dtype=np.float64)
    lat = np.asarray(lat, dtype=np.float64)
    bad = ~(np.isfinite(lon) & np.isfinite(lat))
    if area is None:
        return bad
    west, south, east, north = area.west, area.south, area.east, area.north
    m = margin_deg
    in_lat = (lat >= south - m) & (lat <= north + m)
    if west <= east:
        in_lon = (lon >= west - m) & (lon <= east + m)
    else:  # the area crosses the antimeridian
        in_lon = (lon >= west - m) | (lon <= east + m)
    return bad | ~(in_lat & in_lon)


def area_text(epsg: int) -> str:
    """The area of use of a CRS as 'W..E, S..N' in degrees (for messages)."""
    area = crs_from_epsg(epsg).area_of_use
    if area is None:
        return "no area of use recorded"
    return (f"longitude {area.west:g} to {area.east:g}, latitude {area.south:g} to "
            f"{area.north:g}")


def missing_grids(src: CRS | int, dst: CRS | int) -> list[str]:
    """Grids that the best transformation from ``src`` to ``dst`` needs and PROJ cannot find.

    Empty when the best known transformation can run on this machine. pyproj ranks the
    candidate operations; when the best one needs a grid that is neither installed nor
    reachable, PROJ would quietly fall back to a less accurate one.
    """
    a = crs_from_epsg(src) if isinstance(src, int) else src
    b = crs_from_epsg(dst) if isinstance(dst, int) else dst
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # reported below, by name
        group = TransformerGroup(a, b, always_xy=True)
    if group.best_available:
        return []
    names: list[str] = []
    for op in group.unavailable_operations[:1]:
        for grid in op.grids:
            if not grid.available and grid.short_name not in names:
                names.append(grid.short_name)
    return names


def checked_transformer(src: int, dst: CRS | int) -> Transformer:
    """An always_xy transformer, refusing when the best operation needs a missing grid."""
    names = missing_grids(src, dst)
    if names:
        label = f"EPSG:{dst}" if isinstance(dst, int) else str(dst.name)
        raise CRSProblem(
            f"the transformation EPSG:{src} -> {label} needs the grid(s) {', '.join(names)}, "
            "which PROJ cannot find on this machine",
            hint="install them (projsync --file NAME, or copy them into the PROJ data folder) "
                 "rather than accept a less accurate transformation",
        )
    if isinstance(dst, int):
        return transformer(src, dst)
    return Transformer.from_crs(crs_from_epsg(src), dst, always_xy=True)
