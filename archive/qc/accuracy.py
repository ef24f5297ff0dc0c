"""Accuracy measures of a horizontal error distribution: CEP, R95, DRMS, 2DRMS.

Each measure is computed from the 2 x 2 covariance of east and north errors, assuming a
bivariate normal distribution centred on its mean (the bias is reported separately):

- DRMS = sqrt(sigma_e^2 + sigma_n^2), the root of the trace of the covariance; it holds
  about 63-68 % of the errors depending on the ellipticity.
- 2DRMS = 2 * DRMS; holds about 95.4-98.2 % of the errors (National Research Council,
  *The Global Positioning System: A Shared National Asset*, 1995, appendix D).
- CEP (R50) and R95: the radii of the circles about the centre holding 50 % and 95 % of the
  errors. They are computed exactly for the elliptical case, by numerical integration over
  the principal axes, not by the rule-of-thumb CEP ~ 0.589 (sigma_e + sigma_n). For a
  circular distribution CEP = sqrt(2 ln 2) sigma = 1.1774 sigma and
  R95 = sqrt(-2 ln 0.05) sigma = 2.4477 sigma (Rayleigh distribution).
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import integrate, optimize, special

__all__ = ["Accuracy", "accuracy_from_errors", "accuracy_from_sigmas", "radius_containing"]


@dataclass(frozen=True)
class Accuracy:
    """Accuracy measures of a horizontal error distribution, in metres."""

    sigma_e: float
    sigma_n: float
    corr_en: float
    sigma_major: float
    sigma_minor: float
    drms: float
    two_drms: float
    cep: float
    r95: float

    def as_dict(self) -> dict[str, float]:
        """The measures as plain data."""
        return asdict(self)


def _prob_inside(r: float, s1: float, s2: float) -> float:
    """P(|x| <= r) for x ~ N(0, diag(s1^2, s2^2)), s1 >= s2 >= 0."""
    if r <= 0:
        return 0.0
    if s1 <= 0:
        return 1.0
    if s2 <= 1e-12 * s1:  # a line: the 1-D normal
        return float(special.erf(r / (s1 * math.sqrt(2))))

    def integrand(x: float) -> float:
        # density of the major-axis component times P(|minor| <= sqrt(r^2 - x^2))
        dens = math.exp(-0.5 * (x / s1) ** 2) / (s1 * math.sqrt(2 * math.pi))
        return dens * special.erf(math.sqrt(max(r * r - x * x, 0.0)) / (s2 * math.sqrt(2)))

    value, _ = integrate.quad(integrand, 0.0, r, epsabs=1e-13, epsrel=1e-11, limit=200)
    return 2.0 * value


def radius_containing(p: float, sigma_major: float, sigma_minor: float) -> float:
    """Radius of the centred circle that holds probability ``p`` of an elliptical normal.

    ``sigma_major`` and ``sigma_minor`` are the standard deviations along the principal
    axes (order does not matter).
    """
    if not 0.0 < p < 1.0:
        raise ValueError("p must be between 0 and 1")
    s1, s2 = max(sigma_major, sigma_minor), min(sigma_major, sigma_minor)
    if s1 <= 0:
        return 0.0
    # the circular case with sigma s1 bounds the radius from above
    upper = s1 * math.sqrt(-2.0 * math.log(1.0 - p)) * 1.0001 + 1e-12
    return float(optimize.brentq(lambda r: _prob_inside(r, s1, s2) - p, 0.0, upper,
                                 xtol=1e-12, rtol=1e-12))


def accuracy_from_sigmas(sigma_e: float, sigma_n: float, corr_en: float = 0.0) -> Accuracy:
    """Accuracy measures of N(0, C) with C built from per-axis sigmas and their correlation."""
    cov = np.array([[sigma_e**2, corr_en * sigma_e * sigma_n],
                    [corr_en * sigma_e * sigma_n, sigma_n**2]])
    eig = np.clip(np.linalg.eigvalsh(cov), 0.0, None)
    s_minor, s_major = (float(math.sqrt(v)) for v in eig)
    drms = math.sqrt(sigma_e**2 + sigma_n**2)
    return Accuracy(
        sigma_e=float(sigma_e), sigma_n=float(sigma_n), corr_en=float(corr_en),
        sigma_major=s_major, sigma_minor=s_minor, drms=drms, two_drms=2.0 * drms,
        cep=radius_containing(0.5, s_major, s_minor),
        r95=radius_containing(0.95, s_major, s_minor),
    )


def accuracy_from_errors(de: np.ndarray, dn: np.ndarray) -> Accuracy | None:
    """Accuracy measures from observed east/north errors (sample covariance, ddof = 1).

    Returns None with fewer than three pairs: a covariance from two points is a line.
    """
    de = np.asarray(de, dtype=float)
    dn = np.asarray(dn, dtype=float)
    if de.size < 3:
        return None
    cov = np.cov(np.vstack([de, dn]), ddof=1)
    se, sn = math.sqrt(cov[0, 0]), math.sqrt(cov[1, 1])
    corr = float(cov[0, 1] / (se * sn)) if se > 0 and sn > 0 else 0.0
    return accuracy_from_sigmas(se, sn, corr)
