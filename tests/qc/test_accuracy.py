"""CEP, R95, DRMS and 2DRMS against published factors and exact values.

Published: van Diggelen, "GPS Accuracy: Lies, Damn Lies, and Statistics", GPS World, Jan 1998;
National Research Council, The Global Positioning System: A Shared National Asset (1995),
appendix D. Exact values computed with scipy (closed forms and numerical integration).
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from archive.qc.accuracy import accuracy_from_errors, accuracy_from_sigmas, radius_containing


def test_circular_factors_are_the_rayleigh_closed_forms():
    # Circular bivariate normal: the radial error is Rayleigh distributed, so
    # CEP = sqrt(2 ln 2) sigma = 1.177410 sigma, R95 = sqrt(-2 ln 0.05) sigma = 2.447747 sigma,
    # DRMS = sqrt(2) sigma, 2DRMS = 2 sqrt(2) sigma (closed forms, computed with scipy).
    a = accuracy_from_sigmas(2.0, 2.0)
    assert a.cep == pytest.approx(2.0 * math.sqrt(2 * math.log(2)), rel=1e-9)
    assert a.cep / 2.0 == pytest.approx(1.177410, abs=1e-6)
    assert a.r95 / 2.0 == pytest.approx(2.447747, abs=1e-6)
    assert a.drms == pytest.approx(2.0 * math.sqrt(2), rel=1e-12)
    assert a.two_drms == pytest.approx(4.0 * math.sqrt(2), rel=1e-12)
    # van Diggelen, "GPS Accuracy: Lies, Damn Lies, and Statistics", GPS World 1998, table of
    # equivalent measures (rounded): CEP -> R95 x2.1, CEP -> 2drms x2.4, CEP -> rms x1.2.
    assert a.r95 / a.cep == pytest.approx(2.1, abs=0.05)
    assert a.two_drms / a.cep == pytest.approx(2.4, abs=0.05)
    assert a.drms / a.cep == pytest.approx(1.2, abs=0.05)


@pytest.mark.parametrize(("ratio", "cep", "r95"), [
    # exact elliptical CEP and R95 for sigma_max = 1, computed with scipy by numerical
    # integration (an independent computation from this module's).
    (0.8, 1.05769, 2.2303), (0.5, 0.87042, 2.0359), (0.3, 0.74994, 1.9842),
    (0.2, 0.70585, 1.9704), (0.1, 0.68199, 1.9625),
])
def test_elliptical_cep_r95_match_the_table(ratio, cep, r95):
    assert radius_containing(0.5, 1.0, ratio) == pytest.approx(cep, abs=2e-5)
    assert radius_containing(0.95, 1.0, ratio) == pytest.approx(r95, abs=2e-4)


def test_degenerate_line_is_the_one_dimensional_normal():
    # sigma_min -> 0: CEP = 0.67449 sigma (1-D median of |x|) and R95 = 1.9600 sigma
    # (the 1-D normal quantiles, computed with scipy.stats.norm).
    assert radius_containing(0.5, 1.0, 0.0) == pytest.approx(0.6744897501960817, abs=1e-9)
    assert radius_containing(0.95, 1.0, 0.0) == pytest.approx(1.959963984540054, abs=1e-9)


def test_nrc_approximation_holds_for_moderate_ellipticity():
    # National Research Council (1995), appendix D: CEP = 0.589 (sigma_N + sigma_E); good to
    # about 2 % for sigma_min / sigma_max >= 0.3 (threshold from memory; +2.1 % at 0.3 against
    # the exact CEP computed with scipy by numerical integration).
    for se, sn in [(1.0, 1.0), (1.0, 0.5), (0.3, 1.0), (2.0, 1.6)]:
        a = accuracy_from_sigmas(se, sn)
        assert a.cep == pytest.approx(0.589 * (se + sn), rel=0.025)


def test_correlation_is_rotated_to_the_principal_axes():
    # sigma_e = sigma_n = 1 with correlation 0.6: eigenvalues 1.6 and 0.4, axis ratio 0.5,
    # so CEP = 0.87042 * sqrt(1.6) (exact ratio-0.5 CEP, computed with scipy by numerical
    # integration).
    a = accuracy_from_sigmas(1.0, 1.0, 0.6)
    assert a.sigma_major == pytest.approx(math.sqrt(1.6))
    assert a.sigma_minor == pytest.approx(math.sqrt(0.4))
    assert a.cep == pytest.approx(0.87042 * math.sqrt(1.6), abs=5e-5)
    assert a.drms == pytest.approx(math.sqrt(2.0))  # trace is rotation invariant


def test_monte_carlo_recipe():
    # Monte Carlo check of the Rayleigh closed forms: 1e5+ iid N(0, sigma^2) 2-D errors give
    # CEP/sigma = 1.1774 +- 0.01, R95/sigma = 2.4477 +- 0.02, fraction inside 2DRMS 0.9817 +- 0.002.
    rng = np.random.default_rng(20240304)
    xy = rng.normal(0.0, 1.5, (200_000, 2))
    a = accuracy_from_errors(xy[:, 0], xy[:, 1])
    r = np.hypot(xy[:, 0], xy[:, 1])
    assert np.median(r) / 1.5 == pytest.approx(1.1774, abs=0.01)
    assert a.cep / 1.5 == pytest.approx(1.1774, abs=0.01)
    assert a.r95 / 1.5 == pytest.approx(2.4477, abs=0.02)
    assert np.mean(r <= a.two_drms) == pytest.approx(0.9817, abs=0.002)


def test_too_few_errors_give_no_measures():
    assert accuracy_from_errors(np.array([1.0, 2.0]), np.array([0.0, 1.0])) is None
