"""GNSS heights into the model's datum: GGA, a constant separation, a PROJ geoid grid."""

from __future__ import annotations

from types import SimpleNamespace

import numpy as np
import pytest

from archive.errors import CRSProblem, UsageError
from archive.survey.heights import check_height_mode, gnss_orthometric
from archive.survey.surveys import create_survey
from tests.support.rasters import write_gtx

# NMEA GGA example (D. DePriest, "NMEA data", GGA example): altitude 545.4 m MSL,
# geoid separation 46.9 m, so the ellipsoidal height is 545.4 + 46.9 = 592.3 m (GGA field 11
# is the separation from ellipsoid to geoid, h = altitude + separation: gpsd NMEA.adoc §GGA).
LON, LAT, ALT, SEP = 11.516667, 48.1173, 545.4, 46.9


def survey(mode: str, param: str = "") -> SimpleNamespace:
    return SimpleNamespace(height_mode=mode, height_param=param)


def test_gga_mode_uses_the_altitude_or_h_minus_separation():
    h = gnss_orthometric([LON, LON], [LAT, LAT], [np.nan, ALT + SEP], [ALT, np.nan],
                         [SEP, SEP], survey("gga"))
    np.testing.assert_allclose(h, [545.4, 545.4], atol=1e-9)


def test_constant_mode():
    h = gnss_orthometric(LON, LAT, ALT + SEP, None, None, survey("constant", "40.0"))
    assert float(h) == pytest.approx(592.3 - 40.0)
    # only the GGA pair known: h = altitude + separation, then minus the constant
    h2 = gnss_orthometric([LON], [LAT], None, [ALT], [SEP], survey("constant", "40"))
    assert h2[0] == pytest.approx(552.3)


def test_grid_mode_reads_the_grid_through_proj(tmp_path):
    # N(lon, lat) = 20 + 2*(lon - 11) + 3*(lat - 48): bilinear interpolation reproduces a
    # linear field exactly, so PROJ's value is known in closed form.
    lats = 47.0 + 0.5 * np.arange(7)
    lons = 10.0 + 0.5 * np.arange(9)
    n_grid = 20 + 2 * (lons[None, :] - 11) + 3 * (lats[:, None] - 48)
    grid = tmp_path / "kestrel_test_geoid.gtx"
    write_gtx(grid, lats[0], lons[0], 0.5, 0.5, n_grid)
    s = survey("grid", str(grid))
    check_height_mode("grid", str(grid))
    lon = np.array([LON, 10.3, 13.9, 20.0])
    lat = np.array([LAT, 47.2, 49.9, 48.0])
    h = np.full(4, 600.0)
    got = gnss_orthometric(lon, lat, h, None, None, s)
    expected = 600.0 - (20 + 2 * (lon - 11) + 3 * (lat - 48))
    np.testing.assert_allclose(got[:3], expected[:3], atol=1e-4)
    assert np.isnan(got[3])  # outside the grid: no value, no guess


def test_missing_grid_is_reported_by_name(arc):
    with pytest.raises(CRSProblem, match="no_such_geoid_2099.tif"):
        gnss_orthometric([LON], [LAT], [600.0], None, None, survey("grid", "no_such_geoid_2099.tif"))
    with pytest.raises(CRSProblem, match="no_such_geoid_2099.tif"):
        create_survey(arc, "Kestrel Flats 3D", "EPSG:32614", height_mode="grid",
                      height_param="no_such_geoid_2099.tif")
    with pytest.raises(UsageError, match="separation in metres"):
        check_height_mode("constant", "about forty")
