"""Robust location of many clouds at once: M-estimation by IRLS over segment reductions.

For every cloud (segment) the centre c minimises Σ ρ(rᵢ) with rᵢ = |xᵢ − c| / (s·HDOPᵢ):
σᵢ = σ₀·HDOPᵢ is the UERE-style error model (σ₀ cancels in the location, so only HDOP
matters) and s is a robust per-axis scale at HDOP 1 from the median absolute deviation,
generalised to d dimensions as median(|zᵢ|)/√χ²_d(0.5) with zᵢ = (xᵢ − c)/HDOPᵢ (in 1-D this
is the usual MAD/0.6745). Weights by iteratively reweighted least squares (Huber 1964;
Holland & Welsch 1977): wᵢ = ψ(rᵢ)/rᵢ / HDOPᵢ². Estimators (registered in
:mod:`archive.solve.estimators`):

- ``huber``: ψ(r) = r for r ≤ k, k·sign(r) beyond (k = 1.345: 95 % efficiency, 1-D);
- ``tukey``: Tukey's biweight, ψ(r) = r(1 − (r/c)²)² for r < c, else 0 (c = 4.685);
- ``geomedian``: the HDOP-weighted geometric median (Weiszfeld iterations);
- ``mean``: the HDOP-weighted mean.

The schedule is the same for every cloud: start at the coordinate-wise median, then
``scale_updates`` rounds of (re-estimate s; ``iterations`` IRLS steps). A fix whose squared
standardised distance exceeds the χ²_d quantile ``reject_quantile`` is then rejected (kept,
not used) and, in a cloud that lost fixes, ``iterations`` more steps run without them
(decided per cloud, so a cloud's result never depends on the other clouds). With
``reject_quantile = 1`` nothing is rejected and the result is the plain M-estimate, the
fixed point statsmodels' RLM reaches for the same norm and MAD scale.

The schedule runs per cloud in the compiled kernel
:func:`archive.solve.kernels.robust_segments` (one fused pass over a cloud's fixes per IRLS
step, clouds spread over threads); :func:`robust_centre_reference` is the same schedule
written with numpy segment reductions, kept as the reference for tests.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from archive.solve.estimators import ESTIMATORS
from archive.solve.kernels import robust_segments, run_split
from archive.solve.quantiles import chi2_ppf
from archive.solve.segments import seg_median_reference, seg_starts, seg_sum

MIN_SCALE = 1e-3  # m: a cloud of identical fixes still gets a usable scale
BLOCK = 1 << 16  # elements per block of segments (temporaries stay in cache)


@dataclass
class RobustResult:
    """Centres per segment, the final weights and rejection per element."""

    centre: list[np.ndarray]  # one array per dimension, length n_seg
    scale: np.ndarray  # robust per-axis scale at HDOP 1, per segment (m)
    weight: np.ndarray  # final IRLS weight per element (0 when rejected)
    rejected: np.ndarray  # bool per element
    r: np.ndarray  # final standardised distance per element


def _distance(xs: Sequence[np.ndarray], centre: list[np.ndarray], seg: np.ndarray
              ) -> np.ndarray:
    d2 = np.zeros(len(seg))
    for x, c in zip(xs, centre, strict=True):
        d = x - c[seg]
        d2 += d * d
    return np.sqrt(d2)


def _weighted_centre(xs: Sequence[np.ndarray], w: np.ndarray, seg: np.ndarray, n_seg: int,
                     previous: list[np.ndarray]) -> list[np.ndarray]:
    sw = seg_sum(w, seg, n_seg)
    ok = sw > 0
    out = []
    for x, prev in zip(xs, previous, strict=True):
        c = prev.copy()
        c[ok] = seg_sum(w * x, seg, n_seg)[ok] / sw[ok]
        out.append(c)
    return out


def _clean_hdop(hdop: np.ndarray) -> np.ndarray:
    return np.where(np.isfinite(hdop) & (hdop > 0), hdop, 1.0).astype(np.float64)


def robust_centre(xs: Sequence[np.ndarray], hdop: np.ndarray, seg: np.ndarray, n_seg: int, *,
                  estimator: str = "huber", huber_k: float = 1.345, tukey_c: float = 4.685,
                  reject_quantile: float = 0.999, iterations: int = 6, scale_updates: int = 3,
                  scale_sample: int | None = 2048) -> RobustResult:
    """Robust centre of every segment of the d-dimensional points ``xs`` (see module doc).

    ``xs`` are coordinate arrays (metres), ``hdop`` the per-element HDOP (use 1 for
    unweighted data), ``seg`` the non-decreasing segment id of each element. Options as
    in :mod:`archive.solve.params` ``[estimate]``; ``scale_sample`` caps the fixes per
    cloud used for the medians (None: all).
    """
    est = ESTIMATORS.get(estimator)
    dim = len(xs)
    if dim not in (1, 2) or est.kernel_code is None:
        return robust_centre_reference(xs, hdop, seg, n_seg, estimator=estimator,
                                       huber_k=huber_k, tukey_c=tukey_c,
                                       reject_quantile=reject_quantile, iterations=iterations,
                                       scale_updates=scale_updates, scale_sample=scale_sample)
    n = len(seg)
    e = np.ascontiguousarray(xs[0], dtype=np.float64)
    north = np.ascontiguousarray(xs[1], dtype=np.float64) if dim == 2 else np.zeros(n)
    hd = np.ascontiguousarray(hdop, dtype=np.float64)  # cleaned and inverted in the kernel
    starts, counts = seg_starts(np.asarray(seg), n_seg)
    limit = float(np.sqrt(chi2_ppf(reject_quantile, dim))) if reject_quantile < 1.0 else np.inf
    mean = est.one_step
    centre = np.zeros((2, n_seg))
    scale = np.full(n_seg, MIN_SCALE)
    weight = np.zeros(n)
    rejected = np.zeros(n, dtype=np.bool_)
    r = np.zeros(n)
    run_split(robust_segments, counts, e, north, hd, starts, counts, est.kernel_code,
              float(huber_k), float(tukey_c), limit, 1 if mean else int(scale_updates),
              1 if mean else int(iterations), int(scale_sample or 0),
              float(np.sqrt(chi2_ppf(0.5, dim))), MIN_SCALE, centre, scale, weight, rejected, r)
    return RobustResult(centre=list(centre[:dim]), scale=scale, weight=weight, rejected=rejected, r=r)


def robust_centre_reference(xs: Sequence[np.ndarray], hdop: np.ndarray, seg: np.ndarray,
                            n_seg: int, *, block: int = BLOCK, **options) -> RobustResult:
    """numpy version of :func:`robust_centre` (segment reductions), the reference for tests.

    The work runs in blocks of whole segments of about ``block`` elements,
    so every temporary array stays in the processor cache; segments are independent, so
    the blocks change nothing in the result.
    """
    if len(seg) <= block:
        return _robust_block(xs, hdop, seg, n_seg, **options)
    counts = np.bincount(seg, minlength=n_seg)
    ends = np.cumsum(counts)
    cuts = np.unique(np.searchsorted(ends, np.arange(block, ends[-1], block), side="left"))
    bounds = np.concatenate([[0], cuts + 1, [n_seg]]).astype(np.int64)
    bounds = np.unique(np.clip(bounds, 0, n_seg))
    parts = []
    for s0, s1 in zip(bounds[:-1], bounds[1:], strict=True):
        a = 0 if s0 == 0 else int(ends[s0 - 1])
        b = int(ends[s1 - 1])
        parts.append(_robust_block([x[a:b] for x in xs], hdop[a:b], seg[a:b] - s0,
                                   int(s1 - s0), **options))
    return RobustResult(
        centre=[np.concatenate([p.centre[d] for p in parts]) for d in range(len(xs))],
        scale=np.concatenate([p.scale for p in parts]),
        weight=np.concatenate([p.weight for p in parts]),
        rejected=np.concatenate([p.rejected for p in parts]),
        r=np.concatenate([p.r for p in parts]))


def _robust_block(xs: Sequence[np.ndarray], hdop: np.ndarray, seg: np.ndarray, n_seg: int, *,
                  estimator: str = "huber", huber_k: float = 1.345, tukey_c: float = 4.685,
                  reject_quantile: float = 0.999, iterations: int = 6, scale_updates: int = 3,
                  scale_sample: int | None = 2048) -> RobustResult:
    dim = len(xs)
    est = ESTIMATORS.get(estimator)
    tuning = {"huber_k": huber_k, "tukey_c": tukey_c}

    def psi_weight(r: np.ndarray) -> np.ndarray:
        return est.weight(r, tuning)

    hd = _clean_hdop(hdop)
    prior = 1.0 / (hd * hd)
    median_unit = np.sqrt(chi2_ppf(0.5, dim))
    centre = [seg_median_reference(x, seg, n_seg, scale_sample) for x in xs]
    centre = [np.where(np.isfinite(c), c, 0.0) for c in centre]
    active = np.ones(len(seg), dtype=bool)

    def scale_of(z: np.ndarray) -> np.ndarray:
        idx = np.flatnonzero(active)
        s = seg_median_reference(z[idx], seg[idx], n_seg, scale_sample) / median_unit
        return np.maximum(np.nan_to_num(s, nan=MIN_SCALE), MIN_SCALE)

    limit = np.sqrt(chi2_ppf(reject_quantile, dim)) if reject_quantile < 1.0 else np.inf
    rounds = 1 if est.one_step else scale_updates
    steps = 1 if est.one_step else iterations
    scale = np.full(n_seg, MIN_SCALE)
    r = np.zeros(len(seg))
    w = prior
    for _ in range(rounds):
        z = _distance(xs, centre, seg) / hd
        scale = scale_of(z)
        for _ in range(steps):
            r = _distance(xs, centre, seg) / hd / scale[seg]
            w = prior * psi_weight(r)
            centre = _weighted_centre(xs, w, seg, n_seg, centre)
    r = _distance(xs, centre, seg) / hd / scale[seg]
    rejected = r > limit
    lost = np.bincount(seg[rejected], minlength=n_seg) > 0  # clouds that lost fixes
    if lost.any():
        active = ~rejected
        for _ in range(steps):
            r = _distance(xs, centre, seg) / hd / scale[seg]
            w = prior * psi_weight(r) * active
            new = _weighted_centre(xs, w, seg, n_seg, centre)
            centre = [np.where(lost, c1, c0) for c1, c0 in zip(new, centre, strict=True)]
    r = _distance(xs, centre, seg) / hd / scale[seg]
    w = prior * psi_weight(r) * ~rejected
    return RobustResult(centre=centre, scale=scale, weight=w, rejected=rejected, r=r)
