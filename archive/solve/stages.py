"""The stages of the solver, each vectorised over every cloud at once (see :mod:`engine`).

Every stage takes the results of the ones before it and returns a small dataclass of
parallel arrays. Three indexings run through them:

- *fixes*: the node-sorted fix arrays (:class:`~archive.solve.fixarrays.FixArrays`);
- *members*: every fix of every window, window by window (a fix inside two overlapping
  windows is a member twice); ``kept`` marks the members that passed screening;
- *rows*: position rows, one per window, two for a window split by a move (part 1 before
  the move, part 2 after it).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from archive.edits.spans import Span, excluded
from archive.solve.changepoint import scan_moves
from archive.solve.clusters import find_clusters
from archive.solve.fixarrays import FixArrays, fix_arrays
from archive.solve.moves import MoveResult, detect_moves
from archive.solve.noise import RowNoise, row_noise
from archive.solve.params import setting
from archive.solve.robust import RobustResult, robust_centre
from archive.solve.screen import cloud_hdop, mark_excluded, screen_codes
from archive.solve.segments import from_local, seg_median, seg_starts, to_local_segments
from archive.solve.uncertainty import (
    CentreCovariance,
    ar1_covariance,
    batch_covariance,
    ellipse95,
    radius95,
)
from archive.solve.windows import (
    Windows,
    gather,
    inside_any,
    logged_windows,
    node_codes,
    usable_counts,
)
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer


@dataclass
class Screened:
    """Every fix, with its screening reason (0: kept)."""

    fx: FixArrays
    code: np.ndarray  # int8 reason code per fix (archive.solve.screen.SCREEN_REASONS)
    kept: np.ndarray  # bool per fix


def screen(fixes: Any, params: dict[str, Any], spans: list[Span]) -> Screened:
    """Sort the fixes (a fix table, or its :class:`FixArrays`), screen them by what the
    receiver said, and by the exclude spans."""
    fx = fixes if isinstance(fixes, FixArrays) else fix_arrays(fixes)
    code = screen_codes(fx.columns(), params["screen"])
    mark_excluded(code, excluded(fx.node_code, fx.t_us, fx.node_names, spans))
    return Screened(fx, code, code == 0)


@dataclass
class WindowSet:
    """Every window solved: the logged ones, unlogged clusters, and windows given directly."""

    windows: Windows
    from_margins: np.ndarray  # bool per window: solved from its settle margins


def find_windows(s: Screened, deployments: Any, stations: dict[str, np.ndarray],
                 params: dict[str, Any], crs_epsg: int, unit: float, *,
                 detect_unlogged: bool, extra: Windows | None) -> WindowSet:
    """Logged windows minus settle margins (the whole logged window when the settled one
    has no usable fix), unlogged stationary clusters near stations, and ``extra`` windows."""
    win = params["window"]
    logged, raw_s, raw_e = logged_windows(deployments, s.fx, win["settle_start_min"] * 60,
                                          win["settle_end_min"] * 60)
    # A run made before the fallback existed has no such parameter: it never used margins.
    margins = np.zeros(len(logged), dtype=bool)
    if setting(params, "window", "margin_fallback") and len(logged):
        settled = usable_counts(s.fx, s.kept, logged.code, logged.start, logged.end)
        whole = usable_counts(s.fx, s.kept, logged.code, raw_s, raw_e)
        margins = (settled == 0) & (whole > 0)
        logged.start = np.where(margins, raw_s, logged.start)
        logged.end = np.where(margins, raw_e, logged.end)
    if (setting(params, "window", "hold_unharvested") and len(logged)
            and "covered" in deployments.column_names):
        # no loaded log of the node overlaps the deployment: it awaits harvest
        waiting = ~deployments["covered"].to_numpy(zero_copy_only=False).astype(bool)
        logged.kind = np.where(waiting, "awaiting", logged.kind).astype(object)
    windows = logged
    if detect_unlogged and len(s.fx):
        inside = inside_any(s.fx, logged.code, raw_s, raw_e)
        station_en = np.column_stack([stations["easting"], stations["northing"]]).astype(float)
        unlogged = find_clusters(s.fx, s.kept & ~inside, station_en,
                                 (stations["line"], stations["point"], stations["index"]),
                                 crs_epsg, params["clusters"], unit_factor=unit)
        windows = Windows.concat([logged, unlogged])
    if extra is not None and len(extra):
        extra.code = node_codes(extra.node, s.fx)
        windows = Windows.concat([windows, extra])
    n = len(windows)
    return WindowSet(windows, np.concatenate([margins, np.zeros(n - len(margins), bool)]))


@dataclass
class Clouds:
    """The members of every window, in a local east/north plane around its median fix."""

    n_windows: int
    fix: np.ndarray  # fix index of each member
    window: np.ndarray  # window of each member (non-decreasing)
    kept: np.ndarray  # bool per member: passed screening
    lat0: np.ndarray  # per window: the plane's origin
    lon0: np.ndarray
    east: np.ndarray  # per member, metres in its window's plane
    north: np.ndarray
    t_us: np.ndarray  # per member

    @property
    def kept_fix(self) -> np.ndarray:
        """Fix index of each kept member."""
        return self.fix[self.kept]

    @property
    def kept_window(self) -> np.ndarray:
        """Window of each kept member."""
        return self.window[self.kept]


def gather_clouds(s: Screened, w: WindowSet, cap: int) -> Clouds:
    """Each window's fixes, and a local plane around the median of its kept fixes."""
    fx, n_win = s.fx, len(w.windows)
    fix, window = gather(fx, w.windows)
    kept = s.kept[fix]
    kfix, kwin = fix[kept], window[kept]
    lat0 = seg_median(fx.lat[kfix], kwin, n_win, cap)
    lon0 = seg_median(fx.lon[kfix], kwin, n_win, cap)
    if len(fix):  # windows without a kept fix: centre on all their fixes (for the cloud)
        lat0 = np.where(np.isfinite(lat0), lat0, seg_median(fx.lat[fix], window, n_win, cap))
        lon0 = np.where(np.isfinite(lon0), lon0, seg_median(fx.lon[fix], window, n_win, cap))
    lat0, lon0 = np.nan_to_num(lat0), np.nan_to_num(lon0)
    east, north = to_local_segments(fx.lat[fix], fx.lon[fix], lat0, lon0, window)
    return Clouds(n_win, fix, window, kept, lat0, lon0, east, north, fx.t_us[fix])


