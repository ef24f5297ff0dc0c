"""Bare-earth elevation model: check a GeoTIFF and sample it bilinearly at any points.

Sampling convention (GDAL geotransform semantics): the geotransform locates the corner of
the top-left pixel, and a pixel's value belongs to its **centre**, (col + 0.5, row + 0.5).
Values are interpolated bilinearly between the four surrounding pixel centres. A GeoTIFF
registered as pixel-is-point (``AREA_OR_POINT=Point``) is read with GDAL's half-pixel shift
of the tie point in force (``GTIFF_POINT_GEO_IGNORE=FALSE``), so its geotransform is also
corner-based and the same rule applies. Points inside the raster but within half a pixel of
its edge take the value interpolated along the edge (no extrapolation beyond the outer
centres); points outside the raster, and points whose interpolation would use a nodata
pixel with a non-zero weight, give NaN.

Only the windows around the query points are read: one window when the points are close
together, otherwise one window per block of ``BLOCK`` x ``BLOCK`` pixels holding points, so
a multi-gigabyte model is never read whole.
"""

from __future__ import annotations

import contextlib
import os
import shutil
import tempfile
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np
import rasterio
from pyproj import CRS
from rasterio.errors import RasterioError, RasterioIOError
from rasterio.windows import Window

from archive.errors import InputError
from archive.survey.crs import checked_transformer

BLOCK = 512  # pixels on a side of the blocks read when the query points are spread out
MAX_WINDOW_PIXELS = 4_000_000  # read one window when the points' window is at most this
_ENV = {"GTIFF_POINT_GEO_IGNORE": "FALSE"}  # keep GDAL's pixel-is-point half-pixel shift


def inspect_dem(path: str | Path, *, read_pixels: bool = False) -> dict[str, Any]:
    """Check that a file is a readable single-band GeoTIFF with a CRS; return its details.

    With ``read_pixels`` (when a model is loaded) every block of pixels is read too, so a
    file whose header reads but whose pixels are cut or damaged is refused before it becomes
    the current model; the details then include the range of valid heights."""
    name = str(path)
    try:
        with rasterio.Env(**_ENV), rasterio.open(name) as ds:
            facts = _facts(ds, name)
            if read_pixels:
                facts.update(_read_blocks(ds, name))
            return facts
    except RasterioIOError as exc:
        raise InputError(name, f"not readable as a GeoTIFF: {exc}",
                         expected="a single-band GeoTIFF elevation model") from None


def _read_blocks(ds: Any, name: str) -> dict[str, Any]:
    """Read every pixel block (one block in memory at a time); the valid heights' range."""
    lo, hi, valid = np.inf, -np.inf, 0
    for _, window in ds.block_windows(1):
        try:
            block = ds.read(1, window=window, masked=True)
        except (RasterioIOError, RasterioError) as exc:
            raise InputError(name, f"the pixels of rows {window.row_off}-"
                             f"{window.row_off + window.height - 1}, columns {window.col_off}-"
                             f"{window.col_off + window.width - 1} cannot be read ({exc})",
                             expected="a complete GeoTIFF (was the file cut short in a copy?)"
                             ) from None
        values = block.compressed().astype(np.float64)
        values = values[np.isfinite(values)]
        if values.size:
            lo, hi, valid = min(lo, values.min()), max(hi, values.max()), valid + values.size
    if valid == 0:
        raise InputError(name, "the model holds no valid height (every pixel is nodata)",
                         expected="a bare-earth elevation model")
    return {"height_range": [float(lo), float(hi)],
            "valid_share": round(valid / (ds.width * ds.height), 6)}


