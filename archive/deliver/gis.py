"""GIS outputs of final positions: GeoJSON (RFC 7946) and GeoPackage (through pyogrio/GDAL).

GeoJSON: a FeatureCollection of Points in WGS 84 longitude/latitude (RFC 7946 §4 allows no
other CRS), computed from the delivered grid coordinates with pyproj; the grid easting and
northing stay in the properties together with the survey's EPSG code. A third coordinate is
written only where it is a height above the WGS 84 ellipsoid (RFC 7946 §3.1.1 and §4), from
the survey's constant separation or geoid grid; the orthometric height and its datum stay in
the properties. GeoPackage: one point
layer ``receivers`` in the survey's projected CRS, every attribute of the CSV.
"""

from __future__ import annotations

import json
import os
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa

from archive.deliver.context import DeliveryContext, check_unique_keys, column
from archive.deliver.csvfile import csv_table
from archive.errors import Refused
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer
from archive.survey.heights import geoid_separation

LAYER = "receivers"


def _require_positions(table: pa.Table, fmt: str) -> tuple[np.ndarray, np.ndarray]:
    east, north = column(table, "easting"), column(table, "northing")
    bad = ~(np.isfinite(east) & np.isfinite(north))
    if bad.any():
        from archive.deliver.context import station_label

        i = int(np.flatnonzero(bad)[0])
        raise Refused(f"{fmt}: {station_label(table, i)} has no position",
                      hint="set one with 'nodekeep edit set-position' or reject the station "
                           "with 'nodekeep edit reject'")
    return east, north


def wgs84_lonlat(table: pa.Table, ctx: DeliveryContext) -> tuple[np.ndarray, np.ndarray]:
    """WGS 84 longitude/latitude of the grid coordinates (pyproj, always_xy)."""
    east, north = _require_positions(table, "GeoJSON")
    lon, lat = transformer(ctx.crs_epsg, WGS84_GEOGRAPHIC).transform(east, north)
    return np.asarray(lon), np.asarray(lat)


def ellipsoidal_heights(table: pa.Table, ctx: DeliveryContext, lon: np.ndarray,
                        lat: np.ndarray) -> tuple[np.ndarray, np.ndarray, str]:
    """(h, N, what) for RFC 7946's optional third coordinate: h = H + N, a height above the
    WGS 84 ellipsoid, where the run's height mode gives a path N from the delivered
    (orthometric) heights' datum to the ellipsoid: a constant separation or a PROJ geoid grid
    installed on this machine. NaN where there is none (``gga``: each receiver's built-in
    geoid ties its own altitude, not the elevation model's datum; off a grid)."""
    height = column(table, "height")
    sep = geoid_separation(lon, lat, ctx.height_mode, ctx.height_param)
    if sep is None:
        return (np.full(len(height), np.nan), np.full(len(height), np.nan),
                "none: the survey's heights follow the receivers' own geoid (GGA), which "
                "gives no path from the elevation model's datum to the WGS 84 ellipsoid")
    what = (f"h = H + N, N = {ctx.height_param} m (constant separation)"
            if ctx.height_mode == "constant" else
            f"h = H + N, N from geoid grid {ctx.height_param} (PROJ)")
    return height + sep, sep, what


def write_geojson(table: pa.Table, ctx: DeliveryContext) -> bytes:
    """RFC 7946 FeatureCollection (UTF-8): [lon, lat] to 1e-9 degree, and a third value only
    where it is a height above the WGS 84 ellipsoid (RFC 7946 §4); the orthometric height
    and its datum are the properties ``height`` and ``vertical_datum``."""
    check_unique_keys(table, "GeoJSON")
    lon, lat = wgs84_lonlat(table, ctx)
    h_ell, sep, what = ellipsoidal_heights(table, ctx, lon, lat)
    props = csv_table(table, ctx, anchor=False).to_pylist()
    features = []
    for i, p in enumerate(props):  # one feature per station: JSON needs Python objects
        coords = [round(float(lon[i]), 9), round(float(lat[i]), 9)]
        if np.isfinite(h_ell[i]):
            coords.append(float(h_ell[i]))
            p["geoid_separation"] = float(sep[i])
        features.append({"type": "Feature", "geometry": {"type": "Point", "coordinates": coords},
                         "properties": p})
    doc = {
        "type": "FeatureCollection",
        "nodekeep": {"survey": ctx.survey, "grid_crs": f"EPSG:{ctx.crs_epsg}",
                     "vertical_datum": ctx.vertical_datum, "ellipsoidal_height": what,
                     "run": ctx.run_id, "edit_set": ctx.edit_set_hash}
        | ({"ledger_anchor": ctx.anchor.as_dict()} if ctx.anchor is not None else {}),
        "features": features,
    }
    return (json.dumps(doc, ensure_ascii=False, allow_nan=False, separators=(",", ":"))
            + "\n").encode("utf-8")


def point_wkb(x: np.ndarray, y: np.ndarray) -> pa.Array:
    """Little-endian WKB 2-D points (ISO/OGC Simple Features: byte order 1, type 1, x, y)."""
    rec = np.zeros(len(x), dtype=[("order", "u1"), ("type", "<u4"), ("x", "<f8"), ("y", "<f8")])
    rec["order"], rec["type"], rec["x"], rec["y"] = 1, 1, x, y
    fixed = pa.FixedSizeBinaryArray.from_buffers(pa.binary(21), len(x),
                                                 [None, pa.py_buffer(rec.tobytes())])
    return fixed.cast(pa.binary())


def write_gpkg(table: pa.Table, ctx: DeliveryContext) -> bytes:
    """GeoPackage bytes: layer ``receivers`` of points in the survey CRS."""
    from pyogrio.raw import write_arrow

    check_unique_keys(table, "GeoPackage")
    east, north = _require_positions(table, "GeoPackage")
    attrs = csv_table(table, ctx)
    data = attrs.append_column("geometry", point_wkb(east, north))
    with tempfile.TemporaryDirectory(prefix="nodekeep-gpkg-") as tmp:
        path = Path(tmp) / "out.gpkg"
        write_arrow(data, str(path), layer=LAYER, driver="GPKG", geometry_name="geometry",
                    geometry_type="Point", crs=f"EPSG:{ctx.crs_epsg}")
        out = path.read_bytes()
        for leftover in Path(tmp).iterdir():
            os.unlink(leftover)
    return out
