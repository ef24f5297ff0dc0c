"""Did the node change place during its deployment? A robust two-sample scan, split at the fix.

``flags.move_method = "scan"``. Every cloud at once, on padded (cloud × block) arrays:

1. **Running centre**: the median east/north of each block of ``move_block_min`` minutes
   (blocks holding under a quarter of the cloud's usual count, or fewer than 3 fixes, are
   left out). A block median is robust to single bad fixes.
2. **Bursts out**: a block farther than ``move_step`` and three robust scales from the
   median of the five blocks around it is dropped (the Hampel identifier: Hampel 1974;
   Pearson 2002). A reflection lasting one or two blocks goes; a real move, which persists,
   is the median of its neighbourhood on both sides and stays.
3. **Scan**: for every boundary between blocks that leaves at least ``move_min_hours`` on
   both sides, the step d is the difference of the mean block centres after and before,
   and z² = |d|²/(s²·L·(1/T₁ + 1/T₂)) its size against the noise of the cloud, where T₁, T₂
   are the durations of the two sides, L = ``move_min_hours`` and s² the per-axis variance
   of a mean over L measured on the cloud itself: the median over adjacent L-long groups
   of blocks of |Δ|²/(2·ln 4) (their squared difference is 2s²·χ²₂, whose median is
   2s²·2 ln 2; a move changes one pair only, so the median ignores it). This is the
   two-sample statistic of a mean shift (the CUSUM scan of Page 1954 in its likelihood-ratio
   form, Csörgő & Horváth 1997) with the long-run variance of the errors in place of the
   variance of one fix.
4. **Decision**: the boundary with the largest z is the candidate; it is a move when
   z ≥ ``move_z`` *and* |d| ≥ ``move_step``. ``move_z`` sets the false-alarm rate: the scan
   takes the largest of many correlated statistics, so its threshold is well above the χ²₂
   quantile of one test; the rate measured on simulated deployments is in docs/solving.md.
5. **At the fix**: every fix of the cloud is classed by which of the two centres it is
   nearer along the step (projection beyond |d|/2), and the split is the fix that leaves
   the fewest fixes on the wrong side (a counting rule, so stray fixes and the slow wander
   of the error do not move it). Part 2 starts at that fix.
"""

from __future__ import annotations

import warnings
from typing import Any

import numpy as np

from archive.solve.moves import MoveResult
from archive.solve.segments import block_medians, expand_ranges, seg_starts

LN4 = float(np.log(4.0))


