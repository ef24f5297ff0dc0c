"""qc figures against a hand computation on the small fixture of tables.py.

Hand computation (differences are position minus check point; see tables.SOLVED_MINUS_CHECK):

  station  dE    dN    dH     horizontal = sqrt(dE^2 + dN^2)
  2001     0.3   0.4   0.1    0.5
  2002    -0.6   0.8  -0.2    1.0
  2003     1.2  -0.5   0.3    1.3
  2004     0.0  -2.0  -0.4    2.0
  2005    -3.0   4.0   0.5    5.0

Horizontal: mean = 9.8 / 5 = 1.96; median = 1.3;
  RMS = sqrt((0.25 + 1 + 1.69 + 4 + 25) / 5) = sqrt(6.388) = 2.527449;
  95th percentile, numpy "linear" (Hyndman & Fan definition 7): rank (5 - 1) * 0.95 = 3.8
  between sorted values 2.0 and 5.0 -> 2.0 + 0.8 * 3.0 = 4.4; max = 5.0.
East: mean = -2.1 / 5 = -0.42; deviations 0.72, -0.18, 1.62, 0.42, -2.58;
  squares sum 0.5184 + 0.0324 + 2.6244 + 0.1764 + 6.6564 = 10.008; sd = sqrt(10.008 / 4)
  = sqrt(2.502) = 1.581771.
North: mean = 2.7 / 5 = 0.54; deviations -0.14, 0.26, -1.04, -2.54, 3.46;
  squares sum 0.0196 + 0.0676 + 1.0816 + 6.4516 + 11.9716 = 19.592; sd = sqrt(4.898) = 2.213143.
  Covariance: products of deviations -0.1008 - 0.0468 - 1.6848 - 1.0668 - 8.9268 = -11.826,
  / 4 = -2.9565; correlation = -2.9565 / (1.581771 * 2.213143) = -0.844549.
  DRMS = sqrt(2.502 + 4.898) = sqrt(7.4) = 2.720294; 2DRMS = 5.440588.
Vertical: mean = 0.3 / 5 = 0.06; deviations 0.04, -0.26, 0.24, -0.46, 0.44; squares sum
  0.532; sd = sqrt(0.133) = 0.364692. |dH| = 0.1..0.5: mean 0.3, median 0.3,
  RMS = sqrt(0.55 / 5) = 0.331662, p95 = 0.4 + 0.8 * 0.1 = 0.48, max 0.5.

Preplot minus check point (tables.PREPLOT_MINUS_CHECK):
  (1.0, 0.0) -> 1.0; (0.0, -2.0) -> 2.0; (1.5, 2.0) -> 2.5; (-0.6, -0.8) -> 1.0; (0.5, 1.2) -> 1.3
  mean = 7.8 / 5 = 1.56; median 1.3; RMS = sqrt((1 + 4 + 6.25 + 1 + 1.69) / 5) = sqrt(2.788)
  = 1.669731; p95 = 2.0 + 0.8 * 0.5 = 2.4; max 2.5.
  East mean 2.4 / 5 = 0.48, squares of deviations sum 2.708, sd = sqrt(0.677) = 0.822800.
  North mean 0.4 / 5 = 0.08, squares of deviations sum 10.048, sd = sqrt(2.512) = 1.584929.
  Vertical (preplot elevation minus check height) 0, 1, -1, 2, -2: mean 0,
  sd = sqrt(10 / 4) = 1.581139; |.| mean 1.2, max 2.

Tolerance 1.5 m: solved stations beyond are 2005 (5.0) then 2004 (2.0); within 3 / 5 = 0.6.
"""

from __future__ import annotations

import numpy as np
import pytest

from archive.qc.stats import compare, join_checks
from tests.support.qc_tables import small_fixture

ABS = 1e-6  # coordinates near 6e5 m carry ~1e-10 m of float rounding


@pytest.fixture
def result():
    positions, control, stations = small_fixture()
    return compare(positions, control, stations, tolerance=1.5)


def test_join_keeps_delivered_checked_stations_only(result):
    pts = result.points
    # the undelivered part of 2003, the unchecked 2006 and the orphan check point 2099 stay out
    assert pts["point"].to_pylist() == [2001.0, 2002.0, 2003.0, 2004.0, 2005.0]
    assert pts["dist"].to_pylist() == pytest.approx([0.5, 1.0, 1.3, 2.0, 5.0], abs=ABS)
    assert pts["pre_dist"].to_pylist() == pytest.approx([1.0, 2.0, 2.5, 1.0, 1.3], abs=ABS)


def test_solved_summary_matches_hand_computation(result):
    h = result.solved.horizontal
    assert h.n == 5
    assert h.mean == pytest.approx(1.96, abs=ABS)
    assert h.median == pytest.approx(1.3, abs=ABS)
    assert h.rms == pytest.approx(2.527449, abs=1e-6)
    assert h.p95 == pytest.approx(4.4, abs=ABS)
    assert h.max == pytest.approx(5.0, abs=ABS)
    assert result.solved.east.bias == pytest.approx(-0.42, abs=ABS)
    assert result.solved.east.spread == pytest.approx(1.581771, abs=1e-6)
    assert result.solved.north.bias == pytest.approx(0.54, abs=ABS)
    assert result.solved.north.spread == pytest.approx(2.213143, abs=1e-6)
    v, va = result.solved.vertical, result.solved.vertical_abs
    assert v.bias == pytest.approx(0.06, abs=ABS)
    assert v.spread == pytest.approx(0.364692, abs=1e-6)
    assert (va.mean, va.median, va.p95, va.max) == pytest.approx((0.3, 0.3, 0.48, 0.5), abs=ABS)
    assert va.rms == pytest.approx(0.331662, abs=1e-6)
    a = result.solved.accuracy
    assert a.corr_en == pytest.approx(-0.844549, abs=1e-6)
    assert a.drms == pytest.approx(2.720294, abs=1e-6)
    assert a.two_drms == pytest.approx(5.440588, abs=1e-6)