def _facts(ds: Any, name: str) -> dict[str, Any]:
    """The raster's facts, refusing what cannot be an elevation model."""
    if ds.driver != "GTiff":
        raise InputError(name, f"the file is a {ds.driver} raster",
                         expected="a GeoTIFF elevation model")
    if ds.count != 1:
        raise InputError(name, f"the GeoTIFF has {ds.count} bands",
                         expected="a single band of elevations")
    if ds.crs is None:
        raise InputError(name, "the GeoTIFF has no coordinate reference system",
                         expected="a georeferenced GeoTIFF (CRS in its GeoKeys)",
                         hint="assign the CRS, e.g. gdal_edit.py -a_srs EPSG:NNNN")
    if ds.width < 1 or ds.height < 1 or ds.transform.determinant == 0:
        raise InputError(name, "the GeoTIFF has no usable geotransform",
                         expected="a georeferenced grid")
    return {
        "driver": ds.driver, "width": ds.width, "height": ds.height,
        "dtype": ds.dtypes[0], "crs_epsg": ds.crs.to_epsg(), "crs_wkt": ds.crs.to_wkt(),
        "transform": list(ds.transform)[:6],
        "nodata": None if ds.nodata is None or np.isnan(ds.nodata) else float(ds.nodata),
        "area_or_point": ds.tags().get("AREA_OR_POINT", "Area"),
        "bounds": list(ds.bounds),
    }