def _nanmedian(a: np.ndarray, axis: int, **kw: Any) -> np.ndarray:
    """``np.nanmedian`` without the warning for an all-NaN slice (its result is NaN)."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.nanmedian(a, axis=axis, **kw)


def _local_median(a: np.ndarray) -> np.ndarray:
    """Median of the five columns around each one (NaN ignored), row by row: the sorted
    five with NaN last, the middle one or the mean of the middle two, computed as
    ``np.nanmedian`` computes it over such short slices (a sum of the two from zero, then
    halved), so the result is the same to the bit, without the masked arrays."""
    pad = np.pad(a, ((0, 0), (2, 2)), constant_values=np.nan)
    five = np.stack([pad[:, i:i + a.shape[1]] for i in range(5)])
    void = np.isnan(five)
    count = 5 - void.sum(axis=0)
    five = np.sort(np.where(void, np.inf, five), axis=0)
    high = count // 2
    low = np.where(count % 2 == 1, high, np.maximum(high - 1, 0))
    lo = np.take_along_axis(five, low[None], axis=0)[0]
    hi = np.take_along_axis(five, high[None], axis=0)[0]
    with np.errstate(invalid="ignore"):
        out = ((0.0 + lo) + hi) / 2.0
    out[count == 0] = np.nan
    return out


def scan_moves(e: np.ndarray, n: np.ndarray, t_us: np.ndarray, seg: np.ndarray, n_seg: int,
               params: dict[str, Any]) -> MoveResult:
    """Test every segment (cloud) for a move (see module doc); ``params`` = [flags].

    ``e, n`` metres in each cloud's plane, ``t_us`` time, ``seg`` non-decreasing cloud id,
    time-ordered within a cloud. Returns the split time (the first fix after the move, µs;
    -1 when no move), the step (m) and its z per cloud.
    """
    split = np.full(n_seg, -1, dtype=np.int64)
    step = np.full(n_seg, np.nan)
    zval = np.full(n_seg, np.nan)
    if len(seg) == 0:
        return MoveResult(split, step, zval)
    block = int(round(params["move_block_min"] * 60e6))
    starts, counts = seg_starts(seg, n_seg)
    bl = block_medians(e, n, t_us, seg, starts, counts, block, min_fixes=3)
    pe, pn, t0, t1 = bl.pe, bl.pn, bl.t0, bl.t1
    width = pe.shape[1]
    # 2. bursts out (Hampel identifier on the distance to the local median)
    dev = np.hypot(pe - _local_median(pe), pn - _local_median(pn))
    mad = _nanmedian(dev, axis=1, keepdims=True)
    burst = dev > np.maximum(params["move_step"], 3 * 1.4826 * mad)
    pe[burst] = np.nan
    pn[burst] = np.nan
    ok = np.isfinite(pe)
    # 3. noise of a mean over L from adjacent L-long groups of blocks
    min_us = params["move_min_hours"] * 3600e6
    g = max(int(round(min_us / block)), 1)
    n_groups = -(-width // g)
    gw = n_groups * g
    pad = ((0, 0), (0, gw - width))
    ge = np.pad(np.where(ok, pe, 0.0), pad).reshape(n_seg, n_groups, g).sum(axis=2)
    gn = np.pad(np.where(ok, pn, 0.0), pad).reshape(n_seg, n_groups, g).sum(axis=2)
    gc = np.pad(ok, pad).reshape(n_seg, n_groups, g).sum(axis=2)
    with np.errstate(all="ignore"):
        gme, gmn = ge / gc, gn / gc
        good = gc >= max(g // 2, 1)
        pair = good[:, 1:] & good[:, :-1]
        d2 = np.where(pair, (gme[:, 1:] - gme[:, :-1]) ** 2 + (gmn[:, 1:] - gmn[:, :-1]) ** 2,
                      np.nan)
    s2 = _nanmedian(d2, axis=1) / (2 * LN4)  # per-axis variance of a mean over L
    # 4. scan every boundary
    cnt = np.cumsum(ok, axis=1).astype(float)
    ce = np.cumsum(np.where(ok, pe, 0.0), axis=1)
    cn = np.cumsum(np.where(ok, pn, 0.0), axis=1)
    if width < 2:
        return MoveResult(split, step, zval)
    nl, nr = cnt[:, :-1], cnt[:, -1:] - cnt[:, :-1]
    before = np.arange(1, width)[None, :] * block  # from the first fix to the boundary
    after = (t1 - t0)[:, None] - before
    valid = (before >= min_us) & (after >= min_us) & (nl >= 2) & (nr >= 2)
    valid &= np.isfinite(s2)[:, None] & (s2 > 0)[:, None]
    if not valid.any():
        return MoveResult(split, step, zval)
    with np.errstate(all="ignore"):
        de = (ce[:, -1:] - ce[:, :-1]) / nr - ce[:, :-1] / nl
        dn = (cn[:, -1:] - cn[:, :-1]) / nr - cn[:, :-1] / nl
        dist2 = de * de + dn * dn
        scale = s2[:, None] * min_us * (1.0 / before + 1.0 / np.maximum(after, 1))
        z2 = np.where(valid, dist2 / scale, -1.0)
    k = np.argmax(z2, axis=1)
    rows = np.arange(n_seg)
    found = valid[rows, k]
    dist = np.sqrt(dist2[rows, k])
    z = np.sqrt(np.maximum(z2[rows, k], 0.0))
    step[found] = dist[found]
    zval[found] = z[found]
    moved = found & (dist >= params["move_step"]) & (z >= params["move_z"])
    if moved.any():
        split[moved] = _at_the_fix(e, n, t_us, starts, counts, k, moved, ce, cn, nl, nr)
    return MoveResult(split, step, zval)


def _at_the_fix(e: np.ndarray, n: np.ndarray, t_us: np.ndarray, starts: np.ndarray,
                counts: np.ndarray, k: np.ndarray, moved: np.ndarray, ce: np.ndarray,
                cn: np.ndarray, nl: np.ndarray, nr: np.ndarray) -> np.ndarray:
    """Step 5: the first fix after the move, per moved cloud."""
    idx = np.flatnonzero(moved)
    kk = k[idx]
    left_e = ce[idx, kk] / nl[idx, kk]
    left_n = cn[idx, kk] / nl[idx, kk]
    right_e = (ce[idx, -1] - ce[idx, kk]) / nr[idx, kk]
    right_n = (cn[idx, -1] - cn[idx, kk]) / nr[idx, kk]
    ue, un = right_e - left_e, right_n - left_n
    size = np.hypot(ue, un)
    ue, un = ue / size, un / size
    # every fix of the cloud: the block boundary can be off by more than a block when the
    # slow error wanders, while the count of fixes on the wrong side is lowest at the move
    a = starts[idx]
    b = starts[idx] + counts[idx]
    fix, owner = expand_ranges(a, b)
    proj = (e[fix] - left_e[owner]) * ue[owner] + (n[fix] - left_n[owner]) * un[owner]
    far = (proj > 0.5 * size[owner]).astype(np.int64)
    # cost of splitting before element j of a range: far ones before it + near ones from it
    first = np.r_[0, np.cumsum(b - a)[:-1]]
    csum = np.cumsum(far)
    before_far = csum - far - np.where(first[owner] > 0, csum[first[owner] - 1], 0)
    total_far = np.add.reduceat(far, first) if len(far) else far
    pos = np.arange(len(fix)) - first[owner]
    near_from = (b - a)[owner] - pos - (total_far[owner] - before_far)
    cost = before_far + near_from
    order = np.lexsort((pos, cost, owner))
    best = order[np.r_[0, np.flatnonzero(np.diff(owner[order])) + 1]]
    return t_us[fix[best]]