@dataclass
class Parts:
    """Position rows: one per window, two (before and after) for a window whose node moved."""

    moves: MoveResult
    moved: np.ndarray  # bool per window
    n_rows: int
    row_window: np.ndarray  # window of each row
    row_part: np.ndarray  # 0 whole window, 1 before the move, 2 after it
    member_row: np.ndarray  # row of each member
    member_part: np.ndarray  # int8 part of each member


def split_moves(c: Clouds, params: dict[str, Any]) -> Parts:
    """Test every window for a move; a moved window becomes two rows split at the move
    (``flags.move_method``: the scan of :mod:`changepoint`, or the hour blocks of
    :mod:`moves` of runs made before it)."""
    k = c.kept
    detect = scan_moves if setting(params, "flags", "move_method") == "scan" else detect_moves
    mv = detect(c.east[k], c.north[k], c.t_us[k], c.kept_window, c.n_windows, params["flags"])
    moved = mv.split_us >= 0
    n_parts = np.where(moved, 2, 1)
    first_row = np.concatenate([[0], np.cumsum(n_parts)[:-1]]).astype(np.int64)
    n_rows = int(n_parts.sum())
    row_window = np.repeat(np.arange(c.n_windows), n_parts)
    row_part = np.where(moved[row_window], np.arange(n_rows) - first_row[row_window] + 1, 0)
    later = moved[c.window] & (c.t_us >= mv.split_us[c.window])
    member_part = np.where(moved[c.window], np.where(later, 2, 1), 0).astype(np.int8)
    member_row = first_row[c.window] + later.astype(np.int64)
    return Parts(mv, moved, n_rows, row_window, row_part, member_row, member_part)


@dataclass
class Estimate:
    """The robust centre and its covariance (metres, east/north) per row."""

    robust: RobustResult
    kept_row: np.ndarray  # row of each kept member
    used: np.ndarray  # bool per kept member: not rejected as an outlier
    used_row: np.ndarray  # row of each used member
    t_s: np.ndarray  # per kept member: seconds from its row's first kept fix
    covariance: CentreCovariance | None  # None: pooled (noise holds what the model needs)
    vee: np.ndarray  # per row, with the floor (and the one-fix minimum of margin rows)
    vnn: np.ndarray
    ven: np.ndarray
    n_used: np.ndarray
    n_total: np.ndarray
    occupied: np.ndarray  # bool per row: at least one used fix
    median_hdop: np.ndarray
    single: np.ndarray  # per row: one fix's per-axis variance (σ₀·HDOP)², margin rows
    noise: RowNoise | None = None  # method "pooled": per-row inputs of the pooled model
    n_no_quality: np.ndarray | None = None  # used fixes without quality information


