"""Compiled per-fix sums of the run's error model (:func:`archive.solve.noise.row_noise`).

Step 1 of the pooled model passes over every used fix of a partition many times in numpy
(per-row means, the residual covariance, weights, the level-0 blocks of the Allan
variance). :func:`fix_sums` does the same in one compiled pass per step over each row's
fixes, with the very arithmetic of those numpy calls, so the results are the same to the
bit:

- a per-row sum is ``np.bincount(row, weights=x)``: one accumulator per row starting at
  +0.0, the row's values added in order;
- a block sum is ``np.add.reduceat(x, starts)``: the block's first value plus numpy's
  pairwise sum of the rest (:func:`pairwise_sum`: under 8 values a plain sum from -0.0, up
  to 128 eight interleaved sums combined as a tree, above that the halves, cut at a
  multiple of 8, each summed so).

The tests hold :func:`fix_sums` to the numpy version (``row_noise_reference`` in the
tests) bit for bit. No ``fastmath``: IEEE arithmetic in a fixed order.
"""

from __future__ import annotations

import numpy as np
from numba import njit

_JIT = {"cache": True, "nogil": True, "error_model": "numpy"}


@njit(**_JIT)
def pairwise_sum(a, lo, n):  # pragma: no cover - compiled
    """numpy's pairwise summation of ``a[lo:lo + n]`` (the inner loop of ``np.add``
    reductions of float64)."""
    if n < 8:
        res = -0.0
        for i in range(n):
            res += a[lo + i]
        return res
    if n <= 128:
        r0 = a[lo]
        r1 = a[lo + 1]
        r2 = a[lo + 2]
        r3 = a[lo + 3]
        r4 = a[lo + 4]
        r5 = a[lo + 5]
        r6 = a[lo + 6]
        r7 = a[lo + 7]
        i = 8
        stop = n - (n % 8)
        while i < stop:
            r0 += a[lo + i]
            r1 += a[lo + i + 1]
            r2 += a[lo + i + 2]
            r3 += a[lo + i + 3]
            r4 += a[lo + i + 4]
            r5 += a[lo + i + 5]
            r6 += a[lo + i + 6]
            r7 += a[lo + i + 7]
            i += 8
        res = ((r0 + r1) + (r2 + r3)) + ((r4 + r5) + (r6 + r7))
        while i < n:
            res += a[lo + i]
            i += 1
        return res
    n2 = n // 2
    n2 -= n2 % 8
    return pairwise_sum(a, lo, n2) + pairwise_sum(a, lo + n2, n - n2)


@njit(**_JIT)
def reduceat_sum(a, lo, hi):  # pragma: no cover - compiled
    """``np.add.reduceat`` of one non-empty block ``a[lo:hi]``."""
    return a[lo] + pairwise_sum(a, lo + 1, hi - lo - 1)


