"""GNSS heights brought into the elevation model's vertical datum, as the survey says.

A GGA sentence gives the altitude above mean sea level (geoid) and the geoid separation N
(ellipsoid to geoid), so the ellipsoidal height is h = altitude + N (NMEA 0183 GGA fields 9
and 11). The survey's ``height_mode`` chooses how an orthometric height H is formed:

- ``gga``: H = the GGA altitude (the receiver's own geoid model); where only h and N are
  known, H = h - N.
- ``constant``: H = h - C with C = ``height_param`` metres (one separation for the whole
  prospect, e.g. read off the geoid model used by the elevation model).
- ``grid``: H = h - N(lon, lat) with N interpolated by PROJ in the geoid grid named by
  ``height_param`` (e.g. a GeoTIFF or GTX grid installed in the PROJ data folder).
  A grid PROJ cannot find raises :class:`CRSProblem` naming it; a point outside the
  grid gives NaN. There is never a silent fallback to another model.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

import numpy as np
from pyproj import Transformer
from pyproj.exceptions import ProjError

from archive.errors import CRSProblem, UsageError

HEIGHT_MODES = ("gga", "constant", "grid")


def _arr(v: Any, n: tuple[int, ...]) -> np.ndarray:
    if v is None:
        return np.full(n, np.nan)
    return np.broadcast_to(np.asarray(v, dtype=np.float64), n)


@lru_cache(maxsize=8)
def geoid_transformer(grid: str) -> Transformer:
    """A PROJ pipeline turning (lon, lat, h ellipsoidal) into (lon, lat, h - N(grid))."""
    grid = grid.strip()
    if not grid or any(c in grid for c in " +="):
        raise UsageError(f"{grid!r} is not a geoid grid name",
                         hint="give the grid's file name, e.g. us_noaa_g2018u0.tif")
    try:
        return Transformer.from_pipeline(f"+proj=vgridshift +grids={grid} +multiplier=-1")
    except ProjError:
        raise CRSProblem(
            f"PROJ cannot find the geoid grid {grid}",
            hint="install it into the PROJ data folder (projsync --file "
                 f"{grid}) or set PROJ_DATA; nodekeep will not substitute another model",
        ) from None


def check_height_mode(mode: str, param: str) -> None:
    """Refuse a height mode that cannot work on this machine (bad number, missing grid)."""
    if mode not in HEIGHT_MODES:
        raise UsageError(f"unknown height mode {mode!r}", hint=f"use one of {', '.join(HEIGHT_MODES)}")
    if mode == "constant":
        try:
            value = float(param)
        except (TypeError, ValueError):
            raise UsageError("height mode 'constant' needs a separation in metres") from None
        if not np.isfinite(value):
            raise UsageError("height mode 'constant' needs a finite separation in metres")
    if mode == "grid":
        if not param:
            raise UsageError("height mode 'grid' needs the name of a PROJ geoid grid")
        geoid_transformer(param)


def gga_orthometric(h_ell: Any, h_msl: Any, geoid_sep: Any) -> np.ndarray:
    """Orthometric height as the receiver reports it: GGA altitude above MSL, else
    ellipsoidal height minus the geoid separation (NMEA 0183 GGA fields 9 and 11)."""
    return np.where(np.isfinite(h_msl), h_msl, np.asarray(h_ell) - geoid_sep)


def gnss_orthometric(lon: Any, lat: Any, h_ell: Any, h_msl: Any, geoid_sep: Any,
                     survey: Any) -> np.ndarray:
    """Orthometric GNSS heights (m) per the survey's height mode; NaN where not computable.

    ``lon``/``lat`` in degrees (WGS 84), ``h_ell`` ellipsoidal height, ``h_msl`` the GGA
    altitude, ``geoid_sep`` the GGA separation N; any of the heights may be None or NaN.
    ``survey`` is anything with ``height_mode`` and ``height_param`` (a Survey row).
    """
    mode = getattr(survey, "height_mode", "gga") or "gga"
    param = getattr(survey, "height_param", "") or ""
    shape = np.broadcast_shapes(*(np.shape(v) for v in (lon, lat, h_ell, h_msl, geoid_sep)
                                  if v is not None))
    h = _arr(h_ell, shape)
    msl = _arr(h_msl, shape)
    sep = _arr(geoid_sep, shape)
    h_full = np.where(np.isfinite(h), h, msl + sep)  # ellipsoidal height from GGA if needed
    if mode == "gga":
        return gga_orthometric(h, msl, sep).astype(np.float64)
    check_height_mode(mode, param)
    if mode == "constant":
        return (h_full - float(param)).astype(np.float64)
    tr = geoid_transformer(param)
    lo = np.array(_arr(lon, shape), dtype=np.float64)
    la = np.array(_arr(lat, shape), dtype=np.float64)
    ok = np.isfinite(lo) & np.isfinite(la) & np.isfinite(h_full)
    out = np.full(shape, np.nan)
    if ok.any():
        _, _, z = tr.transform(lo[ok], la[ok], h_full[ok], errcheck=False)
        z = np.asarray(z, dtype=np.float64)
        out[ok] = np.where(np.isfinite(z) & (np.abs(z) < 1e30), z, np.nan)
    return out


def geoid_separation(lon: Any, lat: Any, mode: str, param: str) -> np.ndarray | None:
    """The separation N (ellipsoid minus the delivered heights' datum, metres) that the
    survey's height mode defines at each point, so h = H + N is a height above the WGS 84
    ellipsoid; None for ``gga``, whose separation is each receiver's own model and not a
    path to the elevation model's datum. NaN outside a geoid grid."""
    lo = np.atleast_1d(np.asarray(lon, dtype=np.float64))
    la = np.atleast_1d(np.asarray(lat, dtype=np.float64))
    if mode == "constant":
        check_height_mode(mode, param)
        return np.where(np.isfinite(lo) & np.isfinite(la), float(param), np.nan)
    if mode != "grid":
        return None
    zero = np.zeros(lo.shape)
    # the grid transformer maps h to h - N: from h = 0 it gives -N
    return -gnss_orthometric(lo, la, zero, None, None, _Mode(mode, param))


def gnss_height_datum(mode: str, param: str, model_datum: str) -> str:
    """What a GNSS height delivered where the elevation model has no value is measured
    from, in the survey's height mode (for the per-station datum of a delivery)."""
    if mode == "constant":
        return f"{model_datum or 'model datum'} via a constant separation of {param} m (GNSS)"
    if mode == "grid":
        return f"{model_datum or 'model datum'} via geoid grid {param} (GNSS)"
    return "receiver's own geoid (GNSS GGA altitude), not the elevation model's datum"


class _Mode:
    """A height mode in the shape :func:`gnss_orthometric` reads (a Survey row's fields)."""

    def __init__(self, height_mode: str, height_param: str) -> None:
        self.height_mode, self.height_param = height_mode, height_param
