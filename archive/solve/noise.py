"""The receivers' error model, measured on every cloud of a run at once, and the uncertainty
of each centre from it (``uncertainty.method = "pooled"``).

A cloud of a few hours holds only a few independent samples of the slow part of the GNSS
error, so its own batch means say little about the error of its centre (four batches give
three degrees of freedom, and batches shorter than a few correlation times are correlated,
which biases them low). The nodes of one survey share receivers and sky, so the *shape* of
the error process (how fast its correlation dies away) is measured on all of them together,
and each cloud scales it by its own level:

1. **Per cloud** (in the solver, :func:`row_noise`): the residuals of the used fixes per
   unit HDOP, z = (x − x̂)/HDOP, their covariance Q (the cloud's level and the shape of its
   scatter), and the Allan variance of z/√q (q = tr Q / 2) at block lengths of 1 min × 2ʲ,
   j = 0..12 (1 min to 68 h): sums of ½(ȳₖ₊₁ − ȳₖ)² over adjacent blocks, both axes, with
   the number of pairs and of fixes per block. Differences of adjacent block means do not
   depend on where the cloud's centre is, so they measure the error process, not the
   position (Allan 1966; IEEE Std 952-1997, Annex C).
2. **Pooled** (:func:`fit_model`): the run's Allan variances, summed over all clouds, are
   fitted by non-negative least squares (Lawson & Hanson 1974; ``scipy.optimize.nnls``) with
   white noise plus first-order Gauss–Markov processes of correlation times 30 s × 2ᵏ (to
   34 h), whose Allan variances are closed forms (Allan variance analysis of sensor noise:
   El-Sheimy, Hou & Niu 2008).
3. **Per cloud again** (:func:`finish`): the variance of its centre is
   V = h²·Q·g(T, n), with g the fitted model's variance of a mean over the cloud's span T
   (closed form for each Gauss–Markov part; the white part over its n fixes) and h its
   weighted mean HDOP. Its degrees of freedom: the cloud's own level has
   ν₁ = 2(n − 1)/Σₖρₖ² (Bartlett 1946, the variance of a sample variance of a correlated
   series, two axes), the pooled model at the scale of T has as many as pairs of blocks
   measured it; they combine as 1/ν = 1/ν₁ + 1/ν₂. The floor (``uncertainty.floor``, known,
   infinite degrees of freedom) is added and the effective degrees of freedom follow from
   the Welch–Satterthwaite formula, and the 95 % ellipse and radius use the F quantile of
   the Hotelling T² distribution instead of χ²₂ (JCGM 100:2008, G.4 and G.3: the coverage
   factor of an estimated variance comes from its effective degrees of freedom).

σE and σN are the standard uncertainties; ``ell_major``, ``ell_minor`` and ``r95`` are the
expanded 95 % ones, and ``dof`` the effective degrees of freedom behind them.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy.optimize import nnls
from scipy.special import digamma, polygamma

from archive.solve.quantiles import f_ppf
from archive.solve.uncertainty import CHI2_2_95

BLOCK0_S = 60.0  # shortest block, s
LEVELS = 13  # blocks of 1 min ... 2^12 min (68 h)
TAUS_S = 30.0 * 2.0 ** np.arange(13)  # correlation times of the model's parts, 30 s ... 34 h
MIN_PAIRS = 8  # a block length measured by fewer pairs in the whole run is not fitted
ROUNDS = 3  # fits: the level of a short cloud misses part of its slow error (see fit_model)


@dataclass
class RowNoise:
    """Per position row: what the pooled model needs (see module doc, step 1)."""

    q: np.ndarray  # (n_rows, 3): ee, nn, en covariance of the residuals per unit HDOP, m²
    h: np.ndarray  # weighted mean HDOP of the used fixes
    span: np.ndarray  # s, first to last used fix
    n: np.ndarray  # used fixes
    allan: np.ndarray  # (n_rows, LEVELS): Σ ½(Δȳ)² over adjacent block pairs, both axes / 2
    pairs: np.ndarray  # (n_rows, LEVELS): number of pairs
    white: np.ndarray  # (n_rows, LEVELS): Σ ½(1/nₖ + 1/nₖ₊₁) over the pairs


def _runs(key: np.ndarray) -> np.ndarray:
    """Start index of every run of equal values in a sorted key."""
    if len(key) == 0:
        return np.zeros(0, dtype=np.int64)
    return np.flatnonzero(np.r_[True, key[1:] != key[:-1]])


def fix_sums_reference(de: np.ndarray, dn: np.ndarray, hdop: np.ndarray, w: np.ndarray,
                       b0: np.ndarray, row: np.ndarray, n_rows: int) -> tuple[np.ndarray, ...]:
    """numpy version of :func:`archive.solve.noise_sums.fix_sums` (same arguments and
    results), the reference the tests hold the compiled one to."""
    n = np.bincount(row, minlength=n_rows).astype(np.float64)
    safe_n = np.maximum(n, 1.0)
    h = np.where(np.isfinite(hdop) & (hdop > 0), hdop, 1.0)
    ze, zn = de / h, dn / h
    me = np.bincount(row, weights=ze, minlength=n_rows) / safe_n
    mn = np.bincount(row, weights=zn, minlength=n_rows) / safe_n
    ze = ze - me[row]
    zn = zn - mn[row]
    q = np.column_stack([np.bincount(row, weights=ze * ze, minlength=n_rows),
                         np.bincount(row, weights=zn * zn, minlength=n_rows),
                         np.bincount(row, weights=ze * zn, minlength=n_rows)]) / safe_n[:, None]
    sw = np.bincount(row, weights=w, minlength=n_rows)
    swh = np.bincount(row, weights=w * h, minlength=n_rows)
    level = np.sqrt(np.maximum(0.5 * (q[:, 0] + q[:, 1]), 1e-300))
    ue, un = ze / level[row], zn / level[row]
    key = row.astype(np.int64) * (1 << 40) + b0
    st = _runs(key)
    bcnt = np.diff(np.r_[st, len(key)]).astype(np.float64)
    if len(st) == 0:
        return n, q, sw, swh, ue, un, st, st, bcnt, bcnt, bcnt
    return (n, q, sw, swh, ue, un, row[st].astype(np.int64), b0[st], bcnt,
            np.add.reduceat(ue, st), np.add.reduceat(un, st))


def row_noise(de: np.ndarray, dn: np.ndarray, hdop: np.ndarray, w: np.ndarray,
              t_s: np.ndarray, row: np.ndarray, n_rows: int, *,
              compiled: bool = True) -> RowNoise:
    """Step 1 for every row at once: ``de, dn`` residuals (m) of the used fixes, their
    ``hdop``, final weights ``w``, time ``t_s`` in seconds from their row's first fix and
    ``row`` (non-decreasing; time-ordered within a row). The sums over fixes and blocks are
    compiled (:mod:`archive.solve.noise_sums`); with ``compiled`` false their numpy twins
    (:func:`fix_sums_reference`, :func:`level_sums_reference`) give the same bits."""
    if compiled:
        from archive.solve.noise_sums import fix_sums as sums
        from archive.solve.noise_sums import level_sums as levels
    else:
        sums, levels = fix_sums_reference, level_sums_reference

    def f64(a: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray(a, dtype=np.float64)

    row = np.ascontiguousarray(row, dtype=np.int64)
    b0 = np.floor(np.asarray(t_s) / BLOCK0_S).astype(np.int64)
    n, q, sw, swh, _, _, brow, bblk, bcnt, bse, bsn = sums(
        f64(de), f64(dn), f64(hdop), f64(w), b0, row, n_rows)
    hbar = np.where(sw > 0, swh / np.where(sw > 0, sw, 1.0), np.nan)
    span = np.zeros(n_rows)
    if len(row):
        first = _runs(row)
        last = np.r_[first[1:], len(row)] - 1
        span[row[first]] = t_s[last] - t_s[first]
    allan = np.zeros((n_rows, LEVELS))
    pairs = np.zeros((n_rows, LEVELS))
    white = np.zeros((n_rows, LEVELS))
    if len(row) == 0:
        return RowNoise(q, hbar, span, n, allan, pairs, white)
    # a row's usual fixes per minute: its fixes over its span (at least one per minute)
    per_min = n / np.maximum(span / BLOCK0_S, 1.0)
    allan, pairs, white = levels(brow, bblk, bcnt, bse, bsn, span, per_min, n_rows, LEVELS,
                                 BLOCK0_S)
    return RowNoise(q, hbar, span, n, allan, pairs, white)


def level_sums_reference(brow: np.ndarray, bblk: np.ndarray, bcnt: np.ndarray,
                         bse: np.ndarray, bsn: np.ndarray, span: np.ndarray,
                         per_min: np.ndarray, n_rows: int, levels: int, block0: float
                         ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """numpy version of :func:`archive.solve.noise_sums.level_sums` (same arguments and
    results), the reference the tests hold the compiled one to."""
    allan = np.zeros((n_rows, levels))
    pairs = np.zeros((n_rows, levels))
    white = np.zeros((n_rows, levels))
    for j in range(levels):
        if j:
            s = _runs(brow.astype(np.int64) * (1 << 40) + (bblk >> j))
            brow, bblk_j = brow[s], bblk[s] >> j
            bcnt = np.add.reduceat(bcnt, s)
            bse = np.add.reduceat(bse, s)
            bsn = np.add.reduceat(bsn, s)
            bblk = bblk[s]
        else:
            bblk_j = bblk
        # a block must lie inside its row's span (the last, partial one is shorter, so its
        # mean varies more) and hold half its usual fixes (a gap in the log leaves it out)
        inside = (bblk_j + 1) * (block0 * (1 << j)) <= span[brow] + 1e-6
        full = inside & (bcnt >= 0.5 * per_min[brow] * (1 << j))
        ok = full[:-1] & full[1:] & (brow[1:] == brow[:-1]) & (bblk_j[1:] - bblk_j[:-1] == 1)
        if not ok.any():
            continue
        ye, yn = bse / bcnt, bsn / bcnt
        d2 = 0.25 * ((ye[1:] - ye[:-1]) ** 2 + (yn[1:] - yn[:-1]) ** 2)
        wh = 0.5 * (1.0 / bcnt[1:] + 1.0 / bcnt[:-1])
        r = brow[1:][ok]
        allan[:, j] = np.bincount(r, weights=d2[ok], minlength=n_rows)
        pairs[:, j] = np.bincount(r, minlength=n_rows)
        white[:, j] = np.bincount(r, weights=wh[ok], minlength=n_rows)
    return allan, pairs, white


def gm_mean_variance(tau: np.ndarray, span: np.ndarray) -> np.ndarray:
    """Variance of the time average over ``span`` of a unit-variance first-order
    Gauss–Markov process of correlation time ``tau`` (broadcast):
    2(τ/T)[1 − (τ/T)(1 − e^(−T/τ))]."""
    x = np.asarray(tau, dtype=float) / np.maximum(np.asarray(span, dtype=float), 1e-9)
    return 2 * x * (1 - x * -np.expm1(-1 / x))


def gm_allan_variance(tau: np.ndarray, block: np.ndarray) -> np.ndarray:
    """Allan variance at block length L of a unit-variance Gauss–Markov process: the
    variance of a block mean less the covariance of two adjacent ones,
    V(L) − (τ/L)²(1 − e^(−L/τ))²."""
    x = np.asarray(tau, dtype=float) / np.asarray(block, dtype=float)
    return gm_mean_variance(tau, block) - (x * -np.expm1(-1 / x)) ** 2


@dataclass
class NoiseModel:
    """White noise (variance per fix) plus Gauss–Markov parts, in units of a cloud's level,
    and how many pairs of blocks measured each block length."""

    white: float
    parts: np.ndarray  # variance of the part of correlation time TAUS_S[k]
    pairs: np.ndarray  # (LEVELS,) pairs in the whole run
    levels_fitted: int

    def as_dict(self) -> dict[str, Any]:
        """Plain data (for the run summary)."""
        return {"white": self.white, "tau_s": TAUS_S[self.parts > 0].tolist(),
                "variance": self.parts[self.parts > 0].tolist(),
                "levels_fitted": self.levels_fitted}

    def mean_variance(self, span: np.ndarray, n: np.ndarray) -> np.ndarray:
        """g(T, n): variance of the mean of a cloud of span T and n fixes, in level units."""
        g = self.white / np.maximum(n, 1.0)
        for tau, a in zip(TAUS_S, self.parts, strict=True):
            if a > 0:
                g = g + a * gm_mean_variance(tau, np.maximum(span, 1.0))
        return g

    def bartlett(self, n: np.ndarray, dt: np.ndarray) -> np.ndarray:
        """Σₖ ρₖ² over all lags of the model's autocorrelation sampled every ``dt`` s."""
        var = self.white + self.parts.sum()
        if var <= 0:
            return np.ones_like(n)
        total = np.full(np.shape(n), var * var)
        used = np.flatnonzero(self.parts > 0)
        for a in used:
            for b in used:
                x = np.exp(-dt * (1 / TAUS_S[a] + 1 / TAUS_S[b]))
                total = total + self.parts[a] * self.parts[b] * 2 * x / np.maximum(1 - x, 1e-12)
        return total / (var * var)