def estimate(s: Screened, c: Clouds, parts: Parts, from_margins: np.ndarray,
             params: dict[str, Any]) -> Estimate:
    """Robust centre per row on the kept fixes, then its honest covariance (batch means or
    AR(1)), the error floor, and a one-fix minimum for rows solved from margin fixes."""
    est, unc = params["estimate"], params["uncertainty"]
    cap = est["scale_sample"]
    kept_row = parts.member_row[c.kept]
    e, n = c.east[c.kept], c.north[c.kept]
    # fixes without quality information weigh as a typical fix of their own cloud
    unrated = s.fx.no_quality[c.kept_fix] if s.fx.no_quality is not None else None
    hdop = cloud_hdop(s.fx.hdop[c.kept_fix], unrated, kept_row, parts.n_rows, cap)
    rr = robust_centre([e, n], hdop, kept_row, parts.n_rows, estimator=est["estimator"],
                       huber_k=est["huber_k"], tukey_c=est["tukey_c"],
                       reject_quantile=est["reject_quantile"], iterations=est["iterations"],
                       scale_updates=est["scale_updates"], scale_sample=cap)
    ce, cn = rr.centre
    de, dn = e - ce[kept_row], n - cn[kept_row]
    # Times in seconds from each row's own first kept fix (integer microseconds first), so
    # batch boundaries and spans do not depend on which other nodes share the partition.
    t_kept = c.t_us[c.kept]
    row_t0 = np.full(parts.n_rows, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(row_t0, kept_row, t_kept)
    t_s = (t_kept - row_t0[kept_row]) / 1e6
    used = ~rr.rejected
    used_row = kept_row[used]
    n_used = np.bincount(used_row, minlength=parts.n_rows)
    n_total = np.bincount(parts.member_row, minlength=parts.n_rows)
    median_hdop = seg_median(np.nan_to_num(hdop[used], nan=1.0), used_row, parts.n_rows, cap)
    n_no_quality = (np.bincount(used_row, weights=unrated[used], minlength=parts.n_rows)
                    .astype(np.int64) if unrated is not None
                    else np.zeros(parts.n_rows, dtype=np.int64))
    row_margins = from_margins[parts.row_window]
    # Margin fixes span minutes, far less than the error correlation time: their mean is
    # no better than one fix, whose per-axis error is sigma0 * HDOP (the weight model).
    single = np.where(row_margins, (est["sigma0"] * np.where(np.isfinite(median_hdop),
                                                             median_hdop, 1.0)) ** 2, np.nan)
    floor2 = unc["floor"] ** 2
    if unc["method"] == "pooled":
        noise = row_noise(de[used], dn[used], hdop[used], rr.weight[used], t_s[used],
                          used_row, parts.n_rows)
        nan = np.full(parts.n_rows, np.nan)
        return Estimate(rr, kept_row, used, used_row, t_s, None, nan, nan.copy(), nan.copy(),
                        n_used, n_total, n_used > 0, median_hdop, single, noise,
                        n_no_quality=n_no_quality)
    if unc["method"] == "ar1":
        cov = ar1_covariance(de, dn, rr.weight, kept_row, parts.n_rows)
    else:
        cov = batch_covariance(de, dn, rr.weight, t_s, kept_row, parts.n_rows,
                               batch_s=unc["batch_hours"] * 3600,
                               min_batches=unc["min_batches"])
    vee, vnn, ven = cov.vee + floor2, cov.vnn + floor2, cov.ven
    if row_margins.any():
        vee = np.where(row_margins, np.maximum(vee, single + floor2), vee)
        vnn = np.where(row_margins, np.maximum(vnn, single + floor2), vnn)
    return Estimate(rr, kept_row, used, used_row, t_s, cov, vee, vnn, ven, n_used, n_total,
                    n_used > 0, median_hdop, single, n_no_quality=n_no_quality)


@dataclass
class GridPositions:
    """Each row's centre in WGS 84 and in the survey grid, with the grid covariance."""

    lat: np.ndarray
    lon: np.ndarray
    east: np.ndarray  # CRS units
    north: np.ndarray
    sigma_e: np.ndarray  # metres
    sigma_n: np.ndarray
    corr: np.ndarray
    ell_major: np.ndarray
    ell_minor: np.ndarray
    ell_bearing: np.ndarray
    r95: np.ndarray


def grid_covariance(lat: np.ndarray, lon: np.ndarray, e: np.ndarray, n: np.ndarray,
                    vee: np.ndarray, vnn: np.ndarray, ven: np.ndarray, epsg: int,
                    unit_factor: float = 1.0) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Rotate an east/north covariance into the grid (convergence) and scale it (k²).

    The covariance stays in metres whatever the CRS unit: the step north is measured in
    CRS units and turned into metres (``unit_factor``, metres per CRS unit) before it is
    divided by the ground distance, so k is the dimensionless point scale factor.
    """
    d = 1e-5
    xn, yn = transformer(WGS84_GEOGRAPHIC, epsg).transform(lon, lat + d)
    dx, dy = np.asarray(xn) - e, np.asarray(yn) - n
    m = 6335439.327 / (1 - 0.00669437999014 * np.sin(np.radians(lat)) ** 2) ** 1.5
    k = np.hypot(dx, dy) * unit_factor / (m * np.radians(d))
    beta = np.arctan2(dx, dy)
    cb, sb = np.cos(beta), np.sin(beta)
    # C' = k² R C Rᵀ with R = [[c, s], [-s, c]] acting on (east, north)
    gee = cb * cb * vee + 2 * cb * sb * ven + sb * sb * vnn
    gnn = sb * sb * vee - 2 * cb * sb * ven + cb * cb * vnn
    gen = -cb * sb * vee + (cb * cb - sb * sb) * ven + cb * sb * vnn
    k2 = np.where(np.isfinite(k), k * k, 1.0)
    return gee * k2, gnn * k2, gen * k2


def to_grid(c: Clouds, parts: Parts, est: Estimate, crs_epsg: int, unit: float
            ) -> GridPositions:
    """Local centres -> latitude/longitude -> survey grid (pyproj), covariance rotated by the
    grid convergence and scaled by the point scale factor; 95 % ellipse and radius."""
    ce, cn = est.robust.centre
    lat, lon = from_local(ce, cn, c.lat0[parts.row_window], c.lon0[parts.row_window])
    lat, lon = np.where(est.occupied, lat, np.nan), np.where(est.occupied, lon, np.nan)
    east, north = (np.asarray(a) for a in
                   transformer(WGS84_GEOGRAPHIC, crs_epsg).transform(lon, lat))
    if est.covariance is None:  # pooled: the covariance comes once the run is pooled
        nan = np.full(len(east), np.nan)
        return GridPositions(lat, lon, east, north, *(nan.copy() for _ in range(7)))
    return GridPositions(lat, lon, east, north,
                         *grid_uncertainty(lat, lon, east, north, est.vee, est.vnn, est.ven,
                                           crs_epsg, unit))


def grid_uncertainty(lat: np.ndarray, lon: np.ndarray, east: np.ndarray, north: np.ndarray,
                     vee: np.ndarray, vnn: np.ndarray, ven: np.ndarray, crs_epsg: int,
                     unit: float, expand: np.ndarray | float = 1.0
                     ) -> tuple[np.ndarray, ...]:
    """σE, σN, correlation, 95 % ellipse (semi-axes, bearing) and r95 in the grid from an
    east/north covariance; ellipse and radius of the covariance times ``expand`` (the
    coverage factor k² of :func:`archive.solve.noise.coverage_factor`, 1: normal)."""
    vee, vnn, ven = grid_covariance(lat, lon, east, north, vee, vnn, ven, crs_epsg, unit)
    sig_e, sig_n = np.sqrt(vee), np.sqrt(vnn)
    k2 = np.asarray(expand, dtype=float)
    major, minor, bearing = ellipse95(vee * k2, vnn * k2, ven * k2)
    return (sig_e, sig_n, ven / (sig_e * sig_n), major, minor, bearing,
            radius95(vee * k2, vnn * k2, ven * k2))


def span_and_spread(est: Estimate, n_rows: int) -> tuple[np.ndarray, np.ndarray]:
    """Per row: time span of the used fixes (s) and robust horizontal scale of the cloud (m)."""
    used_t = est.t_s[est.used]
    starts, counts = seg_starts(est.used_row, n_rows)
    span = np.zeros(n_rows)
    occ = est.occupied
    span[occ] = used_t[starts[occ] + counts[occ] - 1] - used_t[starts[occ]]
    return span, est.robust.scale * est.median_hdop
