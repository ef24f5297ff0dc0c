"""Heights from the model with the GNSS check, and the review flags, on hand-made cases."""

from __future__ import annotations

import numpy as np
import pytest

from archive.solve.flags import flag_strings, preplot_checks, station_keys
from archive.solve.heights import solve_heights
from archive.solve.params import default_params
from archive.solve.schema import FLAGS
from archive.survey.heights import gga_orthometric

HP = default_params()["height"]


def plane(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """A tilted model (slope 0.1 east, -0.05 north), nodata east of E = 1000."""
    z = 200.0 + 0.1 * x - 0.05 * y
    return np.where(x > 1000, np.nan, z)


def test_model_height_and_propagated_sigma() -> None:
    east, north = np.array([100.0, 500.0]), np.array([50.0, -20.0])
    se, sn = np.array([0.4, 0.8]), np.array([0.3, 0.2])
    h = solve_heights(east, north, se, sn, np.array([212.0, 300.0]), np.array([1.0, 1.0]),
                      plane, HP)
    assert list(h.source) == ["model", "model"]
    assert h.height == pytest.approx(plane(east, north))
    assert h.dh == pytest.approx(np.array([212.0, 300.0]) - plane(east, north))
    # first-order propagation (GUM, JCGM 100:2008 §5.1.2), exact for a plane; checked
    # against a Monte Carlo of the horizontal error through the same model
    rng = np.random.default_rng(0)
    mc = plane(east[0] + rng.normal(0, se[0], 200000), north[0] + rng.normal(0, sn[0], 200000))
    assert np.sqrt(h.sigma[0] ** 2 - HP["model_sigma"] ** 2) == pytest.approx(mc.std(), rel=0.01)


def test_off_model_falls_back_to_gnss() -> None:
    h = solve_heights(np.array([1500.0]), np.array([0.0]), np.array([0.5]), np.array([0.5]),
                      np.array([250.0]), np.array([0.7]), plane, HP)
    assert h.off_model[0] and h.source[0] == "gnss" and h.height[0] == 250.0
    assert h.sigma[0] == pytest.approx(np.hypot(0.7, HP["gnss_floor"]))
    none = solve_heights(np.array([1.0]), np.array([1.0]), np.array([0.5]), np.array([0.5]),
                         np.array([250.0]), np.array([0.7]), None, HP)
    assert not none.off_model[0] and none.source[0] == "gnss"


def test_gga_orthometric_height() -> None:
    # D. DePriest, 'NMEA data' (GGA example): altitude 545.4 m MSL, separation 46.9 m
    # -> h_ell 592.3 m
    assert gga_orthometric(np.array([592.3]), np.array([545.4]), np.array([46.9]))[0] == 545.4
    assert gga_orthometric(np.array([592.3]), np.array([np.nan]), np.array([46.9]))[0] == \
        pytest.approx(545.4)


def test_preplot_checks_match_brute_force() -> None:
    rng = np.random.default_rng(1)
    st_line = np.repeat([1001.0, 1002.0], 10)
    st_point = np.tile(np.arange(2001.0, 2011.0), 2)
    st_e = (st_point - 2001) * 25.0
    st_n = (st_line - 1001) * 200.0
    k = 30
    own = rng.integers(0, 20, k)
    east = st_e[own] + rng.normal(0, 8, k)
    north = st_n[own] + rng.normal(0, 8, k)
    own_key, st_key = station_keys((st_line[own], st_point[own], np.ones(k)),
                                   (st_line, st_point, np.ones(20)))
    out = preplot_checks(east, north, own_key, st_key, st_e, st_n, st_line, st_point)
    d = np.hypot(east[:, None] - st_e[None, :], north[:, None] - st_n[None, :])
    assert out["dist_preplot"] == pytest.approx(d[np.arange(k), own])
    d[np.arange(k), own] = np.inf
    assert out["dist_nearest"] == pytest.approx(d.min(axis=1))
    assert out["nearest_point"] == pytest.approx(st_point[d.argmin(axis=1)])


def test_flag_strings_use_the_contract_keys_in_order() -> None:
    p = default_params()
    n = 4
    cols = {"n_used": np.array([5000, 50, 0, 5000]), "span_s": np.array([9e4, 600, 0, 9e4]),
            "allowed_s": np.array([9.5e4, 9.5e4, 9.5e4, 9.5e4]),
            "expected": np.array([5500.0, 5500.0, 5500.0, 5500.0]),
            "unit_scale": np.array([1.0, 20.0, 0.0, 1.0]),
            "moved": np.array([False, True, False, False]),
            "dist_preplot": np.array([0.5, 30.0, np.nan, 3.0]),
            "dist_nearest": np.array([25.0, 10.0, np.nan, 22.0]),
            "dh": np.array([0.3, 9.0, np.nan, -0.5]),
            "dh_sigma": np.array([2.0, 2.0, np.nan, 2.0]),
            "off_model": np.array([False, False, False, True]),
            "kind": np.array(["logged", "logged", "logged", "unlogged"], dtype=object)}
    out = flag_strings(cols, p)
    assert list(out) == ["", "few-fixes;short-span;wide-spread;moved;far-from-plan;"
                         "nearer-other;height-mismatch", "unoccupied", "off-model;unlogged"]
    assert len(out) == n
    for f in out:
        keys = [x for x in f.split(";") if x]
        assert keys == [k for k in FLAGS if k in keys]  # fixed order of the contract


def _cols(**given: np.ndarray) -> dict[str, np.ndarray]:
    n = len(next(iter(given.values())))
    base = {"n_used": np.full(n, 5000), "span_s": np.full(n, 9e4),
            "allowed_s": np.full(n, 9.5e4), "expected": np.full(n, 5500.0),
            "unit_scale": np.ones(n), "moved": np.zeros(n, bool),
            "dist_preplot": np.full(n, 0.5), "dist_nearest": np.full(n, 25.0),
            "dh": np.zeros(n), "dh_sigma": np.full(n, 2.0), "off_model": np.zeros(n, bool),
            "kind": np.full(n, "logged", dtype=object)}
    return base | given


def test_short_span_and_few_fixes_are_relative_to_the_window() -> None:
    """A same-day deployment logged in full is not short; a node that died early is, at
    any window length. The rules, with the share 0.5 of the defaults: short-span when the
    used fixes span less than half the window, few-fixes below half the fixes the window
    allows at the node's interval (or below the absolute minimum)."""
    p = default_params()
    hours = np.array([5.0, 5.0, 71.0, 71.0, 11.0, 11.0])
    span = np.array([4.9, 2.0, 70.0, 3.0, 10.8, 10.8]) * 3600
    expected = hours * 3600 / np.array([30.0, 30.0, 30.0, 30.0, 1.0, 1.0])
    used = np.array([580, 240, 8400, 360, 38000, 12000])
    out = flag_strings(_cols(span_s=span, allowed_s=hours * 3600, expected=expected,
                             n_used=used), p)
    assert list(out) == ["", "few-fixes;short-span", "", "few-fixes;short-span", "",
                         "few-fixes"]
    # the same rows under a run made before the relative rules (absolute 6 h, 120 fixes)
    old = default_params()
    for key in ("min_span_fraction", "min_fix_fraction"):
        del old["flags"][key]
    old["flags"]["min_span_hours"] = 6.0
    out = flag_strings(_cols(span_s=span, allowed_s=hours * 3600, expected=expected,
                             n_used=used), old)
    assert list(out) == ["short-span", "short-span", "", "short-span", "", ""]


def test_height_mismatch_needs_the_difference_beyond_its_own_sigma() -> None:
    p = default_params()  # height_tol 6 m and height_z 3
    out = flag_strings(_cols(dh=np.array([7.0, 7.0, -9.0]),
                             dh_sigma=np.array([2.0, 3.0, 2.9])), p)
    assert list(out) == ["height-mismatch", "", "height-mismatch"]
