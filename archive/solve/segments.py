"""Segment reductions over sorted arrays, and the local east/north plane.

Every per-cloud quantity of the solver is a *segment reduction*: the fixes of all clouds sit
in one array, sorted so that each cloud (segment) is a contiguous run, and a segment id array
``seg`` (non-decreasing, 0..S-1) says which cloud each element belongs to. Sums are
``np.add.reduceat`` over the runs; medians come from a bounded, deterministic systematic
subsample of each segment, selected per segment by a compiled kernel
(:func:`archive.solve.kernels.seg_medians`; :func:`seg_median_reference` is the numpy
version by one global sort, kept for tests). No Python loop runs per segment.

The local plane: around a reference latitude/longitude, east = (N + h)·cos φ₀·Δλ and
north = (M + h)·Δφ with M, N the WGS 84 meridian and prime-vertical radii at φ₀. Over a
station cloud (tens of metres) it agrees with the exact topocentric frame (EPSG method 9837)
to well under a millimetre, and its inverse is exact, so only the solved centre is projected.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from archive.solve.kernels import run_split, seg_medians

WGS84_A = 6378137.0
WGS84_F = 1 / 298.257223563
WGS84_E2 = WGS84_F * (2 - WGS84_F)


def seg_starts(seg: np.ndarray, n_seg: int) -> tuple[np.ndarray, np.ndarray]:
    """(start index, count) of every segment of a non-decreasing segment id array."""
    ids = np.arange(n_seg)
    starts = np.searchsorted(seg, ids, side="left").astype(np.int64)
    counts = np.searchsorted(seg, ids, side="right").astype(np.int64) - starts
    return starts, counts


def seg_sum(values: np.ndarray, seg: np.ndarray, n_seg: int) -> np.ndarray:
    """Sum of ``values`` per segment (0 for empty ones): ``np.add.reduceat`` over the runs."""
    ids = np.arange(n_seg)
    starts = np.searchsorted(seg, ids, side="left")
    ends = np.searchsorted(seg, ids, side="right")
    out = np.zeros(n_seg)
    full = ends > starts
    if full.any():
        out[full] = np.add.reduceat(np.asarray(values, dtype=np.float64), starts[full])
    return out


def expand_ranges(lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Concatenate the index ranges [lo_k, hi_k): returns (indices, range number of each)."""
    counts = np.maximum(hi - lo, 0).astype(np.int64)
    total = int(counts.sum())
    owner = np.repeat(np.arange(len(lo), dtype=np.int64), counts)
    first = np.zeros(len(lo), dtype=np.int64)
    if len(lo) > 1:
        np.cumsum(counts[:-1], out=first[1:])
    idx = np.arange(total, dtype=np.int64) - first[owner] + lo[owner].astype(np.int64)
    return idx, owner


def subsample(seg: np.ndarray, n_seg: int, cap: int) -> tuple[np.ndarray, np.ndarray]:
    """A deterministic systematic subsample of at most ``cap`` elements per segment.

    Returns (indices into the segment-sorted array, segment id of each). Segments with at
    most ``cap`` elements are taken whole; longer ones evenly, at the centres of ``cap``
    equal slices (in time, when the elements are time-ordered within a segment).
    """
    starts, counts = seg_starts(seg, n_seg)
    take = np.minimum(counts, cap)
    j, owner = expand_ranges(np.zeros(n_seg, dtype=np.int64), take)
    n = counts[owner]
    m = np.maximum(take[owner], 1)
    idx = starts[owner] + ((2 * j + 1) * n) // (2 * m)
    return idx, owner


def seg_median(values: np.ndarray, seg: np.ndarray, n_seg: int, cap: int | None = None
               ) -> np.ndarray:
    """Median of ``values`` per segment (NaN for empty ones), from at most ``cap`` elements.

    ``seg`` must be non-decreasing; the subsample is the one of :func:`subsample`.
    """
    starts, counts = seg_starts(seg, n_seg)
    out = np.full(n_seg, np.nan)
    vals = np.ascontiguousarray(values, dtype=np.float64)
    run_split(seg_medians, counts, vals, starts, counts, int(cap or 0), out)
    return out


def seg_median_reference(values: np.ndarray, seg: np.ndarray, n_seg: int,
                         cap: int | None = None) -> np.ndarray:
    """numpy version of :func:`seg_median` (one global sort), the reference for tests."""
    if cap is not None:
        idx, owner = subsample(seg, n_seg, cap)
        values, seg = values[idx], owner
    out = np.full(n_seg, np.nan)
    if len(values) == 0:
        return out
    lo, hi = float(values.min()), float(values.max())
    span = (hi - lo) or 1.0
    scale = span * 1.000001
    # Sort (segment, value) pairs in one pass: the key is the segment id plus the value
    # scaled into [0, 1); the value is read back from the sorted key (to ~1e-15 of span).
    key = seg.astype(np.float64)
    key += (values - lo) / scale
    key.sort()
    v = (key - np.floor(key)) * scale + lo
    starts, counts = seg_starts(seg, n_seg)
    has = counts > 0
    a = starts[has] + (counts[has] - 1) // 2
    b = starts[has] + counts[has] // 2
    out[has] = 0.5 * (v[a] + v[b])
    return out


