"""Compiled segment kernels under the solver's hot stages (numba, cached on disk).

The numpy versions of these stages (``_reference`` functions in :mod:`segments`,
:mod:`robust` and :mod:`uncertainty`) make many passes and temporaries over every fix; here
each segment (cloud) is handled by one compiled loop that touches its fixes a few times
while they sit in cache:

- :func:`seg_medians`: median of a deterministic systematic subsample of each segment, by
  selection in per-thread buffers, not by sorting everything: the rank is bracketed from a
  small sorted sample, then out-of-place partitions without data-dependent branches
  (:func:`_median_pp`) finish it;
- :func:`robust_segments`: the whole robust schedule of :mod:`robust` per segment (start at
  the coordinate-wise median, MAD scale, IRLS steps with distance, ψ-weight and weighted
  sums fused in one pass per step, chi-square rejection, final weights);
- :func:`batch_segments`: batch sums and the batch-means covariance of :mod:`uncertainty`.

Parallel across segments: :func:`run_split` cuts the segments into contiguous ranges of
about equal element count and runs the kernel (which releases the GIL) on one thread per
range. Every segment is computed by exactly one thread with sequential sums, and the
ranges only decide which thread does it, so results do not depend on the thread count.
No floating-point ``fastmath``: the compiled arithmetic is the IEEE arithmetic of the
reference, in a fixed order.
"""

from __future__ import annotations

import os
import threading
from collections.abc import Callable
from concurrent.futures import ThreadPoolExecutor

import numpy as np
from numba import njit

EST_HUBER, EST_TUKEY, EST_GEOMEDIAN, EST_MEAN = 0, 1, 2, 3
LANES = 8  # interleaved partial sums per weighted sum (fixed: part of the result's definition)
MIN_SPLIT = 1 << 15  # elements per thread below which one thread does everything
# IEEE division (x/0 gives inf or NaN, as numpy does) instead of a raised ZeroDivisionError:
# the check for a zero divisor inside a loop keeps it from compiling to vector instructions.
_JIT = {"cache": True, "nogil": True, "error_model": "numpy"}

_threads = max(1, min(len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
                      else (os.cpu_count() or 1), 8))


def set_threads(n: int) -> None:
    """Threads used per kernel call (1 in worker processes that already fill the cores)."""
    global _threads
    _threads = max(1, int(n))


def get_threads() -> int:
    """Threads used per kernel call."""
    return _threads