def _fit(allan: np.ndarray, pairs: np.ndarray, white: np.ndarray) -> tuple[float, np.ndarray,
                                                                           int]:
    """NNLS fit of the summed Allan variances (one entry per block length)."""
    use = pairs >= MIN_PAIRS
    if not use.any():
        return 1.0, np.zeros(len(TAUS_S)), 0
    y = allan[use] / pairs[use]
    blocks = BLOCK0_S * 2.0 ** np.arange(LEVELS)[use]
    # no part slower than the longest blocks measured: its variance would be unconstrained
    # (it barely shows in the Allan variance of shorter blocks) and would swamp the rest
    taus = blocks.max() / 2 >= TAUS_S
    design = np.column_stack([white[use] / pairs[use],
                              gm_allan_variance(TAUS_S[None, taus], blocks[:, None])])
    wt = np.sqrt(pairs[use]) / np.maximum(y, 1e-300)  # relative errors, ~1/√pairs each
    coef, _ = nnls(design * wt[:, None], y * wt, maxiter=50 * design.shape[1])
    parts = np.zeros(len(TAUS_S))
    parts[taus] = coef[1:]
    return float(coef[0]), parts, int(use.sum())


def fit_model(rows: RowNoise, usable: np.ndarray) -> NoiseModel:
    """Step 2: the pooled model from the rows marked ``usable`` (summed in row order).

    A cloud's level q is its residual variance about its own centre, short by the variance
    g of its centre (E q = σ²(1 − g) for a process of variance σ²); the model is in units
    of σ², so each cloud's Allan sums (in units of q) are scaled by (1 − g) and the model
    fitted again, ``ROUNDS`` times from g = 0.
    """
    scale = np.ones(len(rows.n))
    pairs = rows.pairs[usable].sum(axis=0)
    model = NoiseModel(1.0, np.zeros(len(TAUS_S)), pairs, 0)
    for _ in range(ROUNDS):
        s = scale[usable][:, None]
        wv, parts, k = _fit((rows.allan[usable] * s).sum(axis=0), pairs,
                            rows.white[usable].sum(axis=0))
        model = NoiseModel(wv, parts, pairs, k)
        scale = 1.0 - _share(model, rows)
    return model


