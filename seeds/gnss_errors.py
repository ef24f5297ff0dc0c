"""The error model of the demo's single-frequency node receivers.

A logged fix is the true antenna position plus an error built from independent parts. All
numbers are invented for the demo but chosen to sit inside published envelopes:

Horizontal, per axis (east and north drawn independently):

* a fast first-order Gauss–Markov (GM) process, sigma 1.0 m, correlation time 90 s: the
  "knee near a minute" seen in the autocorrelation of static consumer receivers (D. L. Wilson,
  "GPS horizontal position accuracy"; no exact figures taken from it);
* a slow GM process, sigma 1.8 m, correlation time 20 minutes: inside the 5-20 min
  correlation lengths reported for GPS residuals by Howind et al. (1999) and the ~20 min of
  the exponential covariance model of El-Rabbany & Kleusberg (2003; authorship from memory);
* a common-mode GM process shared by every node of the spread at the same instant, sigma
  0.7 m, correlation time 1 hour: residual ionosphere, troposphere and broadcast orbit/clock
  errors, which vary over tens of minutes to hours (textbook material, from memory: Misra &
  Enge; Parkinson & Spilker) and are nearly identical for receivers a few km apart;
* a constant multipath bias per occupation, sigma 0.2 m: multipath at a static antenna repeats
  each sidereal day (from memory), so days of averaging do not remove it.

Each GM process is stationary with C(u) = sigma^2 exp(-|u|/tau); it is simulated exactly at
the logging interval dt as an AR(1) recursion with rho = exp(-dt/tau). The variance of its
time average over T is 2 sigma^2 tau/T [1 - tau/T (1 - e^(-T/tau))] (closed form
derived from Var = (1/T) int_-T^T (1 - |u|/T) C(u) du and checked against the discrete AR(1)
sum; its textbook citation, e.g. Gelb, Applied Optimal Estimation, is from memory), so over
a 3-day deployment the parts above leave about 0.03, 0.17, 0.12 and 0.20 m per axis, about
0.29 m in all: an expected median horizontal error near 0.34 m (CEP = 1.1774 sigma,
Rayleigh closed form computed with scipy; van Diggelen, "GPS Accuracy: Lies, Damn Lies, and
Statistics", GPS World, Jan 1998) and a 95th percentile near 0.71 m (R95 = 2.4477 sigma).

The horizontal errors are scaled by HDOP (the UERE model, 1-sigma error = HDOP x UERE,
textbook background, e.g. Misra & Enge (2006), from memory; the SPS Performance
Standard specifies the signal-in-space URE only). HDOP follows a slow satellite-geometry
cycle of half a sidereal day (the GPS orbital period, from memory) around 0.9, with per-node
jitter, rounded to 0.1.
Satellites used fall as HDOP rises. With these figures a single fix has a 95 % horizontal
error of about 5-6 m: "several metres", inside the SPS Performance Standard's global 95 %
bound of 9 m (GPS SPS Performance Standard, 4th ed. 2008 / 5th ed. 2020; the figure
read on a secondary page citing the 2020 edition, partially verified) and close to the
~4.9 m quoted for phones in open sky (gps.gov).

Vertical: two GM processes (2.0 m / 90 s and 3.5 m / 30 min) plus the common mode times
1.7; single-frequency heights are poor (several metres).

Trouble, as real logs have it: outlier bursts (on average 1.5 a day, 2-10 epochs each,
15-80 m off, HDOP 3-8, fewer satellites) and void epochs (0.5 % isolated, plus one gap of
5-20 minutes a day) written with fix quality 0 / RMC status V.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.signal import lfilter

SIDEREAL_DAY_S = 86164.0905


@dataclass(frozen=True)
class ErrorModel:
    """Parameters of the simulated receiver errors (metres, seconds)."""

    fast_sigma: float = 1.0
    fast_tau: float = 90.0
    slow_sigma: float = 1.8
    slow_tau: float = 1200.0
    common_sigma: float = 0.7
    common_tau: float = 3600.0
    multipath_sigma: float = 0.2
    vert_fast_sigma: float = 2.0
    vert_slow_sigma: float = 3.5
    vert_slow_tau: float = 1800.0
    vert_common_factor: float = 1.7
    hdop_mean: float = 0.9
    outliers_per_day: float = 1.5
    outlier_seconds: tuple[float, float] | None = None  # burst length; None: 2-10 epochs
    void_fraction: float = 0.005
    void_gaps_per_day: float = 1.0


def gauss_markov(rng: np.random.Generator, n: int, dt: float, sigma: float, tau: float,
                 size: int = 1) -> np.ndarray:
    """``size`` stationary first-order Gauss–Markov series of ``n`` samples at interval dt.

    Exact discretisation: x[k] = rho x[k-1] + sqrt(1 - rho^2) sigma w[k], rho = exp(-dt/tau),
    started from the stationary distribution. Returns shape (size, n).
    """
    rho = float(np.exp(-dt / tau))
    w = rng.standard_normal((size, n))
    w[:, 1:] *= sigma * np.sqrt(1.0 - rho * rho)
    w[:, 0] *= sigma
    return lfilter([1.0], [1.0, -rho], w, axis=1)


def common_mode(rng: np.random.Generator, n: int, dt: float, model: ErrorModel) -> np.ndarray:
    """The error shared by every node at each epoch of the scenario grid: (3, n) east, north, up."""
    e = gauss_markov(rng, n, dt, model.common_sigma, model.common_tau, size=3)
    e[2] *= model.vert_common_factor
    return e


@dataclass
class NodeErrors:
    """Per-epoch errors and receiver quality figures for one node log."""

    de: np.ndarray
    dn: np.ndarray
    du: np.ndarray
    hdop: np.ndarray
    vdop: np.ndarray
    pdop: np.ndarray
    n_sats: np.ndarray
    quality: np.ndarray
    outlier: np.ndarray  # bool, epoch inside an outlier burst


def _burst_mask(rng: np.random.Generator, n: int, count: int, lo: int, hi: int) -> np.ndarray:
    """Mark ``count`` runs of lo..hi epochs at random places (vectorised with a difference array)."""
    mark = np.zeros(n + 1, dtype=np.int32)
    if count and n > hi:
        starts = rng.integers(0, n - hi, size=count)
        lengths = rng.integers(lo, hi + 1, size=count)
        np.add.at(mark, starts, 1)
        np.add.at(mark, starts + lengths, -1)
    return np.cumsum(mark[:n]) > 0


def node_errors(rng: np.random.Generator, t_s: np.ndarray, dt: float, common: np.ndarray,
                model: ErrorModel) -> NodeErrors:
    """Errors for one node at epochs ``t_s`` (seconds on the scenario grid, regular step dt).

    ``common`` is the common-mode error already taken at the same epochs, shape (3, n).
    """
    n = t_s.size
    days = n * dt / 86400.0
    # satellite geometry: half a sidereal day cycle, a per-node phase and slow jitter
    phase = rng.uniform(0, 2 * np.pi)
    geom = 0.18 * np.sin(2 * np.pi * t_s / (SIDEREAL_DAY_S / 2) + phase)
    jitter = gauss_markov(rng, n, dt, 0.08, 600.0)[0]
    hdop = np.clip(model.hdop_mean + geom + jitter, 0.6, 2.5)

    fast = gauss_markov(rng, n, dt, model.fast_sigma, model.fast_tau, size=2)
    slow = gauss_markov(rng, n, dt, model.slow_sigma, model.slow_tau, size=2)
    scale = hdop / model.hdop_mean
    de = (fast[0] + slow[0]) * scale + common[0]
    dn = (fast[1] + slow[1]) * scale + common[1]
    du = (gauss_markov(rng, n, dt, model.vert_fast_sigma, model.fast_tau)[0]
          + gauss_markov(rng, n, dt, model.vert_slow_sigma, model.vert_slow_tau)[0]) * scale
    du += common[2]

    # outlier bursts: a large offset in a random direction, poor geometry
    lo, hi = (2, 10) if model.outlier_seconds is None else (
        max(1, int(model.outlier_seconds[0] / dt)), max(1, int(model.outlier_seconds[1] / dt)))
    outlier = _burst_mask(rng, n, int(rng.poisson(model.outliers_per_day * days)), lo, hi)
    k = int(outlier.sum())
    if k:
        r = rng.uniform(15.0, 80.0, size=k)
        az = rng.uniform(0, 2 * np.pi, size=k)
        de[outlier] += r * np.sin(az)
        dn[outlier] += r * np.cos(az)
        du[outlier] += rng.normal(0.0, 20.0, size=k)
        hdop[outlier] = rng.uniform(3.0, 8.0, size=k)

    hdop = np.round(hdop, 1)
    vdop = np.round(hdop * 1.6 + rng.normal(0, 0.05, n), 1)
    pdop = np.round(np.hypot(hdop, vdop), 1)
    n_sats = np.clip(np.round(4 + 7.5 / hdop + rng.normal(0, 0.7, n)), 4, 12).astype(np.int16)

    # void epochs: isolated ones and gaps of 5-20 minutes
    gap_len = (int(300 / dt), int(1200 / dt))
    void = _burst_mask(rng, n, int(rng.poisson(model.void_gaps_per_day * days)), *gap_len)
    void |= rng.random(n) < model.void_fraction
    quality = np.where(void, 0, 1).astype(np.int8)
    n_sats[void] = np.minimum(n_sats[void], 3)
    return NodeErrors(de, dn, du, hdop, vdop, pdop, n_sats, quality, outlier)
