"""Elevation-model sampling checked against the GDAL geotransform convention and scipy.

References: GDAL "Geotransform Tutorial" (the geotransform locates the top-left pixel corner,
the top-left pixel centre is at pixel/line (0.5, 0.5); GDAL RFC 33 for PixelIsPoint; rasterio
``sample`` returns the containing pixel) and
scipy.interpolate.RegularGridInterpolator(method="linear") as the reference bilinear
interpolator on the same grid of pixel centres.
"""

from __future__ import annotations

import numpy as np
import pytest
import rasterio
from rasterio.transform import Affine
from scipy.interpolate import RegularGridInterpolator

from archive.errors import InputError
from archive.survey import dem as dem_mod
from archive.survey.crs import transformer
from archive.survey.dem import DemSampler, inspect_dem
from tests.support.rasters import CHECK_GT, CHECK_Z, centres, write_tif

UTM14N = 32614


def rgi(z: np.ndarray, transform: Affine):
    """scipy's bilinear interpolator over the pixel centres (y axis descending: allowed)."""
    x, y = centres(transform, z.shape)
    f = RegularGridInterpolator((y, x), z.astype(np.float64), method="linear",
                                bounds_error=False, fill_value=np.nan)
    return lambda xq, yq: f(np.column_stack([yq, xq]))


@pytest.fixture
def check_tif(tmp_path):
    return write_tif(tmp_path / "check.tif", CHECK_Z, CHECK_GT)


def test_check_vectors_between_pixel_centres(check_tif):
    # computed with scipy RegularGridInterpolator: bilinear between centres -> 10, 12, 14, 13.0
    x = np.array([500001.0, 500002.0, 500003.0, 500002.5])
    y = np.array([6000005.0, 6000004.0, 6000003.0, 6000003.5])
    with DemSampler(check_tif, "test datum") as s:
        got = s.sample(x, y, UTM14N)
    np.testing.assert_allclose(got, [10.0, 12.0, 14.0, 13.0], atol=1e-12)
    np.testing.assert_allclose(got, rgi(CHECK_Z, CHECK_GT)(x, y), atol=1e-12)


def test_pixel_corner_trap(check_tif):
    # rasterio 1.4 sample.py / transform.rowcol (op=floor): sample() returns the containing
    # pixel: (500002, 6000004)
    # -> 14 (a point on a pixel edge goes to the pixel right/below). Treating pixel corners as
    # nodes would reproduce that 14; the bilinear value between centres is 12.
    with rasterio.open(check_tif) as ds:
        containing = [v[0] for v in ds.sample([(500002.0, 6000004.0), (500002.5, 6000003.5)])]
    assert containing == [14.0, 14.0]
    with DemSampler(check_tif, "d") as s:
        assert s.sample(np.array([500002.0]), np.array([6000004.0]), UTM14N)[0] == pytest.approx(12.0)


def test_pixel_is_point_file_samples_like_the_area_file(tmp_path, check_tif):
    # GDAL RFC 33: a PixelIsPoint tie point names the pixel centre; GDAL shifts it by half a
    # pixel on reading so the geotransform stays corner-based. With the shift disabled
    # (GTIFF_POINT_GEO_IGNORE) the raw tie point shows the half-pixel offset.
    pt = write_tif(tmp_path / "point.tif", CHECK_Z, CHECK_GT, point=True)
    with rasterio.Env(GTIFF_POINT_GEO_IGNORE=True), rasterio.open(pt) as ds:
        assert (ds.transform.c, ds.transform.f) == (500001.0, 6000005.0)
    assert inspect_dem(pt)["area_or_point"] == "Point"
    x = np.array([500001.0, 500002.0, 500003.0, 500002.5, 500004.9])
    y = np.array([6000005.0, 6000004.0, 6000003.0, 6000003.5, 6000001.3])
    with DemSampler(pt, "d") as sp, DemSampler(check_tif, "d") as sa:
        assert sp.area_or_point == "Point"
        np.testing.assert_array_equal(sp.sample(x, y, UTM14N), sa.sample(x, y, UTM14N))
    # and even when the caller's environment disables the shift, the sampler keeps it
    with rasterio.Env(GTIFF_POINT_GEO_IGNORE=True), DemSampler(pt, "d") as sp:
        assert sp.sample(np.array([500002.0]), np.array([6000004.0]), UTM14N)[0] == pytest.approx(12.0)


def _grid(rows=30, cols=40, seed=1):
    rng = np.random.default_rng(seed)
    z = (300 + np.cumsum(rng.normal(0, 1, (rows, cols)), axis=1)).astype(np.float32)
    gt = Affine(5.0, 0, 612000.0, 0, -5.0, 3890000.0)
    return z, gt


def test_matches_scipy_inside_and_on_edges(tmp_path):
    z, gt = _grid()
    path = write_tif(tmp_path / "g.tif", z, gt)
    xc, yc = centres(gt, z.shape)
    rng = np.random.default_rng(7)
    xq = rng.uniform(xc[0], xc[-1], 500)
    yq = rng.uniform(yc[-1], yc[0], 500)
    # exactly on the outermost centres (edges and corners of the interpolation domain)
    xq = np.r_[xq, xc[0], xc[-1], xc[0], xc[-1], xc[5], xc[5]]
    yq = np.r_[yq, yc[0], yc[-1], yc[-1], yc[0], yc[0], yc[-1]]
    with DemSampler(path, "d") as s:
        got = s.sample(xq, yq, UTM14N)
    np.testing.assert_allclose(got, rgi(z, gt)(xq, yq), rtol=0, atol=1e-6)