@njit(**_JIT)
def fix_sums(de, dn, hdop, w, b0, row, n_rows):  # pragma: no cover - compiled
    """Per row: fixes, residual covariance per unit HDOP (ee, nn, en), sum of weights and
    of weight × HDOP; per fix the standardised residuals; and the level-0 blocks (runs of
    equal row and minute ``b0``): row, minute, count and sums of the standardised
    residuals. ``row`` is non-decreasing."""
    m = len(row)
    n = np.zeros(n_rows)
    se = np.zeros(n_rows)
    sn = np.zeros(n_rows)
    for i in range(m):
        n[row[i]] += 1.0
    h = np.empty(m)
    ze = np.empty(m)
    zn = np.empty(m)
    for i in range(m):
        x = hdop[i]
        h[i] = x if (np.isfinite(x) and x > 0) else 1.0
        ze[i] = de[i] / h[i]
        zn[i] = dn[i] / h[i]
        se[row[i]] += ze[i]
        sn[row[i]] += zn[i]
    q = np.zeros((n_rows, 3))
    sw = np.zeros(n_rows)
    swh = np.zeros(n_rows)
    for r in range(n_rows):
        safe = max(n[r], 1.0)
        se[r] = se[r] / safe
        sn[r] = sn[r] / safe
    for i in range(m):
        r = row[i]
        ze[i] = ze[i] - se[r]
        zn[i] = zn[i] - sn[r]
        q[r, 0] += ze[i] * ze[i]
        q[r, 1] += zn[i] * zn[i]
        q[r, 2] += ze[i] * zn[i]
        sw[r] += w[i]
        swh[r] += w[i] * h[i]
    level = np.empty(n_rows)
    for r in range(n_rows):
        safe = max(n[r], 1.0)
        q[r, 0] = q[r, 0] / safe
        q[r, 1] = q[r, 1] / safe
        q[r, 2] = q[r, 2] / safe
        v = 0.5 * (q[r, 0] + q[r, 1])
        level[r] = np.sqrt(v if not v < 1e-300 else 1e-300)  # np.maximum: NaN stays NaN
    for i in range(m):
        lv = level[row[i]]
        ze[i] = ze[i] / lv
        zn[i] = zn[i] / lv
    n_blocks = 0
    for i in range(m):
        if i == 0 or row[i] != row[i - 1] or b0[i] != b0[i - 1]:
            n_blocks += 1
    brow = np.empty(n_blocks, dtype=np.int64)
    bblk = np.empty(n_blocks, dtype=np.int64)
    bcnt = np.empty(n_blocks)
    bse = np.empty(n_blocks)
    bsn = np.empty(n_blocks)
    k = 0
    lo = 0
    for i in range(1, m + 1):
        if i == m or row[i] != row[i - 1] or b0[i] != b0[i - 1]:
            brow[k] = row[lo]
            bblk[k] = b0[lo]
            bcnt[k] = float(i - lo)
            bse[k] = reduceat_sum(ze, lo, i)
            bsn[k] = reduceat_sum(zn, lo, i)
            k += 1
            lo = i
    return n, q, sw, swh, ze, zn, brow, bblk, bcnt, bse, bsn


@njit(**_JIT)
def level_sums(brow, bblk, bcnt, bse, bsn, span, per_min, n_rows, levels, block0
               ):  # pragma: no cover - compiled
    """The Allan sums of every row at block lengths ``block0``·2ʲ, j < ``levels``, from the
    level-0 blocks of :func:`fix_sums` (see :func:`archive.solve.noise.row_noise`): blocks
    of level j are runs of equal row and minute >> j; adjacent pairs of full blocks inside
    the row's span add ½(Δȳ)² (both axes, halved), and count."""
    allan = np.zeros((n_rows, levels))
    pairs = np.zeros((n_rows, levels))
    white = np.zeros((n_rows, levels))
    brow = brow.copy()
    bblk = bblk.copy()
    bcnt = bcnt.copy()
    bse = bse.copy()
    bsn = bsn.copy()
    m = len(brow)
    full = np.empty(m, dtype=np.bool_)
    for j in range(levels):
        if j:
            k = 0
            lo = 0
            for i in range(1, m + 1):
                if i == m or brow[i] != brow[i - 1] or (bblk[i] >> j) != (bblk[i - 1] >> j):
                    c = reduceat_sum(bcnt, lo, i)
                    se = reduceat_sum(bse, lo, i)
                    sn = reduceat_sum(bsn, lo, i)
                    brow[k] = brow[lo]
                    bblk[k] = bblk[lo]
                    bcnt[k] = c
                    bse[k] = se
                    bsn[k] = sn
                    k += 1
                    lo = i
            m = k
        length = block0 * (1 << j)
        for i in range(m):
            r = brow[i]
            inside = ((bblk[i] >> j) + 1) * length <= span[r] + 1e-6
            full[i] = inside and bcnt[i] >= 0.5 * per_min[r] * (1 << j)
        for i in range(m - 1):
            r = brow[i + 1]
            if not (full[i] and full[i + 1] and r == brow[i]
                    and (bblk[i + 1] >> j) - (bblk[i] >> j) == 1):
                continue
            de = bse[i + 1] / bcnt[i + 1] - bse[i] / bcnt[i]
            dn = bsn[i + 1] / bcnt[i + 1] - bsn[i] / bcnt[i]
            allan[r, j] += 0.25 * (de * de + dn * dn)
            pairs[r, j] += 1.0
            white[r, j] += 0.5 * (1.0 / bcnt[i + 1] + 1.0 / bcnt[i])
    return allan, pairs, white
