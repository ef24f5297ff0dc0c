"""The solver proper: fixes + deployment log + preplot -> one position per deployment part.

A pure function of tables and parameters (no archive, no I/O), so a run can be recomputed
from its manifest and a partition of nodes can be solved in another process. The steps,
each vectorised over every cloud at once:

1. sort the fixes and screen them (:mod:`screen`);
2. windows from the log minus settle margins, plus unlogged stationary clusters
   (:mod:`windows`, :mod:`clusters`); gather each window's fixes;
3. a local east/north plane per window around the median fix (:mod:`segments`);
4. move detection; a moved window becomes two parts (:mod:`moves`);
5. robust centre per part (:mod:`robust`), uncertainty (:mod:`uncertainty`);
6. centre -> latitude/longitude -> survey grid with pyproj, covariance rotated by the grid
   convergence and scaled by the point scale factor;
   easting/northing are in the CRS unit (feet for a foot grid), while sigmas, ellipses,
   r95 and the preplot distances are in metres (CRS distances times the unit factor);
7. heights (:mod:`heights`) and review flags (:mod:`flags`).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from archive.solve import flags as flagmod
from archive.solve.clusters import find_clusters
from archive.solve.fixarrays import FixArrays, fix_arrays
from archive.solve.heights import Sampler, gga_orthometric, solve_heights
from archive.solve.moves import detect_moves
from archive.solve.robust import robust_centre
from archive.solve.schema import POSITION_SCHEMA, conform_positions
from archive.solve.screen import apply_excludes, cloud_hdop, screen_codes
from archive.solve.segments import from_local, seg_median, seg_starts, to_local
from archive.solve.uncertainty import ar1_covariance, batch_covariance, ellipse95, radius95
from archive.solve.windows import (
    FOREVER,
    Windows,
    gather,
    inside_any,
    logged_windows,
    node_codes,
)
from archive.survey.crs import WGS84_GEOGRAPHIC, survey_crs, transformer

Orthometric = Callable[[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray], np.ndarray]


@dataclass
class Members:
    """Every fix of every window: what became of it (for clouds and tracing)."""

    fix: np.ndarray  # index into the sorted fix arrays
    row: np.ndarray  # position row (after the final sort)
    part: np.ndarray
    screen: np.ndarray  # screening reason code (0 kept)
    rejected: np.ndarray  # chi-square outlier
    fx: FixArrays


@dataclass
class SolveOutput:
    """The positions table, optionally the members, and counts for the run summary."""

    positions: pa.Table
    members: Members | None = None
    stats: dict[str, Any] = field(default_factory=dict)


def _stations(stations: pa.Table) -> dict[str, np.ndarray]:
    kind = np.array(stations["kind"].to_pylist(), dtype=object) if stations.num_rows else \
        np.zeros(0, dtype=object)
    use = kind == "R" if (kind == "R").any() else np.ones(len(kind), dtype=bool)
    return {c: stations[c].to_numpy()[use] for c in ("line", "point", "index", "easting",
                                                     "northing")}


def _grid_covariance(lat: np.ndarray, lon: np.ndarray, e: np.ndarray, n: np.ndarray,
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
    c, s = np.cos(beta), np.sin(beta)
    # C' = k² R C Rᵀ with R = [[c, s], [-s, c]] acting on (east, north)
    gee = c * c * vee + 2 * c * s * ven + s * s * vnn
    gnn = s * s * vee - 2 * c * s * ven + c * c * vnn
    gen = -c * s * vee + (c * c - s * s) * ven + c * s * vnn
    k2 = np.where(np.isfinite(k), k * k, 1.0)
    return gee * k2, gnn * k2, gen * k2


def solve_fixes(fixes: pa.Table, deployments: pa.Table, stations: pa.Table,
                params: dict[str, Any], crs_epsg: int, *,
                excludes: list[tuple[str, int, int]] | None = None,
                sampler: Sampler | None = None, orthometric: Orthometric | None = None,
                detect_unlogged: bool = True, extra_windows: Windows | None = None,
                want_members: bool = False) -> SolveOutput:
    """Solve every deployment of ``deployments`` from ``fixes`` (see module doc).

    ``extra_windows`` adds windows given directly (an unlogged cluster's window, when one
    station's cloud is recomputed without searching the node tracks again).
    """
    p = params
    unit = survey_crs(crs_epsg).unit_factor  # metres per CRS unit (1 for metric grids)
    est = p["estimate"]
    cap = est["scale_sample"]
    fx = fix_arrays(fixes)
    code = screen_codes(fx.columns(), p["screen"])
    apply_excludes(code, fx.node_code, fx.t_us, fx.node_names, excludes or [])
    ok = code == 0
    st = _stations(stations)
    st_en = np.column_stack([st["easting"], st["northing"]]).astype(float)

    logged, raw_s, raw_e = logged_windows(deployments, fx, p["window"]["settle_start_min"] * 60,
                                          p["window"]["settle_end_min"] * 60)
    wins = logged
    if detect_unlogged and len(fx):
        inside = inside_any(fx, logged.code, raw_s, raw_e)
        unl = find_clusters(fx, ok & ~inside, st_en, (st["line"], st["point"], st["index"]),
                            crs_epsg, p["clusters"], unit_factor=unit)
        wins = Windows.concat([logged, unl])
    if extra_windows is not None and len(extra_windows):
        extra = extra_windows
        extra.code = node_codes(extra.node, fx)
        wins = Windows.concat([wins, extra])
    n_win = len(wins)
    idx, wseg = gather(fx, wins)
    m_ok = ok[idx]
    oi, os_ = idx[m_ok], wseg[m_ok]
    lat0 = seg_median(fx.lat[oi], os_, n_win, cap)
    lon0 = seg_median(fx.lon[oi], os_, n_win, cap)
    if len(idx):  # windows without a kept fix: centre on all their fixes (for the cloud)
        lat0 = np.where(np.isfinite(lat0), lat0, seg_median(fx.lat[idx], wseg, n_win, cap))
        lon0 = np.where(np.isfinite(lon0), lon0, seg_median(fx.lon[idx], wseg, n_win, cap))
    lat0, lon0 = np.nan_to_num(lat0), np.nan_to_num(lon0)
    e_all, n_all = to_local(fx.lat[idx], fx.lon[idx], lat0[wseg], lon0[wseg])
    t_all = fx.t_us[idx]

    # 4. moves -> parts -> position rows
    mv = detect_moves(e_all[m_ok], n_all[m_ok], t_all[m_ok], os_, n_win, p["flags"])
    moved_w = mv.split_us >= 0
    n_parts = np.where(moved_w, 2, 1)
    first_row = np.concatenate([[0], np.cumsum(n_parts)[:-1]]).astype(np.int64)
    n_rows = int(n_parts.sum())
    row_win = np.repeat(np.arange(n_win), n_parts)
    row_part = np.where(moved_w[row_win], np.arange(n_rows) - first_row[row_win] + 1, 0)
    later = moved_w[wseg] & (t_all >= mv.split_us[wseg])
    part = np.where(moved_w[wseg], np.where(later, 2, 1), 0).astype(np.int8)
    mrow = first_row[wseg] + later.astype(np.int64)

    # 5. robust centre and uncertainty per row, on the kept fixes
    rseg = mrow[m_ok]
    eo, no = e_all[m_ok], n_all[m_ok]
    unrated = fx.no_quality[oi] if fx.no_quality is not None else None
    hd_w = cloud_hdop(fx.hdop[oi], unrated, rseg, n_rows, cap)
    rr = robust_centre([eo, no], hd_w, rseg, n_rows, estimator=est["estimator"],
                       huber_k=est["huber_k"], tukey_c=est["tukey_c"],
                       reject_quantile=est["reject_quantile"], iterations=est["iterations"],
                       scale_updates=est["scale_updates"], scale_sample=cap)
    ce, cn = rr.centre
    de, dn = eo - ce[rseg], no - cn[rseg]
    # Times in seconds from each row's own first kept fix (integer microseconds first), so
    # batch boundaries and spans do not depend on which other nodes share the partition.
    t_ok = t_all[m_ok]
    row_t0 = np.full(n_rows, np.iinfo(np.int64).max, dtype=np.int64)
    np.minimum.at(row_t0, rseg, t_ok)
    t_s = (t_ok - row_t0[rseg]) / 1e6
    unc = p["uncertainty"]
    if unc["method"] == "ar1":
        cov = ar1_covariance(de, dn, rr.weight, rseg, n_rows)
    else:
        cov = batch_covariance(de, dn, rr.weight, t_s, rseg, n_rows,
                               batch_s=unc["batch_hours"] * 3600,
                               min_batches=unc["min_batches"])
    used = ~rr.rejected
    n_used = np.bincount(rseg[used], minlength=n_rows)
    n_total = np.bincount(mrow, minlength=n_rows)
    occupied = n_used > 0
    floor2 = unc["floor"] ** 2
    vee, vnn, ven = cov.vee + floor2, cov.vnn + floor2, cov.ven

    # 6. to geographic and grid
    lat_c, lon_c = from_local(ce, cn, lat0[row_win], lon0[row_win])
    lat_c, lon_c = np.where(occupied, lat_c, np.nan), np.where(occupied, lon_c, np.nan)
    east, north = (np.asarray(a) for a in
                   transformer(WGS84_GEOGRAPHIC, crs_epsg).transform(lon_c, lat_c))
    vee, vnn, ven = _grid_covariance(lat_c, lon_c, east, north, vee, vnn, ven, crs_epsg,
                                     unit)
    sig_e, sig_n = np.sqrt(vee), np.sqrt(vnn)
    corr = ven / (sig_e * sig_n)
    major, minor, bearing = ellipse95(vee, vnn, ven)
    r95 = radius95(vee, vnn, ven)

    # span and spread of the used fixes
    us_seg, us_t = rseg[used], t_s[used]
    starts, counts = seg_starts(us_seg, n_rows)
    span = np.zeros(n_rows)
    span[occupied] = us_t[starts[occupied] + counts[occupied] - 1] - us_t[starts[occupied]]
    med_hdop = seg_median(np.nan_to_num(hd_w[used], nan=1.0), us_seg, n_rows, cap)
    n_unrated = np.bincount(us_seg, weights=unrated[used], minlength=n_rows).astype(np.int64) \
        if unrated is not None else np.zeros(n_rows, dtype=np.int64)
    spread = rr.scale * med_hdop

    # 7. heights
    hu = oi[used]
    h_fix = gga_orthometric(fx.h_ell[hu], fx.h_msl[hu], fx.geoid_sep[hu])

    def med(values: np.ndarray) -> np.ndarray:
        fin = np.isfinite(values)
        return seg_median(values[fin], us_seg[fin], n_rows, cap)

    h_ell_m, h_msl_m, sep_m = med(fx.h_ell[hu]), med(fx.h_msl[hu]), med(fx.geoid_sep[hu])
    if orthometric is not None:
        h_gnss = np.asarray(orthometric(lon_c, lat_c, h_ell_m, h_msl_m, sep_m), dtype=float)
    else:
        h_gnss = gga_orthometric(h_ell_m, h_msl_m, sep_m)
    fin_h = np.isfinite(h_fix)
    h_res = h_fix[fin_h] - med(h_fix)[us_seg[fin_h]]
    hcov = batch_covariance(h_res, np.zeros(len(h_res)), np.ones(len(h_res)), us_t[fin_h],
                            us_seg[fin_h], n_rows, batch_s=unc["batch_hours"] * 3600,
                            min_batches=unc["min_batches"])
    hts = solve_heights(east, north, sig_e, sig_n, h_gnss, np.sqrt(hcov.vee), sampler,
                        p["height"])

    # flags
    rl, rp, ri = wins.line[row_win], wins.point[row_win], wins.index[row_win]
    own_key, st_key = flagmod.station_keys((rl, rp, ri), (st["line"], st["point"], st["index"]))
    pre = flagmod.preplot_checks(east, north, own_key, st_key, st["easting"], st["northing"],
                                 st["line"], st["point"], unit_factor=unit)
    kind = wins.kind[row_win]
    cols = {"n_used": n_used, "span_s": span, "unit_scale": np.where(occupied, rr.scale, 0.0),
            "moved": moved_w[row_win], "dist_preplot": pre["dist_preplot"],
            "dist_nearest": pre["dist_nearest"], "dh": hts.dh, "off_model": hts.off_model,
            "kind": kind, "n_no_quality": n_unrated}
    flag_col = flagmod.flag_strings(cols, p)

    t_start = wins.start[row_win].copy()
    t_end = wins.end[row_win].copy()
    split = mv.split_us[row_win]
    t_end = np.where(row_part == 1, split - 1, t_end)
    t_start = np.where(row_part == 2, split, t_start)
    nan_if_empty = {"easting": east, "northing": north}
    data = {
        "line": rl, "point": rp, "index": ri, "node": wins.node[row_win], "kind": kind,
        "part": row_part.astype(np.int8),
        "delivered": (kind == "logged") & (row_part == np.where(moved_w[row_win], 2, 0)),
        "t_start": t_start, "t_end": t_end,
        **nan_if_empty, "lat": lat_c, "lon": lon_c,
        "height": hts.height, "height_source": hts.source, "h_gnss": hts.h_gnss,
        "h_model": hts.h_model, "dh": hts.dh,
        "sigma_e": sig_e, "sigma_n": sig_n, "corr_en": corr, "ell_major": major,
        "ell_minor": minor, "ell_bearing": bearing, "r95": r95, "sigma_h": hts.sigma,
        "n_total": n_total, "n_used": n_used, "n_rejected": n_total - n_used,
        "n_eff": cov.n_eff, "span_s": span, "spread": spread, **pre,
        "estimator": np.full(n_rows, est["estimator"], dtype=object), "flags": flag_col,
        "n_no_quality": n_unrated,
    }
    for key in ("sigma_e", "sigma_n", "corr_en", "ell_major", "ell_minor", "ell_bearing",
                "r95", "n_eff", "spread", "span_s", "h_gnss", "dh"):
        data[key] = np.where(occupied, data[key], np.nan)
    order = np.lexsort((row_part, t_start, data["node"].astype(str), ri, rp, rl,
                        (kind == "unlogged").astype(np.int8)))
    positions = conform_positions(_table({k: v[order] for k, v in data.items()}), p)
    stats = {"n_fixes": len(fx), "n_duplicates": fx.n_duplicates, "n_windows": n_win,
             "n_unlogged": int((wins.kind == "unlogged").sum()),
             "n_kept": int(ok.sum()), "n_in_windows": len(idx)}
    members = None
    if want_members:
        rank = np.empty(n_rows, dtype=np.int64)
        rank[order] = np.arange(n_rows)
        rej = np.zeros(len(idx), dtype=bool)
        rej[np.flatnonzero(m_ok)] = rr.rejected
        members = Members(fix=idx, row=rank[mrow], part=part, screen=code[idx], rejected=rej,
                          fx=fx)
    return SolveOutput(positions=positions, members=members, stats=stats)


def _table(data: dict[str, np.ndarray]) -> pa.Table:
    arrays = []
    for f in POSITION_SCHEMA:
        v = data[f.name]
        if pa.types.is_timestamp(f.type):
            v = np.where(v >= FOREVER, np.iinfo(np.int64).min, v)
            arr = pa.array(v.astype(np.int64), type=pa.int64(),
                           mask=v == np.iinfo(np.int64).min).cast(f.type)
        elif pa.types.is_floating(f.type):
            arr = pa.array(np.asarray(v, dtype=np.float64), type=f.type, from_pandas=True)
        elif pa.types.is_string(f.type):
            arr = pa.array([str(x) for x in v], type=f.type)
        else:
            arr = pa.array(np.asarray(v), type=f.type)
        arrays.append(arr)
    return pa.Table.from_arrays(arrays, schema=POSITION_SCHEMA)