def test_half_pixel_border_and_outside(tmp_path):
    z, gt = _grid()
    path = write_tif(tmp_path / "g.tif", z, gt)
    xc, yc = centres(gt, z.shape)
    left, top = gt.c, gt.f
    right, bottom = left + z.shape[1] * 5.0, top - z.shape[0] * 5.0
    xb = np.array([left + 1.0, right - 0.5, xc[3], left])
    yb = np.array([yc[10], yc[2] - 1.0, bottom + 0.1, top])
    with DemSampler(path, "d") as s:
        got = s.sample(xb, yb, UTM14N)
        # inside the raster but outside the centres: the edge value (coordinates clamped to
        # the outer centres), compared with scipy on the clamped coordinates
        ref = rgi(z, gt)(np.clip(xb, xc[0], xc[-1]), np.clip(yb, yc[-1], yc[0]))
        np.testing.assert_allclose(got, ref, atol=1e-6)
        out = s.sample(np.array([left - 0.01, right + 3, xc[4], xc[4]]),
                       np.array([yc[3], yc[3], top + 0.5, bottom - 20]), UTM14N)
    assert np.isnan(out).all()


def test_nodata_poisons_only_its_neighbourhood(tmp_path):
    z, gt = _grid()
    z[12, 17] = -9999.0
    path = write_tif(tmp_path / "nd.tif", z, gt, nodata=-9999.0)
    zr = z.astype(np.float64)
    zr[12, 17] = np.nan
    xc, yc = centres(gt, z.shape)
    rng = np.random.default_rng(3)
    xq = rng.uniform(xc[14], xc[20], 400)
    yq = rng.uniform(yc[15], yc[9], 400)
    with DemSampler(path, "d") as s:
        got = s.sample(xq, yq, UTM14N)
        on_centre = s.sample(np.array([xc[16], xc[17]]), np.array([yc[12], yc[11]]), UTM14N)
    ref = rgi(zr, gt)(xq, yq)
    assert np.isnan(got).any() and (~np.isnan(got)).any()
    np.testing.assert_allclose(got, ref, atol=1e-6, equal_nan=True)
    # a point exactly on a valid centre next to the nodata pixel keeps its value
    np.testing.assert_allclose(on_centre, [z[12, 16], z[11, 17]], atol=1e-6)


def test_model_in_another_crs(tmp_path):
    # A geographic (WGS 84 degrees) model sampled with UTM 14N survey coordinates; reference:
    # pyproj to lon/lat, then scipy on the degree grid.
    rows, cols = 50, 60
    lon0, lat0, d = -99.2, 35.3, 0.001
    gt = Affine(d, 0, lon0, 0, -d, lat0)
    lon_c, lat_c = centres(gt, (rows, cols))
    z = (400 + 30 * np.sin(lat_c[:, None] * 300) + 20 * np.cos(lon_c[None, :] * 200)).astype(np.float32)
    path = write_tif(tmp_path / "geo.tif", z, gt, crs="EPSG:4326")
    rng = np.random.default_rng(11)
    lon = rng.uniform(lon_c[0], lon_c[-1], 300)
    lat = rng.uniform(lat_c[-1], lat_c[0], 300)
    e, n = transformer(4326, UTM14N).transform(lon, lat)
    with DemSampler(path, "NAVD88") as s:
        assert s.crs_epsg == 4326
        got = s.sample(np.asarray(e), np.asarray(n), UTM14N)
    np.testing.assert_allclose(got, rgi(z, gt)(lon, lat), atol=1e-6)


def test_spread_points_are_read_in_blocks(tmp_path, monkeypatch):
    z, gt = _grid(rows=64, cols=64, seed=5)
    path = write_tif(tmp_path / "big.tif", z, gt)
    monkeypatch.setattr(dem_mod, "BLOCK", 8)
    monkeypatch.setattr(dem_mod, "MAX_WINDOW_PIXELS", 100)
    xc, yc = centres(gt, z.shape)
    xq = np.array([xc[1] + 1.3, xc[60] + 2.2, xc[2] + 0.4, xc[61] + 0.1, xc[30]])
    yq = np.array([yc[1] - 1.1, yc[2] - 3.0, yc[58] - 0.7, yc[60] - 1.9, yc[31] - 2.5])
    sizes = []
    with DemSampler(path, "d") as s:
        real = s._ds.read

        def spy(*a, **k):
            w = k["window"]
            sizes.append(w.width * w.height)
            return real(*a, **k)

        s._ds.read = spy
        got = s.sample(xq, yq, UTM14N)
    assert len(sizes) == 5 and max(sizes) <= 4  # five 2x2 windows, never the 64x64 raster
    np.testing.assert_allclose(got, rgi(z, gt)(xq, yq), atol=1e-6)


def test_refuses_what_is_not_a_single_band_georeferenced_geotiff(tmp_path):
    text = tmp_path / "not.tif"
    text.write_text("this is not a raster\n")
    with pytest.raises(InputError, match="not readable as a GeoTIFF"):
        inspect_dem(text)
    two = write_tif(tmp_path / "two.tif", CHECK_Z, CHECK_GT, bands=2)
    with pytest.raises(InputError, match="2 bands"):
        inspect_dem(two)
    nocrs = write_tif(tmp_path / "nocrs.tif", CHECK_Z, CHECK_GT, crs=None)
    with pytest.raises(InputError, match="no coordinate reference system"):
        inspect_dem(nocrs)
