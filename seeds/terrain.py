"""Smooth synthetic bare-earth terrain of the demo, and its elevation model GeoTIFF.

The terrain is an analytic function of easting and northing (metres, survey CRS): a gentle
regional slope, a few broad hills and hollows, and a shallow creek valley. Heights are
orthometric (the scenario's stand-in for NAVD88). The GeoTIFF samples that function at pixel
centres with the pixel-is-area convention (GDAL geotransform of the upper-left corner:
GDAL Geotransform Tutorial / GDAL RFC 33), so bilinear interpolation between pixel centres
reproduces the terrain to centimetres and a solver that samples at the wrong half pixel
would show it.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np


@dataclass(frozen=True)
class Terrain:
    """Parameters of the analytic terrain around ``origin`` (easting, northing)."""

    origin: tuple[float, float]
    base: float
    slope: tuple[float, float]  # metres per metre, east and north
    hills: np.ndarray  # (k, 5): de, dn, amplitude, width_e, width_n
    creek: tuple[float, float, float, float]  # offset east, meander amplitude, wavelength, depth

    def height(self, e: np.ndarray, n: np.ndarray) -> np.ndarray:
        """Ground height (m) at eastings/northings ``e``, ``n`` (broadcast together)."""
        x = np.asarray(e, dtype=np.float64) - self.origin[0]
        y = np.asarray(n, dtype=np.float64) - self.origin[1]
        z = self.base + self.slope[0] * x + self.slope[1] * y
        for de, dn, amp, we, wn in self.hills:
            z = z + amp * np.exp(-(((x - de) / we) ** 2 + ((y - dn) / wn) ** 2))
        off, meander, wavelength, depth = self.creek
        centre = off + meander * np.sin(2 * np.pi * y / wavelength)
        z = z - depth * np.exp(-(((x - centre) / 45.0) ** 2))
        return z


def make_terrain(rng: np.random.Generator, origin: tuple[float, float],
                 extent: tuple[float, float]) -> Terrain:
    """Random but smooth terrain over an ``extent`` (width east, height north) from ``origin``."""
    w, h = extent
    k = 5
    hills = np.column_stack([
        rng.uniform(0, w, k), rng.uniform(0, h, k),
        rng.uniform(-9.0, 14.0, k), rng.uniform(250, 800, k), rng.uniform(250, 800, k),
    ])
    creek = (rng.uniform(0.3, 0.7) * w, rng.uniform(40, 120), rng.uniform(600, 1400),
             rng.uniform(2.5, 5.0))
    return Terrain(origin=origin, base=float(rng.uniform(390, 430)),
                   slope=(float(rng.uniform(-0.004, 0.004)), float(rng.uniform(-0.004, 0.004))),
                   hills=hills, creek=creek)


def write_dem(path: Path, terrain: Terrain, bounds: tuple[float, float, float, float],
              res: float, epsg: int) -> None:
    """Write the terrain as a float32 GeoTIFF covering ``bounds`` (west, south, east, north).

    Pixel-is-area: the geotransform holds the upper-left corner of the upper-left pixel and
    each value is the terrain at its pixel centre.
    """
    import rasterio
    from rasterio.transform import from_origin

    west, south, east, north = bounds
    west, north = np.floor(west / res) * res, np.ceil(north / res) * res
    cols = int(np.ceil((east - west) / res))
    rows = int(np.ceil((north - south) / res))
    xc = west + (np.arange(cols) + 0.5) * res
    yc = north - (np.arange(rows) + 0.5) * res
    z = terrain.height(xc[None, :], yc[:, None]).astype(np.float32)
    profile = {
        "driver": "GTiff", "width": cols, "height": rows, "count": 1, "dtype": "float32",
        "crs": f"EPSG:{epsg}", "transform": from_origin(west, north, res, res),
        "nodata": -9999.0, "compress": "deflate", "predictor": 3, "tiled": True,
        "blockxsize": 256, "blockysize": 256,
    }
    with rasterio.open(path, "w", **profile) as dst:
        dst.write(z, 1)
        dst.update_tags(AREA_OR_POINT="Area")
        dst.set_band_description(1, "bare-earth elevation, m (invented demo terrain)")
