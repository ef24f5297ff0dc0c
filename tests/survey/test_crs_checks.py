"""pyproj against published projection examples; area of use; missing grids."""

from __future__ import annotations

import numpy as np
import pytest
from pyproj.transformer import TransformerGroup

from archive.errors import CRSProblem
from archive.survey.crs import (
    checked_transformer,
    missing_grids,
    outside_area_of_use,
    survey_crs,
    transformer,
)


def test_transverse_mercator_guidance_note_7_2():
    # IOGP Publication 373-7-2 (EPSG Guidance Note 7-2), §3.2.3 Transverse Mercator (method
    # 9807) worked example, OSGB 1936 / British National Grid: 50°30'N, 0°30'E ->
    # E 577274.99 m, N 69740.50 m (figures rounded to cm; computed with pyproj: 577274.984,
    # 69740.492).
    e, n = transformer(4277, 27700).transform(0.5, 50.5)
    assert e == pytest.approx(577274.99, abs=0.02)
    assert n == pytest.approx(69740.50, abs=0.02)
    lon, lat = transformer(27700, 4277).transform(577274.99, 69740.50)
    assert lon == pytest.approx(0.5, abs=1e-6) and lat == pytest.approx(50.5, abs=1e-6)


def test_southern_hemisphere_utm_round_trip():
    # UTM zone 56S (EPSG:32756): central meridian 153°E, false easting 500000 m, false
    # northing 10 000 000 m in the southern hemisphere (UTM definition, EPSG:32756 record).
    rng = np.random.default_rng(2)
    lon = rng.uniform(150.0, 156.0, 200)
    lat = rng.uniform(-40.0, -0.5, 200)
    e, n = transformer(4326, 32756).transform(lon, lat)
    assert np.all(np.asarray(n) < 10_000_000) and np.all(np.asarray(n) > 5_500_000)
    lon2, lat2 = transformer(32756, 4326).transform(e, n)
    np.testing.assert_allclose(lon2, lon, atol=1e-9)
    np.testing.assert_allclose(lat2, lat, atol=1e-9)
    # on the central meridian E = 500000 exactly, and N mirrors the northern zone 56N about
    # the false northing (the projection is symmetric about the equator)
    e0, n_south = transformer(4326, 32756).transform(153.0, -25.0)
    _, n_north = transformer(4326, 32656).transform(153.0, 25.0)
    assert e0 == pytest.approx(500000.0, abs=1e-6)
    assert n_south == pytest.approx(10_000_000 - n_north, abs=1e-6)
    assert survey_crs("EPSG:32756").unit == "metre"


def test_area_of_use_of_utm_14n():
    # EPSG:32614 area of use: 102°W to 96°W, 0° to 84°N (EPSG dataset, read through pyproj)
    lon = np.array([-99.0, -101.9, -102.3, -95.5, -99.0])
    lat = np.array([35.0, 35.0, 35.0, 35.0, -0.5])
    e, n = transformer(4326, 32614).transform(lon, lat)
    out = outside_area_of_use(32614, np.asarray(e), np.asarray(n))
    assert out.tolist() == [False, False, True, True, True]
    widened = outside_area_of_use(32614, np.asarray(e), np.asarray(n), margin_deg=0.6)
    assert widened.tolist() == [False, False, False, False, False]


def test_missing_grid_is_named_never_bypassed():
    # NAD27 -> NAD83: PROJ ranks grid-based operations first. pyproj's TransformerGroup
    # (reference) says whether the best one can run here; our check must agree with it and,
    # when it cannot, refuse with the grid's name rather than fall back.
    with pytest.warns(UserWarning):
        group = TransformerGroup(4267, 4269, always_xy=True)
    names = missing_grids(4267, 4269)
    assert (names == []) == group.best_available
    if names:
        with pytest.raises(CRSProblem, match=names[0]):
            checked_transformer(4267, 4269)
    assert missing_grids(4326, 32614) == []
    assert checked_transformer(4326, 32614) is transformer(4326, 32614)
