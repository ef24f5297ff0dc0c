"""Honest uncertainty of a cloud centre when the fixes are correlated in time.

GNSS errors are correlated over minutes to hours, so σ/√n claims millimetres from a day of
fixes. Two estimates of the covariance of the centre, both from the data themselves:

- ``batch`` (default): batch means. The window is cut into batches of ``batch_hours``
  (several times the longest correlation time) and the centre's covariance is the spread of
  the weighted batch means: V = m/(m−1) · Σ_b W_b²(x̄_b − x̂)(x̄_b − x̂)ᵀ / (Σ_b W_b)², which
  is the cluster-robust (sandwich) covariance of a weighted mean with batches as clusters
  and the final IRLS weights held fixed.
- ``ar1``: an AR(1) / first-order Gauss–Markov model of the residuals: ρ is their lag-1
  autocorrelation and the variance of the mean uses the exact finite-n AR(1) form
  Var(x̄) = σ²/n·[(1+ρ)/(1−ρ) − 2ρ(1−ρⁿ)/(n(1−ρ)²)] (Bayley & Hammersley 1946; n_eff for
  large n is n(1−ρ)/(1+ρ), Zwiers & von Storch 1995).

A per-axis ``floor`` (multipath bias and offsets that never average out) is added to both.
The 95 % ellipse uses χ²₂(0.95) = 5.991; the 95 % horizontal radius is the exact radius of
the elliptical normal holding 95 %, not the ellipse's major axis.

Batch means run per cloud in the compiled kernel :func:`archive.solve.kernels.batch_segments`;
:func:`batch_covariance_reference` is the numpy version (segment reductions), kept for tests.
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy.special import ndtr

from archive.solve.kernels import batch_segments, run_split
from archive.solve.quantiles import chi2_ppf
from archive.solve.segments import seg_starts, seg_sum

CHI2_2_95 = float(chi2_ppf(0.95, 2))  # 5.991465


def ar1_mean_variance(sigma2: np.ndarray | float, rho: np.ndarray | float,
                      n: np.ndarray | float) -> np.ndarray:
    """Variance of the mean of n consecutive AR(1) samples of variance σ², lag-1 ρ (exact)."""
    rho = np.clip(np.asarray(rho, dtype=float), 0.0, 1.0 - 1e-12)
    n = np.maximum(np.asarray(n, dtype=float), 1.0)
    factor = (1 + rho) / (1 - rho) - 2 * rho * (1 - rho ** n) / (n * (1 - rho) ** 2)
    return np.asarray(sigma2) / n * factor


def gauss_markov_mean_variance(sigma2: float | np.ndarray, tau: float | np.ndarray,
                               span: float | np.ndarray) -> np.ndarray:
    """Variance of the time average over ``span`` of a first-order Gauss–Markov process."""
    x = np.asarray(tau, dtype=float) / np.asarray(span, dtype=float)
    return 2 * np.asarray(sigma2) * x * (1 - x * (1 - np.exp(-1 / x)))


@dataclass
class CentreCovariance:
    """Per-segment covariance of the centre (m²), before the floor, and n_eff."""

    vee: np.ndarray
    vnn: np.ndarray
    ven: np.ndarray
    n_eff: np.ndarray


def _cloud_cov(de: np.ndarray, dn: np.ndarray, w: np.ndarray, seg: np.ndarray, n_seg: int
               ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    sw = seg_sum(w, seg, n_seg)
    sw2 = seg_sum(w * w, seg, n_seg)
    safe = np.where(sw > 0, sw, 1.0)
    see = seg_sum(w * de * de, seg, n_seg) / safe
    snn = seg_sum(w * dn * dn, seg, n_seg) / safe
    sen = seg_sum(w * de * dn, seg, n_seg) / safe
    n_w = np.where(sw2 > 0, sw * sw / np.where(sw2 > 0, sw2, 1.0), 0.0)  # Kish effective n
    return see, snn, sen, n_w, sw


def batch_covariance(de: np.ndarray, dn: np.ndarray, w: np.ndarray, t_s: np.ndarray,
                     seg: np.ndarray, n_seg: int, *, batch_s: float, min_batches: int
                     ) -> CentreCovariance:
    """Batch-means covariance of each segment's weighted centre (see module doc).

    ``de, dn`` are residuals from the centre (m), ``w`` the final weights, ``t_s`` time in
    seconds (time-ordered within each segment). A window shorter than ``min_batches``
    batches is cut into ``min_batches`` shorter batches.
    """
    starts, counts = seg_starts(np.asarray(seg), n_seg)
    out = np.zeros((n_seg, 4))

    def f64(a: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray(a, dtype=np.float64)

    run_split(batch_segments, counts, f64(de), f64(dn), f64(w), f64(t_s), starts, counts,
              float(batch_s), float(min_batches), out)
    return CentreCovariance(out[:, 0].copy(), out[:, 1].copy(), out[:, 2].copy(),
                            out[:, 3].copy())


def batch_covariance_reference(de: np.ndarray, dn: np.ndarray, w: np.ndarray, t_s: np.ndarray,
                               seg: np.ndarray, n_seg: int, *, batch_s: float,
                               min_batches: int) -> CentreCovariance:
    """numpy version of :func:`batch_covariance` (segment reductions), the reference for tests."""
    starts, counts = seg_starts(seg, n_seg)
    has = counts > 0
    t0 = np.zeros(n_seg)
    t1 = np.zeros(n_seg)
    t0[has] = t_s[starts[has]]
    t1[has] = t_s[starts[has] + counts[has] - 1]
    span = t1 - t0
    length = np.minimum(batch_s, np.maximum(span, 1e-9) / min_batches)
    n_b = np.maximum(np.ceil(span / length - 1e-9).astype(np.int64), 1)
    b = np.minimum(((t_s - t0[seg]) / length[seg]).astype(np.int64), n_b[seg] - 1)
    first = np.zeros(n_seg, dtype=np.int64)
    if n_seg > 1:
        np.cumsum(n_b[:-1], out=first[1:])
    gb = first[seg] + b
    total_b = int(n_b.sum())
    bseg = np.repeat(np.arange(n_seg), n_b)
    wb = np.bincount(gb, weights=w, minlength=total_b)
    eb = np.bincount(gb, weights=w * de, minlength=total_b)
    nb = np.bincount(gb, weights=w * dn, minlength=total_b)
    sw = seg_sum(wb, bseg, n_seg)
    safe = np.where(sw > 0, sw, 1.0)
    mean_e = seg_sum(eb, bseg, n_seg) / safe
    mean_n = seg_sum(nb, bseg, n_seg) / safe
    ue = eb - wb * mean_e[bseg]  # W_b (x̄_b - x̂)
    un = nb - wb * mean_n[bseg]
    m = seg_sum((wb > 0).astype(float), bseg, n_seg)
    corr = np.where(m > 1, m / np.maximum(m - 1, 1), np.nan)
    vee = corr * seg_sum(ue * ue, bseg, n_seg) / safe**2
    vnn = corr * seg_sum(un * un, bseg, n_seg) / safe**2
    ven = corr * seg_sum(ue * un, bseg, n_seg) / safe**2
    see, snn, sen, _n_w, _ = _cloud_cov(de, dn, w, seg, n_seg)
    # A single batch says nothing about the error of its mean: treat it as one sample.
    one = ~(m > 1)
    vee[one], vnn[one], ven[one] = see[one], snn[one], sen[one]
    tr = vee + vnn
    n_eff = np.where(tr > 0, (see + snn) / np.where(tr > 0, tr, 1.0), np.nan)
    return CentreCovariance(vee, vnn, ven, n_eff)


def ar1_covariance(de: np.ndarray, dn: np.ndarray, w: np.ndarray, seg: np.ndarray, n_seg: int
                   ) -> CentreCovariance:
    """AR(1) covariance of each segment's weighted centre from the lag-1 autocorrelation."""
    see, snn, sen, n_w, _ = _cloud_cov(de, dn, w, seg, n_seg)
    same = np.zeros(len(seg), dtype=bool)
    same[1:] = seg[1:] == seg[:-1]
    idx = np.flatnonzero(same)
    lag = seg_sum(de[idx] * de[idx - 1] + dn[idx] * dn[idx - 1], seg[idx], n_seg)
    var = seg_sum(de * de + dn * dn, seg, n_seg)
    rho = np.where(var > 0, lag / np.where(var > 0, var, 1.0), 0.0)
    inflate = ar1_mean_variance(1.0, rho, n_w)  # Var of the mean per unit variance
    n_eff = np.where(inflate > 0, 1.0 / inflate, np.nan)
    return CentreCovariance(see * inflate, snn * inflate, sen * inflate, n_eff)