def _share(model: NoiseModel, rows: RowNoise) -> np.ndarray:
    """g per row: the variance of its centre in units of the process variance (at most ½:
    a cloud shorter than the error's correlation averages nothing out)."""
    return np.clip(model.mean_variance(rows.span, rows.n), 0.0, 0.5)


@dataclass
class Covariance:
    """Per row: standard covariance (m², before the grid), effective dof and n_eff."""

    vee: np.ndarray
    vnn: np.ndarray
    ven: np.ndarray
    dof: np.ndarray
    n_eff: np.ndarray


def _trigamma_inverse(x: float) -> float:
    """y with ψ'(y) = x (x > 0), by Newton's method from y = 0.5 + 1/x (Smyth 2004, §6.2)."""
    y = 0.5 + 1.0 / x
    for _ in range(50):
        tri = float(polygamma(1, y))
        step = tri * (1.0 - tri / x) / float(polygamma(2, y))
        y += step
        if -step / y < 1e-8:
            break
    return y


def moderated_level(s2: np.ndarray, dof: np.ndarray, usable: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray, float]:
    """Each cloud's level shrunk towards the run's: the empirical Bayes estimate of Smyth
    (2004). The clouds' variances s² (with ``dof`` degrees of freedom each) are taken as
    draws around a common prior s₀² with d₀ degrees of freedom, both estimated from the
    spread of log s² beyond what sampling alone explains; then
    s̃² = (d₀s₀² + d·s²)/(d₀ + d) with d₀ + d degrees of freedom. When the levels differ no
    more than sampling explains (one receiver model, one sky), d₀ is infinite and every
    cloud takes the run's level; when sites differ, each keeps part of its own.
    Returns (s̃², its degrees of freedom, d₀)."""
    ok = usable & (s2 > 0) & np.isfinite(s2) & (dof > 0)
    if ok.sum() < 3:
        return s2, dof, 0.0
    d = dof[ok]
    e = np.log(s2[ok]) - digamma(d / 2) + np.log(d / 2)
    mean = float(e.mean())
    excess = float(np.mean((e - mean) ** 2) * ok.sum() / (ok.sum() - 1)
                   - np.mean(polygamma(1, d / 2)))
    if excess <= 0:
        s0 = float(np.exp(mean))
        return np.where(ok, s0, s2), np.where(ok, np.inf, dof), np.inf
    d0 = 2.0 * _trigamma_inverse(excess)
    s0 = float(np.exp(mean + digamma(d0 / 2) - np.log(d0 / 2)))
    post = (d0 * s0 + dof * s2) / (d0 + dof)
    return np.where(ok, post, s2), np.where(ok, d0 + dof, dof), d0