class DemSampler:
    """Bilinear sampling of one elevation model. Close it (or use ``with``) when done."""

    def __init__(self, path_or_file: str | Path | BinaryIO, vertical_datum: str, *,
                 source_hash: str | None = None) -> None:
        self._tmp: str | None = None
        if hasattr(path_or_file, "read"):
            fd, self._tmp = tempfile.mkstemp(prefix="nodekeep-dem-", suffix=".tif")
            with os.fdopen(fd, "wb") as out:
                shutil.copyfileobj(path_or_file, out, 1 << 20)
            path = self._tmp
        else:
            path = str(path_or_file)
        inspect_dem(path)
        self.path = path
        self.vertical_datum = vertical_datum
        self.source_hash = source_hash
        self._env = rasterio.Env(**_ENV)
        self._env.__enter__()
        self._ds = rasterio.open(path)
        self.crs = CRS.from_wkt(self._ds.crs.to_wkt())
        self.crs_epsg: int | None = self.crs.to_epsg()
        self.transform = self._ds.transform
        self.area_or_point = self._ds.tags().get("AREA_OR_POINT", "Area")
        self.width, self.height = self._ds.width, self._ds.height
        self.reads = 0  # windows read so far (for tests and benchmarks)

    def close(self) -> None:
        """Close the raster and remove any temporary copy."""
        if self._ds is not None:
            self._ds.close()
            self._ds = None
            self._env.__exit__(None, None, None)
        if self._tmp:
            with contextlib.suppress(FileNotFoundError):
                os.unlink(self._tmp)
            self._tmp = None

    def __enter__(self) -> DemSampler:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def sample(self, x: np.ndarray, y: np.ndarray, epsg: int) -> np.ndarray:
        """Elevations at points (x, y) given in EPSG ``epsg`` (NaN outside or on nodata)."""
        x = np.atleast_1d(np.asarray(x, dtype=np.float64))
        y = np.atleast_1d(np.asarray(y, dtype=np.float64))
        if x.shape != y.shape:
            raise ValueError("x and y must have the same shape")
        shape = x.shape
        x, y = x.ravel(), y.ravel()
        if self.crs_epsg != int(epsg):
            tr = checked_transformer(int(epsg), self.crs_epsg or self.crs)
            x, y = (np.asarray(v, dtype=np.float64) for v in tr.transform(x, y))
        out = np.full(x.shape, np.nan)
        inv = ~self.transform
        col = inv.a * x + inv.b * y + inv.c  # corner-based pixel coordinates
        row = inv.d * x + inv.e * y + inv.f
        inside = (np.isfinite(col) & np.isfinite(row) & (col >= 0) & (col <= self.width)
                  & (row >= 0) & (row <= self.height))
        if not inside.any():
            return out.reshape(shape)
        idx = np.flatnonzero(inside)
        cf = np.clip(col[idx] - 0.5, 0, self.width - 1)  # centre-based, clamped to the centres
        rf = np.clip(row[idx] - 0.5, 0, self.height - 1)
        c0 = np.clip(np.floor(cf), 0, max(self.width - 2, 0)).astype(np.int64)
        r0 = np.clip(np.floor(rf), 0, max(self.height - 2, 0)).astype(np.int64)
        fx, fy = cf - c0, rf - r0
        c1 = np.minimum(c0 + 1, self.width - 1)
        r1 = np.minimum(r0 + 1, self.height - 1)
        span = (int(r1.max() - r0.min()) + 1) * (int(c1.max() - c0.min()) + 1)
        if span <= MAX_WINDOW_PIXELS:
            groups = np.zeros(len(idx), dtype=np.int64)
        else:
            tiles_across = self.width // BLOCK + 1
            groups = (r0 // BLOCK) * tiles_across + c0 // BLOCK
        values = np.empty(len(idx))
        keys, inverse = np.unique(groups, return_inverse=True)
        for k in range(len(keys)):  # one read per window, not per point
            sel = np.flatnonzero(inverse == k)
            values[sel] = self._interpolate(r0[sel], r1[sel], c0[sel], c1[sel], fx[sel], fy[sel])
        out[idx] = values
        return out.reshape(shape)

    def _interpolate(self, r0: np.ndarray, r1: np.ndarray, c0: np.ndarray, c1: np.ndarray,
                     fx: np.ndarray, fy: np.ndarray) -> np.ndarray:
        """Read the window holding these cells and interpolate between the four centres."""
        wr, wc = int(r0.min()), int(c0.min())
        win = Window(wc, wr, int(c1.max()) - wc + 1, int(r1.max()) - wr + 1)
        block = self._ds.read(1, window=win, masked=True)
        self.reads += 1
        a = np.ma.filled(block.astype(np.float64), np.nan)
        r0, r1, c0, c1 = r0 - wr, r1 - wr, c0 - wc, c1 - wc
        total = np.zeros(len(r0))
        bad = np.zeros(len(r0), dtype=bool)
        for rr, cc, w in ((r0, c0, (1 - fx) * (1 - fy)), (r0, c1, fx * (1 - fy)),
                          (r1, c0, (1 - fx) * fy), (r1, c1, fx * fy)):
            v = a[rr, cc]
            used = w > 0
            bad |= used & np.isnan(v)
            total += np.where(used, w * np.nan_to_num(v), 0.0)
        total[bad] = np.nan
        return total


def open_dem(arc: Any, survey_id: int, version: int | None = None) -> DemSampler | None:
    """A sampler over the survey's current (or given) elevation model; None when none loaded.

    Samples from the object's local file; for a remote object store the object is copied to
    a temporary file first (removed on close).
    """
    import json

    from archive.survey.inputs import input_version

    row = input_version(arc, survey_id, "dem", version)
    if row is None:
        return None
    datum = json.loads(row.meta or "{}").get("vertical_datum", "")
    return sampler_for(arc, row.source_hash, datum)


def sampler_for(arc: Any, h: str, datum: str) -> DemSampler:
    """A sampler over the stored elevation model ``h``, its bytes checked against the hash
    first (a changed model stops the command naming the survey input it belongs to)."""
    arc.objects.ensure_intact(h)
    local = arc.objects.local_path(h)
    if local is not None:
        return DemSampler(local, datum, source_hash=h)
    with arc.objects.open(h) as fh:
        return DemSampler(fh, datum, source_hash=h)


def spot_sample(arc: Any, survey_id: int, easting: float, northing: float,
                epsg: int | None = None, version: int | None = None) -> dict[str, Any]:
    """The model's elevation at one point (default CRS: the survey's), for spot checks."""
    from archive.store.models import Survey

    with arc.session() as s:
        survey = s.get(Survey, survey_id)
    epsg = int(epsg or survey.crs_epsg)
    sampler = open_dem(arc, survey_id, version)
    if sampler is None:
        from archive.survey.inputs import require_input

        require_input(arc, survey_id, "dem", "there is nothing to sample", version)
    with sampler:
        z = float(sampler.sample(np.array([easting]), np.array([northing]), epsg)[0])
        return {"easting": easting, "northing": northing, "crs": f"EPSG:{epsg}",
                "elevation": None if np.isnan(z) else z,
                "vertical_datum": sampler.vertical_datum, "dem_hash": sampler.source_hash,
                "dem_crs": f"EPSG:{sampler.crs_epsg}" if sampler.crs_epsg else sampler.crs.name,
                "area_or_point": sampler.area_or_point}