def ellipse95(vee: np.ndarray, vnn: np.ndarray, ven: np.ndarray
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """95 % error ellipse: semi-major, semi-minor (m) and bearing of the major axis (degrees
    clockwise from north, 0-180)."""
    half_tr = 0.5 * (vee + vnn)
    root = np.sqrt((0.5 * (vee - vnn)) ** 2 + ven**2)
    lam1 = half_tr + root
    lam2 = np.maximum(half_tr - root, 0.0)
    theta = 0.5 * np.arctan2(2 * ven, vee - vnn)  # counter-clockwise from east
    bearing = (90.0 - np.degrees(theta)) % 180.0
    return np.sqrt(CHI2_2_95 * lam1), np.sqrt(CHI2_2_95 * lam2), bearing


@lru_cache(maxsize=4)
def _legendre(n: int) -> tuple[np.ndarray, np.ndarray]:
    return np.polynomial.legendre.leggauss(n)


def radius_probability(r: np.ndarray, lam1: np.ndarray, lam2: np.ndarray, n_nodes: int = 48
                       ) -> np.ndarray:
    """P(|x| <= r) for a zero-mean 2-D normal with covariance eigenvalues lam1 >= lam2.

    P = ∫ φ(u)·[2Φ(√((r² − λ₁u²)/λ₂)) − 1] du over |u| ≤ r/√λ₁, with u = (r/√λ₁)·sin α so
    the integrand is smooth; Gauss–Legendre on α in [0, π/2] (the integrand is even).
    """
    x, wq = _legendre(n_nodes)
    alpha = (x + 1) * (np.pi / 4)
    wq = wq * (np.pi / 4)
    a = (r / np.sqrt(lam1))[:, None]
    u = a * np.sin(alpha)[None, :]
    inner = 2 * ndtr(r[:, None] * np.cos(alpha)[None, :] / np.sqrt(lam2)[:, None]) - 1
    dens = np.exp(-0.5 * u * u) / np.sqrt(2 * np.pi)
    terms = dens * inner * a * np.cos(alpha)[None, :]
    # A fixed-order sum over the nodes: a BLAS product would round differently with the
    # number of rows, and a station's radius must not depend on what it is solved with.
    total = np.zeros(len(r))
    for j in range(len(wq)):
        total += terms[:, j] * wq[j]
    return 2 * total


def radius95(vee: np.ndarray, vnn: np.ndarray, ven: np.ndarray) -> np.ndarray:
    """Radius holding 95 % of a 2-D normal with this covariance (bisection, all at once)."""
    half_tr = 0.5 * (vee + vnn)
    root = np.sqrt((0.5 * (vee - vnn)) ** 2 + ven**2)
    lam1 = np.maximum(half_tr + root, 1e-30)
    lam2 = np.maximum(half_tr - root, lam1 * 1e-8)
    lo = 1.959963984540054 * np.sqrt(lam1)  # degenerate (1-D) case: the 97.5 % normal point
    hi = np.sqrt(CHI2_2_95 * lam1) * 1.0000001  # circular case with the larger variance
    for _ in range(50):
        mid = 0.5 * (lo + hi)
        below = radius_probability(mid, lam1, lam2) < 0.95
        lo = np.where(below, mid, lo)
        hi = np.where(below, hi, mid)
    return 0.5 * (lo + hi)