def centre_covariance(rows: RowNoise, model: NoiseModel, floor: float,
                      usable: np.ndarray) -> Covariance:
    """Step 3: each row's covariance from the pooled model, with the floor, and its
    effective degrees of freedom (Welch–Satterthwaite). A row's level (its residual
    variance per unit HDOP, in units of the process variance) is moderated towards the
    run's (:func:`moderated_level`) over the ``usable`` rows."""
    share = _share(model, rows)
    q = 0.5 * (rows.q[:, 0] + rows.q[:, 1])
    safe_q = np.where(q > 0, q, 1.0)
    dt = rows.span / np.maximum(rows.n - 1, 1)
    nu_level = 2 * np.maximum(rows.n - 1, 1) / model.bartlett(rows.n, np.maximum(dt, 1e-3))
    nu_raw = nu_level
    level, nu_level, d0 = moderated_level(q / (1.0 - share), nu_level, usable)
    # the shape of the scatter (trace 2) moderated the same way towards the run's mean
    # shape: a few hours of slow error make a cloud look elongated by chance
    shape = rows.q / safe_q[:, None]
    ok = usable & (q > 0)
    if ok.any():
        mean_shape = shape[ok].mean(axis=0)
        own = np.where(np.isinf(d0), 0.0, nu_raw / (d0 + nu_raw)) if d0 > 0 else np.ones(len(q))
        shape = np.where(ok[:, None], own[:, None] * shape + (1 - own[:, None]) * mean_shape,
                         shape)
    h2 = rows.h ** 2
    vee, vnn, ven = (h2 * shape[:, i] * level * share for i in range(3))
    # the pooled model at the scale of the cloud: pairs of blocks of up to half its span
    j = np.clip(np.floor(np.log2(np.maximum(rows.span, BLOCK0_S) / (2 * BLOCK0_S))), 0,
                LEVELS - 1).astype(np.int64)
    nu_model = np.maximum(model.pairs[j], 1.0)
    nu_est = 1.0 / (1.0 / nu_level + 1.0 / nu_model)
    u_est2 = 0.5 * (vee + vnn)
    f2 = floor * floor
    u_c2 = u_est2 + f2
    with np.errstate(divide="ignore", invalid="ignore"):
        dof = np.where(u_est2 > 0, u_c2 * u_c2 / (u_est2 * u_est2 / nu_est), np.inf)
        n_eff = np.where(u_est2 > 0, 0.5 * h2 * (rows.q[:, 0] + rows.q[:, 1]) / u_est2, np.nan)
    return Covariance(vee + f2, vnn + f2, ven, np.maximum(dof, 1.0), n_eff)


def coverage_factor(dof: np.ndarray) -> np.ndarray:
    """k² by which a covariance with ``dof`` effective degrees of freedom is expanded so its
    χ²₂ 95 % ellipse becomes the Hotelling one: 2·F₀.₉₅(2, ν)/χ²₂(0.95) (1 as ν → ∞)."""
    nu = np.minimum(np.asarray(dof, dtype=float), 1e7)
    return np.where(np.isfinite(nu), 2 * f_ppf(0.95, 2, nu) / CHI2_2_95, 1.0)
