"""Uncertainty formulas against closed forms, scipy and published formulas (NCAR NCL docs)."""

from __future__ import annotations

import numpy as np
import pytest
from archive.seeds.gnss_errors import gauss_markov
from pyproj import Transformer
from scipy.stats import chi2

from archive.solve.segments import from_local, seg_median, to_local
from archive.solve.uncertainty import (
    CHI2_2_95,
    ar1_mean_variance,
    batch_covariance,
    ellipse95,
    gauss_markov_mean_variance,
    radius95,
)


@pytest.mark.parametrize("rho, n, n_eff", [
    # exact finite-n AR(1) n_eff (closed form, computed and checked against direct summation;
    # large-n form n(1-ρ)/(1+ρ) from NCAR NCL equiv_sample_size documentation, after Zwiers &
    # von Storch (1995))
    (0.5, 100, 33.784), (0.9, 1000, 53.135), (0.99, 3600, 18.605),
    (np.exp(-1 / 600), 3600, 3.598),
])
def test_ar1_effective_sample_size_table(rho: float, n: int, n_eff: float) -> None:
    assert 1.0 / ar1_mean_variance(1.0, rho, n) == pytest.approx(n_eff, abs=1e-3)


def test_ar1_variance_equals_direct_summation() -> None:
    rho, n = 0.8, 250  # Var(x̄) = (1/n²) Σ_ij ρ^|i-j|
    i = np.arange(n)
    direct = (rho ** np.abs(i[:, None] - i[None, :])).sum() / n**2
    assert ar1_mean_variance(1.0, rho, n) == pytest.approx(direct, rel=1e-12)


@pytest.mark.parametrize("sigma, tau, span, var", [
    # first-order Gauss–Markov, variance of the time average: closed form from memory (e.g.
    # Gelb, Applied Optimal Estimation); values computed, checked against the AR(1) sum
    (1.0, 600, 3600, 0.277915), (1.0, 600, 86400, 0.0137924), (1.0, 3600, 3600, 0.735759),
    (2.0, 900, 7200, 0.875042),
])
def test_gauss_markov_mean_variance_table(sigma: float, tau: float, span: float,
                                          var: float) -> None:
    assert gauss_markov_mean_variance(sigma**2, tau, span) == pytest.approx(var, rel=5e-6)  # table rounded to 6 digits


@pytest.mark.parametrize("ratio, r95", [
    # exact R95 of an elliptical normal (σmax = 1) by σmin/σmax, computed with scipy by
    # numerical integration
    (1.0, 2.4477), (0.8, 2.2303), (0.5, 2.0359), (0.3, 1.9842), (0.2, 1.9704),
    (0.1, 1.9625), (1e-6, 1.9600),
])
def test_r95_matches_the_published_table(ratio: float, r95: float) -> None:
    got = radius95(np.array([1.0]), np.array([ratio**2]), np.array([0.0]))[0]
    assert got == pytest.approx(r95, abs=1e-4)
    # rotation does not change the radius
    c, s = np.cos(0.7), np.sin(0.7)
    vee, vnn = c * c + s * s * ratio**2, s * s + c * c * ratio**2
    ven = c * s * (1 - ratio**2)
    assert radius95(np.array([vee]), np.array([vnn]), np.array([ven]))[0] == pytest.approx(got)


def test_ellipse_axes_and_bearing() -> None:
    assert abs(CHI2_2_95 - chi2.ppf(0.95, 2)) < 1e-12
    assert abs(CHI2_2_95 - 5.991465) < 1e-6  # computed with scipy.stats.chi2
    # σE = 2, σN = 1: major axis east-west (bearing 90°), semi-axes √5.991·σ
    major, minor, bearing = ellipse95(np.array([4.0]), np.array([1.0]), np.array([0.0]))
    assert major[0] == pytest.approx(2 * 2.447747, abs=1e-5)
    assert minor[0] == pytest.approx(2.447747, abs=1e-5)
    assert bearing[0] == pytest.approx(90.0)
    # perfectly correlated east and north: the major axis points north-east (45°)
    _, _, b = ellipse95(np.array([1.0]), np.array([1.0]), np.array([0.99]))
    assert b[0] == pytest.approx(45.0)


def test_batch_means_are_honest_for_gauss_markov_errors() -> None:
    """Reported sd of the mean vs the closed form of §6.2, over many simulated windows.

    200 windows of 3 days at 30 s of a Gauss–Markov error (σ = 2 m, τ = 30 min): the
    average batch-means variance must be near the closed form, and far above σ²/n.
    """
    rng = np.random.default_rng(1)
    dt, tau, sigma, n, k = 30.0, 1800.0, 2.0, 8640, 200
    x = gauss_markov(rng, n, dt, sigma, tau, size=k)
    de = (x - x.mean(axis=1, keepdims=True)).ravel()
    seg = np.repeat(np.arange(k), n)
    t = np.tile(np.arange(n) * dt, k)
    cov = batch_covariance(de, np.zeros_like(de), np.ones_like(de), t, seg, k,
                           batch_s=3 * 3600, min_batches=4)
    theory = gauss_markov_mean_variance(sigma**2, tau, n * dt)
    assert cov.vee.mean() == pytest.approx(theory, rel=0.2)
    assert cov.vee.mean() > 20 * sigma**2 / n  # σ²/n would be far too optimistic
    assert x.mean(axis=1).var() == pytest.approx(theory, rel=0.3)  # the simulation itself


def test_local_plane_agrees_with_the_topocentric_frame() -> None:
    """EPSG method 9837 (geographic -> topocentric) through PROJ.

    As in the worked example of IOGP Publication 373-7-2 (Guidance Note 7-2), method 9837.
    """
    lat0, lon0 = 32.36, -97.81
    topo = Transformer.from_pipeline(
        f"+proj=pipeline +step +proj=cart +ellps=WGS84 +step +proj=topocentric "
        f"+ellps=WGS84 +lon_0={lon0} +lat_0={lat0} +h_0=0")
    rng = np.random.default_rng(2)
    lat = lat0 + rng.uniform(-5e-4, 5e-4, 200)  # ±55 m
    lon = lon0 + rng.uniform(-5e-4, 5e-4, 200)
    e_ref, n_ref, _ = topo.transform(lon, lat, np.zeros(200))
    e, n = to_local(lat, lon, np.full(200, lat0), np.full(200, lon0))
    assert np.max(np.hypot(e - e_ref, n - n_ref)) < 1e-3  # well under a millimetre
    back_lat, back_lon = from_local(e, n, np.full(200, lat0), np.full(200, lon0))
    assert np.max(np.abs(back_lat - lat)) < 1e-12 and np.max(np.abs(back_lon - lon)) < 1e-12


def test_segment_median_equals_numpy_median() -> None:
    rng = np.random.default_rng(4)
    sizes = np.array([1, 2, 5, 0, 100, 4001])
    seg = np.repeat(np.arange(len(sizes)), sizes)
    v = rng.normal(0, 5, len(seg))
    got = seg_median(v, seg, len(sizes))
    at = np.concatenate([[0], np.cumsum(sizes)])
    for i in range(len(sizes)):
        part = v[at[i]:at[i + 1]]
        if len(part):
            assert got[i] == pytest.approx(np.median(part), abs=1e-12)
        else:
            assert np.isnan(got[i])
