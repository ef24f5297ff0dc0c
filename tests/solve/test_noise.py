"""The pooled error model (``uncertainty.method = "pooled"``): closed forms against numerical
integration (scipy), the model recovering a known Gauss–Markov process, the empirical Bayes
moderation of Smyth (2004) on draws from its own prior, and the F coverage factor."""

from __future__ import annotations

import numpy as np
import pytest
from archive.seeds.gnss_errors import gauss_markov
from scipy import integrate
from scipy.special import polygamma

from archive.solve.noise import (
    _trigamma_inverse,
    centre_covariance,
    coverage_factor,
    fit_model,
    gm_allan_variance,
    gm_mean_variance,
    moderated_level,
    row_noise,
)
from archive.solve.uncertainty import CHI2_2_95


@pytest.mark.parametrize("tau, span", [(600.0, 3600.0), (1800.0, 5 * 3600.0),
                                       (3600.0, 1800.0), (90.0, 86400.0)])
def test_gauss_markov_variance_of_a_mean_against_integration(tau: float, span: float) -> None:
    # Var(mean over T) = (2/T) ∫₀ᵀ (1 − u/T) e^(−u/τ) du, integrated numerically (scipy)
    direct, _ = integrate.quad(lambda u: (1 - u / span) * np.exp(-u / tau), 0, span)
    assert gm_mean_variance(tau, span) == pytest.approx(2 * direct / span, rel=1e-9)


@pytest.mark.parametrize("tau, block", [(600.0, 600.0), (1800.0, 7200.0), (3600.0, 900.0)])
def test_gauss_markov_allan_variance_against_integration(tau: float, block: float) -> None:
    # AVAR(L) = ½E(ȳ₂ − ȳ₁)² = V(L) − Cov(ȳ₁, ȳ₂); the covariance of two adjacent block
    # means is (1/L²) ∫₀ᴸ ∫_L^2L e^(−(v−u)/τ) dv du, integrated numerically (scipy)
    cov, _ = integrate.dblquad(lambda v, u: np.exp(-(v - u) / tau), 0, block, block,
                               2 * block)
    expected = gm_mean_variance(tau, block) - cov / block**2
    assert gm_allan_variance(tau, block) == pytest.approx(expected, rel=1e-7)


def _windows(hours: float, dt: float, k: int, seed: int) -> tuple[np.ndarray, ...]:
    """k windows of a 2 m / 30 min Gauss–Markov error plus 0.5 m white noise per axis."""
    rng = np.random.default_rng(seed)
    n = int(hours * 3600 / dt)
    e = gauss_markov(rng, n, dt, 2.0, 1800.0, size=k) + rng.normal(0, 0.5, (k, n))
    no = gauss_markov(rng, n, dt, 2.0, 1800.0, size=k) + rng.normal(0, 0.5, (k, n))
    ce, cn = e.mean(axis=1), no.mean(axis=1)
    row = np.repeat(np.arange(k), n)
    t = np.tile(np.arange(n) * dt, k).astype(float)
    de, dn = (e - ce[:, None]).ravel(), (no - cn[:, None]).ravel()
    return de, dn, t, row, ce, cn, n


@pytest.mark.parametrize("hours, dt", [(6.0, 30.0), (11.0, 30.0), (8.0, 1.0)])
def test_the_pooled_model_recovers_a_known_process(hours: float, dt: float) -> None:
    k = 120 if dt > 1 else 60
    de, dn, t, row, ce, cn, n = _windows(hours, dt, k, seed=41)
    ones = np.ones(len(row))
    rows = row_noise(de, dn, ones, ones, t, row, k)
    model = fit_model(rows, np.ones(k, dtype=bool))
    cov = centre_covariance(rows, model, 0.0, np.ones(k, dtype=bool))
    truth = 4.0 * gm_mean_variance(1800.0, hours * 3600) + 0.25 / n  # per axis
    assert np.median(0.5 * (cov.vee + cov.vnn)) == pytest.approx(truth, rel=0.15)
    # the windows' own centres (truth 0) against their stated 95 % ellipse
    m2 = ce**2 / cov.vee + cn**2 / cov.vnn
    inside = np.mean(m2 <= CHI2_2_95 * coverage_factor(cov.dof))
    assert 0.9 <= inside <= 0.99


def test_moderation_pools_levels_that_differ_by_sampling_alone() -> None:
    rng = np.random.default_rng(42)
    d = np.full(400, 12.0)
    s2 = 3.0 * rng.chisquare(d) / d  # one true level, sampling noise only
    level, dof, d0 = moderated_level(s2, d, np.ones(400, dtype=bool))
    assert d0 > 50
    assert np.allclose(level, level[0]) and level[0] == pytest.approx(3.0, rel=0.05)
    assert np.all(dof > d)


def test_moderation_recovers_its_prior() -> None:
    # Smyth (2004): 1/σ² ~ χ²_d0 / (d0·s0²), s² | σ² ~ σ²·χ²_d / d
    rng = np.random.default_rng(43)
    g, d0, s0, d = 4000, 8.0, 2.0, 20.0
    sigma2 = d0 * s0 / rng.chisquare(d0, g)
    s2 = sigma2 * rng.chisquare(d, g) / d
    level, dof, est = moderated_level(s2, np.full(g, d), np.ones(g, dtype=bool))
    assert est == pytest.approx(d0, rel=0.25)
    assert np.all(dof == pytest.approx(est + d))
    # the posterior lies between the cloud's own value and the prior
    lo, hi = np.minimum(s2, s0 * 0.8), np.maximum(s2, s0 * 1.25)
    assert np.all((level >= lo) & (level <= hi))


@pytest.mark.parametrize("x", [0.05, 0.3, 1.0, 4.0, 50.0])
def test_trigamma_inverse(x: float) -> None:
    assert float(polygamma(1, _trigamma_inverse(x))) == pytest.approx(x, rel=1e-7)


def test_the_coverage_factor_is_the_hotelling_quantile() -> None:
    # F(0.95; 2, 10) = 4.103 and F(0.95; 2, 30) = 3.316 (upper 5 % points of the F
    # distribution, NIST/SEMATECH e-Handbook of Statistical Methods 1.3.6.7.3; from memory)
    k2 = coverage_factor(np.array([10.0, 30.0, 1e9]))
    assert k2[0] == pytest.approx(2 * 4.103 / CHI2_2_95, rel=1e-3)
    assert k2[1] == pytest.approx(2 * 3.316 / CHI2_2_95, rel=1e-3)
    assert k2[2] == pytest.approx(1.0, abs=1e-6)  # the χ²₂ ellipse as ν → ∞