@dataclass
class Blocks:
    """The robust centre of every fixed-length time block of every segment, as a
    (segments x blocks) grid: ``pe``/``pn`` the median east/north of each block (NaN for a
    thin block or past the end of a shorter segment), ``t0``/``t1`` each segment's first
    and last fix time (µs; 0 for an empty segment)."""

    pe: np.ndarray
    pn: np.ndarray
    t0: np.ndarray
    t1: np.ndarray


def block_medians(e: np.ndarray, n: np.ndarray, t_us: np.ndarray, seg: np.ndarray,
                  starts: np.ndarray, counts: np.ndarray, block: int, min_fixes: int
                  ) -> Blocks:
    """Blocks of ``block`` µs from each segment's first fix (:class:`Blocks`). A nearly
    empty block (the partial one at the end, a gap: fewer than ``min_fixes`` fixes or under
    a quarter of the segment's typical count) has no robust median and is NaN."""
    n_seg = len(starts)
    has = counts > 0
    t0 = np.zeros(n_seg, dtype=np.int64)
    t1 = np.zeros(n_seg, dtype=np.int64)
    t0[has] = t_us[starts[has]]
    t1[has] = t_us[starts[has] + counts[has] - 1]
    nb = np.where(has, (t1 - t0) // block + 1, 0)
    first = np.zeros(n_seg, dtype=np.int64)
    if n_seg > 1:
        np.cumsum(nb[:-1], out=first[1:])
    gb = first[seg] + (t_us - t0[seg]) // block
    total = int(nb.sum())
    me = seg_median(e, gb, total, 256)
    mn = seg_median(n, gb, total, 256)
    per_block = np.bincount(gb, minlength=total)
    typical = np.repeat(counts / np.maximum(nb, 1), nb)
    thin = (per_block < min_fixes) | (per_block < 0.25 * typical)
    me[thin] = np.nan
    mn[thin] = np.nan
    width = int(nb.max())
    row = np.repeat(np.arange(n_seg), nb)
    col = np.arange(total) - first[row]
    pe = np.full((n_seg, width), np.nan)
    pn = np.full((n_seg, width), np.nan)
    pe[row, col] = me
    pn[row, col] = mn
    return Blocks(pe, pn, t0, t1)


def radii(lat0_deg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """WGS 84 meridian (M) and prime-vertical (N) radii of curvature at latitude φ₀, m."""
    s = np.sin(np.radians(lat0_deg))
    w2 = 1.0 - WGS84_E2 * s * s
    n = WGS84_A / np.sqrt(w2)
    m = WGS84_A * (1.0 - WGS84_E2) / (w2 * np.sqrt(w2))
    return m, n


def to_local(lat: np.ndarray, lon: np.ndarray, lat0: np.ndarray, lon0: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
    """Degrees -> metres east/north of (lat0, lon0) (arrays broadcast element-wise)."""
    m, n = radii(lat0)
    dlon = (lon - lon0 + 180.0) % 360.0 - 180.0
    east = np.radians(dlon) * n * np.cos(np.radians(lat0))
    north = np.radians(lat - lat0) * m
    return east, north


def to_local_segments(lat: np.ndarray, lon: np.ndarray, lat0: np.ndarray, lon0: np.ndarray,
                      seg: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`to_local` of every element around the origin of its segment
    (``lat0[seg], lon0[seg]``): the radii and the cosine of each origin are computed once
    per segment, not once per element; the values are the same, element by element."""
    m, n = radii(lat0)
    cos0 = np.cos(np.radians(lat0))
    dlon = (lon - lon0[seg] + 180.0) % 360.0 - 180.0
    east = np.radians(dlon) * n[seg] * cos0[seg]
    north = np.radians(lat - lat0[seg]) * m[seg]
    return east, north


def from_local(east: np.ndarray, north: np.ndarray, lat0: np.ndarray, lon0: np.ndarray
               ) -> tuple[np.ndarray, np.ndarray]:
    """Exact inverse of :func:`to_local`: metres east/north -> (lat, lon) degrees."""
    m, n = radii(lat0)
    lat = lat0 + np.degrees(north / m)
    lon = lon0 + np.degrees(east / (n * np.cos(np.radians(lat0))))
    lon = (lon + 180.0) % 360.0 - 180.0
    return lat, lon
