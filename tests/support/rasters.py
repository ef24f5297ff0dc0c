"""Small GeoTIFFs written with rasterio for the elevation-model tests."""

from __future__ import annotations

import struct
from pathlib import Path

import numpy as np
import rasterio
from rasterio.transform import Affine

# 3x3 check DEM, GT = (500000, 2, 0, 6000006, 0, -2), rows north to south; geotransform per
# the GDAL Geotransform Tutorial (corner-based, GDAL RFC 33); expected values computed with
# scipy RegularGridInterpolator and rasterio 1.4.
CHECK_GT = Affine(2, 0, 500000, 0, -2, 6000006)
CHECK_Z = np.array([[10, 11, 12], [13, 14, 15], [16, 17, 18]], dtype=np.float32)


def write_tif(path: Path, z: np.ndarray, transform: Affine, crs: str | None = "EPSG:32614", *,
              nodata: float | None = None, point: bool = False, bands: int = 1) -> Path:
    """Write a GeoTIFF; ``point`` marks it AREA_OR_POINT=Point (pixel-is-point)."""
    z = np.asarray(z)
    profile = {"driver": "GTiff", "width": z.shape[1], "height": z.shape[0], "count": bands,
               "dtype": str(z.dtype), "transform": transform}
    if crs is not None:
        profile["crs"] = crs
    if nodata is not None:
        profile["nodata"] = nodata
    with rasterio.open(path, "w", **profile) as dst:
        for b in range(1, bands + 1):
            dst.write(z, b)
        if point:
            dst.update_tags(AREA_OR_POINT="Point")
    return path


def centres(transform: Affine, shape: tuple[int, int]) -> tuple[np.ndarray, np.ndarray]:
    """Pixel-centre x (ascending cols) and y (rows, north to south) of a north-up grid."""
    rows, cols = shape
    x = transform.c + (np.arange(cols) + 0.5) * transform.a
    y = transform.f + (np.arange(rows) + 0.5) * transform.e
    return x, y


def write_gtx(path, lat0, lon0, dlat, dlon, values):
    """A GTX vertical grid (NOAA VDatum layout, from memory: big-endian header of four
    doubles - south latitude, west longitude, latitude and longitude spacing - then rows and
    columns as int32, then float32 values row by row from the south)."""
    rows, cols = values.shape
    with open(path, "wb") as fh:
        fh.write(struct.pack(">4d2i", lat0, lon0, dlat, dlon, rows, cols))
        fh.write(values.astype(">f4").tobytes())