def run_split(kernel: Callable[..., None], counts: np.ndarray, *args: object) -> None:
    """Run ``kernel(s_lo, s_hi, *args)`` over all segments, split across threads.

    ``counts`` are the elements per segment; ranges of whole segments with about equal
    element totals go to the threads. Only the main thread fans out (a call from a worker
    thread, such as a threaded Dask worker, runs on that thread alone).
    """
    n_seg = len(counts)
    total = int(counts.sum()) if n_seg else 0
    parts = min(_threads, max(1, total // MIN_SPLIT), max(n_seg, 1))
    if parts <= 1 or threading.current_thread() is not threading.main_thread():
        kernel(0, n_seg, *args)
        return
    ends = np.cumsum(counts)
    cuts = np.searchsorted(ends, np.arange(1, parts) * (total / parts), side="left") + 1
    bounds = np.unique(np.concatenate([[0], np.minimum(cuts, n_seg), [n_seg]]))
    if len(bounds) <= 2:
        kernel(0, n_seg, *args)
        return
    # the calling thread takes the last range itself instead of waiting idle
    with ThreadPoolExecutor(max_workers=len(bounds) - 2) as pool:
        futures = [pool.submit(kernel, int(a), int(b), *args)
                   for a, b in zip(bounds[:-2], bounds[1:-1], strict=True)]
        kernel(int(bounds[-2]), int(bounds[-1]), *args)
        for f in futures:
            f.result()


@njit(**_JIT)
def _select(buf, m, k):  # pragma: no cover - compiled
    """Put the k-th smallest of buf[:m] at buf[k] (Hoare's quickselect, median of three)."""
    lo = 0
    hi = m - 1
    while hi > lo:
        mid = (lo + hi) >> 1
        if buf[mid] < buf[lo]:
            buf[mid], buf[lo] = buf[lo], buf[mid]
        if buf[hi] < buf[lo]:
            buf[hi], buf[lo] = buf[lo], buf[hi]
        if buf[hi] < buf[mid]:
            buf[hi], buf[mid] = buf[mid], buf[hi]
        pivot = buf[mid]
        i = lo
        j = hi
        while i <= j:
            while buf[i] < pivot:
                i += 1
            while pivot < buf[j]:
                j -= 1
            if i <= j:
                buf[i], buf[j] = buf[j], buf[i]
                i += 1
                j -= 1
        if k <= j:
            hi = j
        elif k >= i:
            lo = i
        else:
            return


SMALL = 24  # range size below which the selection finishes with quickselect in place
BRACKET = 256  # values above which the median first brackets its rank from a sample
SAMPLE = 64  # values in that sample
SPREAD = 8  # sample ranks each side of the wanted one (about two standard deviations)


@njit(**_JIT)
def _select_pp(src, dst, n, k, upper):  # pragma: no cover - compiled
    """(k-th smallest of src[:n], the next value up) with ``dst`` as scratch; both reordered.

    Selection by out-of-place partitions without data-dependent branches: each pass writes
    every element to both ends of the other buffer and advances one end by the comparison,
    so the processor never mispredicts on the data (most of the cost of an in-place
    quickselect on a few thousand values is mispredicted branches). A first pass splits
    < pivot / >= pivot; when the wanted rank is not below, a second pass splits the upper
    part into == pivot / > pivot, so ties end the search at once. The next value up is the
    smaller of the least value above the k-th in the final range and ``upper`` lowered to
    the pivot of every range left behind on the right (each holds its pivot as minimum).
    """
    off = 0
    while n > SMALL:
        x0 = src[off]
        x1 = src[off + (n >> 1)]
        x2 = src[off + n - 1]
        pivot = max(min(x0, x1), min(max(x0, x1), x2))
        lo = 0
        hi = n - 1
        for i in range(off, off + n):
            x = src[i]
            dst[lo] = x
            dst[hi] = x
            lt = x < pivot
            lo += lt
            hi -= 1 - lt
        if k < lo:  # the rank is among the smaller ones; the rest start at the pivot
            upper = min(upper, pivot)
            src, dst = dst, src
            off = 0
            n = lo
            continue
        lo2 = 0
        hi2 = n - lo - 1
        for i in range(lo, n):
            x = dst[i]
            src[lo2] = x
            src[hi2] = x
            le = x <= pivot
            lo2 += le
            hi2 -= 1 - le
        k -= lo
        n -= lo
        if k < lo2:  # the rank falls among the values equal to the pivot
            if k + 1 < lo2:
                return pivot, pivot
            for i in range(lo2, n):
                upper = min(upper, src[i])
            return pivot, upper
        k -= lo2
        n -= lo2
        off = lo2
    part = src[off:off + n]
    _select(part, n, k)
    for i in range(k + 1, n):
        upper = min(upper, part[i])
    return part[k], upper


@njit(**_JIT)
def _median_pp(a, b, m):  # pragma: no cover - compiled
    """Median of a[:m] (NaN when empty or holding a NaN), ``b`` (size >= m) as scratch.

    For more than ``BRACKET`` values, a sorted systematic sample of ``SAMPLE`` values gives
    two bounds that hold the wanted ranks with high probability; one pass without
    data-dependent branches counts the values below, keeps those between and the least
    above, and only those between go on to :func:`_select_pp`. When the ranks fall outside
    (rare), the selection runs on all values. Either way the median is a value (or the
    mean of two values) of the data, exactly the one a sort gives.
    """
    if m == 0:
        return np.nan
    bad = False
    for j in range(m):
        bad |= np.isnan(a[j])
    if bad:
        return np.nan
    k = (m - 1) // 2
    if m > BRACKET:
        smp = np.empty(SAMPLE)
        for j in range(SAMPLE):
            smp[j] = a[((2 * j + 1) * m) // (2 * SAMPLE)]
        smp.sort()
        ks = (k * SAMPLE) // m
        lo_v = smp[ks - SPREAD] if ks >= SPREAD else -np.inf
        hi_v = smp[ks + SPREAD] if ks + SPREAD < SAMPLE else np.inf
        below = 0
        c = 0
        above = np.inf
        for j in range(m):
            x = a[j]
            b[c] = x
            below += x < lo_v
            c += (x >= lo_v) & (x <= hi_v)
            above = min(above, x if x > hi_v else np.inf)
        if below <= k and k + 1 < below + c:
            v, nxt = _select_pp(b, a, c, k - below, above)
            return v if m % 2 == 1 else 0.5 * (v + nxt)
    v, nxt = _select_pp(a, b, m, k, np.inf)
    return v if m % 2 == 1 else 0.5 * (v + nxt)


@njit(**_JIT)
def _sub_median(values, start, count, cap, buf, buf2):  # pragma: no cover - compiled
    """Median of the systematic subsample (at most ``cap``) of values[start:start+count]."""
    m = count if (cap <= 0 or count <= cap) else cap
    if m == count:
        for j in range(m):
            buf[j] = values[start + j]
    else:
        for j in range(m):
            buf[j] = values[start + ((2 * j + 1) * count) // (2 * m)]
    return _median_pp(buf, buf2, m)


@njit(**_JIT)
def seg_medians(s_lo, s_hi, values, starts, counts, cap, out):  # pragma: no cover
    """out[s] = median of the subsample of segment s, for s in [s_lo, s_hi)."""
    size = 1
    for s in range(s_lo, s_hi):
        size = max(size, counts[s] if cap <= 0 else min(counts[s], cap))
    buf = np.empty(size)
    buf2 = np.empty(size)
    for s in range(s_lo, s_hi):
        out[s] = _sub_median(values, starts[s], counts[s], cap, buf, buf2)


@njit(**_JIT)
def _w_huber(e, n, invh, keep, ce, cn, isc, k, wbuf):  # pragma: no cover - compiled
    for j in range(e.shape[0]):
        ih = invh[j]
        de = e[j] - ce
        dn = n[j] - cn
        r = np.sqrt(de * de + dn * dn) * ih * isc
        wbuf[j] = keep[j] * (ih * ih * k / max(r, k))


@njit(**_JIT)
def _w_tukey(e, n, invh, keep, ce, cn, isc, c, wbuf):  # pragma: no cover - compiled
    for j in range(e.shape[0]):
        ih = invh[j]
        de = e[j] - ce
        dn = n[j] - cn
        u = np.sqrt(de * de + dn * dn) * ih * isc / c
        v = 1.0 - u * u
        wbuf[j] = keep[j] * (ih * ih * v * v if u < 1.0 else 0.0)


@njit(**_JIT)
def _w_geomedian(e, n, invh, keep, ce, cn, isc, wbuf):  # pragma: no cover - compiled
    for j in range(e.shape[0]):
        ih = invh[j]
        de = e[j] - ce
        dn = n[j] - cn
        r = np.sqrt(de * de + dn * dn) * ih * isc
        wbuf[j] = keep[j] * (ih * ih / max(r, 1e-9))


@njit(**_JIT)
def _w_mean(invh, keep, wbuf):  # pragma: no cover - compiled
    for j in range(invh.shape[0]):
        ih = invh[j]
        wbuf[j] = keep[j] * (ih * ih)


@njit(**_JIT)
def _weights(e, n, invh, keep, ce, cn, isc, est, k, c, wbuf):  # pragma: no cover - compiled
    """IRLS weights of one segment's elements around (ce, cn) into ``wbuf``.

    w = ψ(r)/r / HDOP² with r = |x − c|/(HDOP·s), times ``keep`` (0 for a rejected fix).
    The arrays are the segment's own slices; one loop per estimator without a reduction,
    so each compiles to vector instructions.
    """
    if est == EST_HUBER:
        _w_huber(e, n, invh, keep, ce, cn, isc, k, wbuf)
    elif est == EST_TUKEY:
        _w_tukey(e, n, invh, keep, ce, cn, isc, c, wbuf)
    elif est == EST_GEOMEDIAN:
        _w_geomedian(e, n, invh, keep, ce, cn, isc, wbuf)
    else:
        _w_mean(invh, keep, wbuf)


@njit(**_JIT)
def _update(e, n, wbuf, cen):  # pragma: no cover - compiled
    """Weighted centre of one segment (its slices) from ``wbuf``: sums in ``LANES`` fixed
    interleaved lanes (a fixed order, so the same result on any thread), then the lanes in
    order. The lanes are local scalars (registers, so the loop compiles to vector
    instructions)."""
    cnt = e.shape[0]
    full = cnt - cnt % LANES
    w0 = w1 = w2 = w3 = w4 = w5 = w6 = w7 = 0.0
    e0 = e1 = e2 = e3 = e4 = e5 = e6 = e7 = 0.0
    n0 = n1 = n2 = n3 = n4 = n5 = n6 = n7 = 0.0
    for j0 in range(0, full, LANES):
        w = wbuf[j0]
        w0 += w
        e0 += w * e[j0]
        n0 += w * n[j0]
        w = wbuf[j0 + 1]
        w1 += w
        e1 += w * e[j0 + 1]
        n1 += w * n[j0 + 1]
        w = wbuf[j0 + 2]
        w2 += w
        e2 += w * e[j0 + 2]
        n2 += w * n[j0 + 2]
        w = wbuf[j0 + 3]
        w3 += w
        e3 += w * e[j0 + 3]
        n3 += w * n[j0 + 3]
        w = wbuf[j0 + 4]
        w4 += w
        e4 += w * e[j0 + 4]
        n4 += w * n[j0 + 4]
        w = wbuf[j0 + 5]
        w5 += w
        e5 += w * e[j0 + 5]
        n5 += w * n[j0 + 5]
        w = wbuf[j0 + 6]
        w6 += w
        e6 += w * e[j0 + 6]
        n6 += w * n[j0 + 6]
        w = wbuf[j0 + 7]
        w7 += w
        e7 += w * e[j0 + 7]
        n7 += w * n[j0 + 7]
    sw = 0.0 + w0 + w1 + w2 + w3 + w4 + w5 + w6 + w7
    se = 0.0 + e0 + e1 + e2 + e3 + e4 + e5 + e6 + e7
    sn = 0.0 + n0 + n1 + n2 + n3 + n4 + n5 + n6 + n7
    for j in range(full, cnt):
        w = wbuf[j]
        sw += w
        se += w * e[j]
        sn += w * n[j]
    if sw > 0:
        cen[0] = se / sw
        cen[1] = sn / sw


@njit(**_JIT)
def _step(e, n, invh, keep, cen, isc, est, k, c, wbuf):  # pragma: no cover - compiled
    """One IRLS step of a segment: new weights around ``cen``, then the weighted centre."""
    _weights(e, n, invh, keep, cen[0], cen[1], isc, est, k, c, wbuf)
    _update(e, n, wbuf, cen)


@njit(**_JIT)
def robust_segments(s_lo, s_hi, e, n, hdop, starts, counts, est, k, c, limit, rounds, steps,
                    cap, median_unit, min_scale, centre, scale, weight, rejected, r
                    ):  # pragma: no cover - compiled
    """The robust schedule of :mod:`archive.solve.robust` for segments [s_lo, s_hi).

    ``e, n`` the coordinates (``n`` all zero for 1-D data), ``hdop`` the HDOP (a value
    that is not finite and positive counts as 1; 1/HDOP is formed per segment in a
    per-thread buffer, not as a whole array before the call); outputs
    ``centre`` (2, n_seg), ``scale``, and per element ``weight``, ``rejected``, ``r``.
    """
    size = 1
    for s in range(s_lo, s_hi):
        size = max(size, counts[s])
    buf = np.empty(size)
    buf2 = np.empty(size)
    wbuf = np.empty(size)
    keep = np.ones(size)
    invh = np.empty(size)
    sub_e = np.empty(size)
    sub_n = np.empty(size)
    sub_h = np.empty(size)
    cen = np.empty(2)
    for s in range(s_lo, s_hi):
        a = starts[s]
        cnt = counts[s]
        b = a + cnt
        es, ns, hs, kp, wb = e[a:b], n[a:b], invh[:cnt], keep[:cnt], wbuf[:cnt]
        for j in range(cnt):
            h = hdop[a + j]
            hs[j] = 1.0 / h if (np.isfinite(h) and h > 0) else 1.0
        kp[:] = 1.0
        # the systematic subsample of the medians, gathered once per cloud
        mm = cnt if (cap <= 0 or cnt <= cap) else cap
        for j in range(mm):
            i = j if mm == cnt else ((2 * j + 1) * cnt) // (2 * mm)
            sub_e[j] = es[i]
            sub_n[j] = ns[i]
            sub_h[j] = hs[i]
        for d in range(2):
            buf[:mm] = sub_e[:mm] if d == 0 else sub_n[:mm]
            m = _median_pp(buf, buf2, mm)
            cen[d] = m if np.isfinite(m) else 0.0
        sc = min_scale
        for _ in range(rounds):
            # MAD-type scale of the HDOP-normalised distances, from the subsample
            if cnt > 0:
                ce = cen[0]
                cn = cen[1]
                for j in range(mm):
                    de = sub_e[j] - ce
                    dn = sub_n[j] - cn
                    buf[j] = np.sqrt(de * de + dn * dn) * sub_h[j]
                sc = _median_pp(buf, buf2, mm) / median_unit
                if not np.isfinite(sc):
                    sc = min_scale
            sc = max(sc, min_scale)
            for _ in range(steps):
                _step(es, ns, hs, kp, cen, 1.0 / sc, est, k, c, wb)
        isc = 1.0 / sc
        n_rej = 0
        rj = rejected[a:b]
        for j in range(cnt):
            de = es[j] - cen[0]
            dn = ns[j] - cen[1]
            out = np.sqrt(de * de + dn * dn) * hs[j] * isc > limit
            rj[j] = out
            kp[j] = 0.0 if out else 1.0
            n_rej += out
        if n_rej > 0:  # only a cloud that lost fixes runs the steps without them
            for _ in range(steps):
                _step(es, ns, hs, kp, cen, isc, est, k, c, wb)
        _weights(es, ns, hs, kp, cen[0], cen[1], isc, est, k, c, weight[a:b])
        rs = r[a:b]
        for j in range(cnt):
            de = es[j] - cen[0]
            dn = ns[j] - cen[1]
            rs[j] = np.sqrt(de * de + dn * dn) * hs[j] * isc
        centre[0, s] = cen[0]
        centre[1, s] = cen[1]
        scale[s] = sc


@njit(**_JIT)
def batch_segments(s_lo, s_hi, de, dn, w, t, starts, counts, batch_s, min_batches,
                   out):  # pragma: no cover - compiled
    """Batch-means covariance of :func:`archive.solve.uncertainty.batch_covariance`.

    ``out`` is (n_seg, 4): vee, vnn, ven, n_eff per segment.
    """
    for s in range(s_lo, s_hi):
        a = starts[s]
        n = counts[s]
        b = a + n
        t0 = t[a] if n > 0 else 0.0
        span = (t[b - 1] - t0) if n > 0 else 0.0
        length = min(batch_s, max(span, 1e-9) / min_batches)
        n_b = max(int(np.ceil(span / length - 1e-9)), 1)
        acc = np.zeros((n_b, 3))
        sw = 0.0
        see = 0.0
        snn = 0.0
        sen = 0.0
        for i in range(a, b):
            j = min(int((t[i] - t0) / length), n_b - 1)
            wi = w[i]
            acc[j, 0] += wi
            acc[j, 1] += wi * de[i]
            acc[j, 2] += wi * dn[i]
            sw += wi
            see += wi * de[i] * de[i]
            snn += wi * dn[i] * dn[i]
            sen += wi * de[i] * dn[i]
        safe_w = sw if sw > 0 else 1.0
        see /= safe_w
        snn /= safe_w
        sen /= safe_w
        swb = 0.0
        se = 0.0
        sn = 0.0
        m = 0
        for j in range(n_b):
            swb += acc[j, 0]
            se += acc[j, 1]
            sn += acc[j, 2]
            if acc[j, 0] > 0:
                m += 1
        if m > 1:
            safe = swb if swb > 0 else 1.0
            mean_e = se / safe
            mean_n = sn / safe
            qee = 0.0
            qnn = 0.0
            qen = 0.0
            for j in range(n_b):
                ue = acc[j, 1] - acc[j, 0] * mean_e
                un = acc[j, 2] - acc[j, 0] * mean_n
                qee += ue * ue
                qnn += un * un
                qen += ue * un
            corr = m / max(m - 1, 1)
            vee = corr * qee / safe**2
            vnn = corr * qnn / safe**2
            ven = corr * qen / safe**2
        else:  # a single batch says nothing about the error of its mean: one sample
            vee, vnn, ven = see, snn, sen
        tr = vee + vnn
        out[s, 0] = vee
        out[s, 1] = vnn
        out[s, 2] = ven
        out[s, 3] = (see + snn) / tr if tr > 0 else np.nan