def test_solved_cep_r95_agree_with_a_monte_carlo_of_the_same_covariance(result):
    # Independent check of the elliptical CEP/R95: sample N(0, C) with numpy and take the
    # empirical 50 % and 95 % radii (2e5 samples: sampling error well under 1 %).
    a = result.solved.accuracy
    cov = [[a.sigma_e**2, a.corr_en * a.sigma_e * a.sigma_n],
           [a.corr_en * a.sigma_e * a.sigma_n, a.sigma_n**2]]
    xy = np.random.default_rng(5).multivariate_normal([0, 0], cov, 200_000)
    r = np.hypot(xy[:, 0], xy[:, 1])
    assert a.cep == pytest.approx(np.percentile(r, 50), rel=0.01)
    assert a.r95 == pytest.approx(np.percentile(r, 95), rel=0.01)


def test_preplot_side_by_side_matches_hand_computation(result):
    h = result.preplot.horizontal
    assert h.n == result.solved.horizontal.n == 5  # same stations: a paired comparison
    assert (h.mean, h.median, h.p95, h.max) == pytest.approx((1.56, 1.3, 2.4, 2.5), abs=ABS)
    assert h.rms == pytest.approx(1.669731, abs=1e-6)
    assert result.preplot.east.bias == pytest.approx(0.48, abs=ABS)
    assert result.preplot.east.spread == pytest.approx(0.822800, abs=1e-6)
    assert result.preplot.north.bias == pytest.approx(0.08, abs=ABS)
    assert result.preplot.north.spread == pytest.approx(1.584929, abs=1e-6)
    assert result.preplot.vertical.bias == pytest.approx(0.0, abs=ABS)
    assert result.preplot.vertical.spread == pytest.approx(1.581139, abs=1e-6)
    assert result.preplot.vertical_abs.mean == pytest.approx(1.2, abs=ABS)


def test_tolerance_listing(result):
    assert result.beyond["point"].to_pylist() == [2005.0, 2004.0]
    assert result.beyond["dist"].to_pylist() == pytest.approx([5.0, 2.0], abs=ABS)
    assert result.solved.within_tolerance == pytest.approx(0.6)
    # a tighter tolerance lists more, largest first
    positions, control, stations = small_fixture()
    tight = compare(positions, control, stations, tolerance=0.9)
    assert tight.beyond["point"].to_pylist() == [2005.0, 2004.0, 2003.0, 2002.0]
    with pytest.raises(ValueError):
        compare(positions, control, stations, tolerance=0.0)


def test_latest_check_point_wins_and_stations_fill_a_missing_preplot():
    from datetime import timedelta

    from tests.support.qc_tables import T0, control_table, positions_table, stations_table

    pos = positions_table([{"line": 1.0, "point": 1.0, "easting": 100.0, "northing": 200.0}])
    ctl = control_table([
        {"line": 1.0, "point": 1.0, "easting": 90.0, "northing": 200.0, "surveyed": T0},
        {"line": 1.0, "point": 1.0, "easting": 99.0, "northing": 200.0,
         "surveyed": T0 + timedelta(days=1)},
    ])
    sta = stations_table([{"line": 1.0, "point": 1.0, "easting": 101.0, "northing": 200.0}])
    pts = join_checks(pos, ctl, sta)
    assert pts["de"].to_pylist() == [1.0]  # re-surveyed point: the later survey is used
    assert pts["pre_de"].to_pylist() == [2.0]


def test_each_check_point_checks_the_occupation_it_surveyed():
    """A station occupied twice (the second node re-laid 4 m east), each occupation surveyed
    once by RTK: each check point is compared with the node then in the ground."""
    from datetime import timedelta

    from tests.support.qc_tables import T0, control_table, positions_table

    day = timedelta(days=1)
    pos = positions_table([
        {"line": 1001.0, "point": 2001.0, "occupation": 1, "node": "N1", "easting": 612000.0,
         "northing": 3512000.0, "deployed": T0, "retrieved": T0 + 2 * day},
        {"line": 1001.0, "point": 2001.0, "occupation": 2, "node": "N2", "easting": 612004.0,
         "northing": 3512000.0, "deployed": T0 + 3 * day, "retrieved": T0 + 5 * day},
    ])
    ctl = control_table([
        {"line": 1001.0, "point": 2001.0, "easting": 612004.3, "northing": 3512000.4,
         "surveyed": T0 + 4 * day},
        {"line": 1001.0, "point": 2001.0, "easting": 612000.3, "northing": 3512000.4,
         "surveyed": T0 + day},
        # the first occupation surveyed again later the same day: the later survey counts
        {"line": 1001.0, "point": 2001.0, "easting": 612000.6, "northing": 3512000.8,
         "surveyed": T0 + day + timedelta(hours=2)},
    ])
    pts = join_checks(pos, ctl).to_pylist()
    assert [(p["occupation"], p["node"]) for p in pts] == [(1, "N1"), (2, "N2")]
    # 0.6, 0.8 east and north of the first node: 1.0 m (3-4-5 triangle); 0.3, 0.4: 0.5 m
    assert [round(p["dist"], 9) for p in pts] == [1.0, 0.5]
