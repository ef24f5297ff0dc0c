"""A survey grid in US survey feet: sigmas, ellipses, r95 and preplot distances stay metres.

The same simulated fixes are solved with the preplot in three grids covering the place:
EPSG:32614 (WGS 84 / UTM zone 14N, metres), EPSG:32138 (NAD83 / Texas North Central,
metres) and EPSG:2276 (the same Lambert zone in US survey feet). 32138 and 2276 differ only
in the unit (EPSG registry: both are SPCS83 Texas North Central, 1 US survey foot =
1200/3937 m), so every metre quantity must agree to rounding. Between UTM and the Lambert
zone only the point scale factor differs: a rotation-invariant length divided by that
grid's scale factor (pyproj ``Proj.get_factors``, the PROJ reference) must agree.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pytest
from archive.seeds.simulate import Simulation
from pyproj import Proj

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.survey.crs import survey_crs, transformer

US_FOOT = 1200 / 3937  # metres per US survey foot (NIST, definition of the survey foot)


def _in_grid(sim: Simulation, epsg: int) -> pa.Table:
    st = sim.stations
    e, n = transformer(sim.meta["epsg"], epsg).transform(st["easting"].to_numpy(),
                                                         st["northing"].to_numpy())
    st = st.set_column(st.schema.get_field_index("easting"), "easting", pa.array(np.asarray(e)))
    return st.set_column(st.schema.get_field_index("northing"), "northing",
                         pa.array(np.asarray(n)))


@pytest.fixture(scope="module")
def solved(small_sim: Simulation) -> dict[int, dict]:
    out = {}
    for epsg in (32614, 32138, 2276):
        res = solve_fixes(small_sim.fixes, small_sim.deployments, _in_grid(small_sim, epsg),
                          default_params(), epsg)
        out[epsg] = res.positions.to_pydict()
    return out


def _col(pos: dict, key: str) -> np.ndarray:
    return np.array(pos[key], dtype=float)


def test_foot_grid_reports_metres(solved: dict[int, dict]) -> None:
    assert survey_crs(2276).unit_factor == pytest.approx(US_FOOT, rel=1e-12)
    m, ft = solved[32138], solved[2276]
    assert m["node"] == ft["node"] and m["kind"] == ft["kind"]
    assert m["flags"] == ft["flags"]
    assert any(m["flags"])  # the simulation's move, swap and unlogged cluster are flagged
    for key in ("sigma_e", "sigma_n", "ell_major", "ell_minor", "r95", "dist_preplot",
                "dist_nearest", "spread"):
        np.testing.assert_allclose(_col(ft, key), _col(m, key), rtol=1e-6, err_msg=key)
    np.testing.assert_allclose(_col(ft, "corr_en"), _col(m, "corr_en"), atol=1e-9)
    np.testing.assert_allclose(_col(ft, "ell_bearing"), _col(m, "ell_bearing"), atol=1e-6)
    # easting/northing stay in the CRS unit: feet
    np.testing.assert_allclose(_col(ft, "easting") * US_FOOT, _col(m, "easting"), atol=1e-4)
    np.testing.assert_allclose(_col(ft, "northing") * US_FOOT, _col(m, "northing"), atol=1e-4)


def test_foot_grid_against_utm(solved: dict[int, dict]) -> None:
    utm, ft = solved[32614], solved[2276]
    assert utm["node"] == ft["node"] and utm["flags"] == ft["flags"]
    lon, lat = _col(utm, "lon"), _col(utm, "lat")
    occ = np.isfinite(lon)
    k_utm = np.full(len(lon), np.nan)
    k_ft = np.full(len(lon), np.nan)
    k_utm[occ] = Proj("EPSG:32614").get_factors(lon[occ], lat[occ]).meridional_scale
    k_ft[occ] = Proj("EPSG:2276").get_factors(lon[occ], lat[occ]).meridional_scale
    # lengths that do not depend on the grid's rotation scale with the point scale factor
    for key in ("r95", "ell_major", "ell_minor", "dist_preplot"):
        np.testing.assert_allclose(_col(ft, key) / k_ft, _col(utm, key) / k_utm, rtol=1e-6,
                                   err_msg=key)
    # a foot grid left in feet would be 3.28 times larger: make sure the check can tell
    assert np.nanmedian(_col(ft, "r95")) < 10.0
