"""The solver proper: fixes + deployment log + preplot -> one position per deployment part.

A pure function of tables and parameters (no archive, no I/O), so a run can be recomputed
from its manifest and a partition of nodes can be solved in another process. The steps,
each vectorised over every cloud at once (the stages of :mod:`stages`, named below):

1. ``screen``: sort the fixes and screen them (:mod:`screen`);
2. ``find_windows``, ``gather_clouds``: windows from the log minus settle margins (the whole logged window when the settled one
   holds no usable fix: a node that died just after lay-out), plus unlogged stationary
   clusters (:mod:`windows`, :mod:`clusters`); gather each window's fixes;
   a local east/north plane per window around the median fix (:mod:`segments`);
3. ``split_moves``: move detection; a moved window becomes two parts (:mod:`moves`);
4. ``estimate``: robust centre per part (:mod:`robust`), uncertainty (:mod:`uncertainty`);
5. ``to_grid``: centre -> latitude/longitude -> survey grid with pyproj, covariance rotated by the grid
   convergence and scaled by the point scale factor;
   easting/northing are in the CRS unit (feet for a foot grid), while sigmas, ellipses,
   r95 and the preplot distances are in metres (CRS distances times the unit factor);
6. heights (:mod:`heights`), review flags (:mod:`flags`) and the positions table.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pyarrow as pa

from archive.edits.spans import Span
from archive.solve import flags as flagmod
from archive.solve import stages
from archive.solve.fixarrays import FixArrays
from archive.solve.heights import Heights, Sampler, solve_heights
from archive.solve.params import setting
from archive.solve.parts import later_part_index, used_indices
from archive.solve.pooled import finish as finish_pooled
from archive.solve.pooled import work_arrays, work_columns
from archive.solve.schema import POSITION_SCHEMA, conform_positions
from archive.solve.segments import seg_median, seg_starts
from archive.solve.uncertainty import batch_covariance
from archive.solve.windows import FOREVER, Windows
from archive.survey.crs import survey_crs
from archive.survey.heights import gga_orthometric

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


def solve_fixes(fixes: pa.Table | FixArrays, deployments: pa.Table, stations: pa.Table,
                params: dict[str, Any], crs_epsg: int, *,
                excludes: list[Span] | None = None,
                sampler: Sampler | None = None, orthometric: Orthometric | None = None,
                detect_unlogged: bool = True, extra_windows: Windows | None = None,
                want_members: bool = False, used: pa.Table | None = None,
                finish: bool = True) -> SolveOutput:
    """Solve every deployment of ``deployments`` from ``fixes`` (see module doc): a fix
    table, or its arrays (:func:`archive.solve.fixarrays.fix_arrays`) so the table itself
    need not stay in memory.

    ``excludes`` are the exclude spans in force (:mod:`archive.edits.spans`);
    ``extra_windows`` adds windows given directly (an unlogged cluster's window, when one
    station's cloud is recomputed without searching the node tracks again). ``used`` holds
    the point indices in use at each line and point over the whole survey
    (:func:`archive.solve.parts.used_indices`; by default those of ``deployments`` and
    ``stations``), from which the later part of a moved node takes its own. With the
    pooled uncertainty and ``finish`` false, the table keeps the working columns of
    :mod:`archive.solve.pooled` for the caller to finish with the rest of its run.
    """
    unit = survey_crs(crs_epsg).unit_factor  # metres per CRS unit (1 for metric grids)
    st = _stations(stations)
    screened = stages.screen(fixes, params, excludes or [])
    found = stages.find_windows(screened, deployments, st, params, crs_epsg, unit,
                                detect_unlogged=detect_unlogged, extra=extra_windows)
    clouds = stages.gather_clouds(screened, found, params["estimate"]["scale_sample"])
    parts = stages.split_moves(clouds, params)
    est = stages.estimate(screened, clouds, parts, found.from_margins, params)
    grid = stages.to_grid(clouds, parts, est, crs_epsg, unit)
    span, spread = stages.span_and_spread(est, parts.n_rows)
    hts = _heights(screened, clouds, parts, est, grid, params, sampler, orthometric)
    if used is None:
        used = used_indices(deployments, stations)
    rows = _rows(found, parts, st, grid, est, hts, span, spread, params, unit, clouds, used)
    order = np.lexsort((rows["part"], rows["t_start"], rows["node"].astype(str),
                        rows["index"], rows["point"], rows["line"],
                        (rows["kind"] == "unlogged").astype(np.int8)))
    work = None
    if est.noise is not None:
        work = {k: v[order] for k, v in work_columns(est, hts.slope_e, hts.slope_n).items()}
    positions = conform_positions(_table({k: v[order] for k, v in rows.items()}, work), params)
    if work is not None and finish:
        positions, _ = finish_pooled(positions, params, crs_epsg)
    w = found.windows
    stats = {"n_fixes": len(screened.fx), "n_duplicates": screened.fx.n_duplicates,
             "n_windows": len(w), "n_unlogged": int((w.kind == "unlogged").sum()),
             "n_kept": int(screened.kept.sum()), "n_in_windows": len(clouds.fix)}
    members = _members(screened, clouds, parts, est, order) if want_members else None
    return SolveOutput(positions=positions, members=members, stats=stats)


def warm_up() -> None:
    """Load the compiled kernels from their on-disk cache (numba's first call of each):
    called on a thread of its own while a solve reads its first fixes, so loading them
    overlaps reading instead of following it. Solves nothing and returns nothing."""
    from archive.solve.noise import row_noise
    from archive.solve.robust import robust_centre

    x = np.array([0.0, 1.0, 2.0])
    seg = np.zeros(3, dtype=np.int64)
    seg_median(x, seg, 1, 64)
    robust_centre([x, x], np.ones(3), seg, 1)
    row_noise(x, x, np.ones(3), np.ones(3), x, seg, 1)
    batch_covariance(x, x, np.ones(3), x, seg, 1, batch_s=3600.0, min_batches=2)


def _heights(s: stages.Screened, c: stages.Clouds, parts: stages.Parts,
             est: stages.Estimate, grid: stages.GridPositions, params: dict[str, Any],
             sampler: Sampler | None, orthometric: Orthometric | None) -> Heights:
    """The GNSS orthometric height of each row (medians of the used fixes) with its batch
    uncertainty, then the delivered height from the elevation model (:mod:`heights`)."""
    fx, n_rows, used_row = s.fx, parts.n_rows, est.used_row
    cap = params["estimate"]["scale_sample"]
    unc = params["uncertainty"]
    hu = c.kept_fix[est.used]
    h_fix = gga_orthometric(fx.h_ell[hu], fx.h_msl[hu], fx.geoid_sep[hu])

    def med(values: np.ndarray) -> np.ndarray:
        fin = np.isfinite(values)
        return seg_median(values[fin], used_row[fin], n_rows, cap)

    h_ell_m, h_msl_m, sep_m = med(fx.h_ell[hu]), med(fx.h_msl[hu]), med(fx.geoid_sep[hu])
    if orthometric is not None:
        h_gnss = np.asarray(orthometric(grid.lon, grid.lat, h_ell_m, h_msl_m, sep_m),
                            dtype=float)
    else:
        h_gnss = gga_orthometric(h_ell_m, h_msl_m, sep_m)
    fin = np.isfinite(h_fix)
    residual = h_fix[fin] - med(h_fix)[used_row[fin]]
    hcov = batch_covariance(residual, np.zeros(len(residual)), np.ones(len(residual)),
                            est.t_s[est.used][fin], used_row[fin], n_rows,
                            batch_s=unc["batch_hours"] * 3600, min_batches=unc["min_batches"])
    return solve_heights(grid.east, grid.north, grid.sigma_e, grid.sigma_n, h_gnss,
                         np.sqrt(hcov.vee), sampler, params["height"])


def _allowed(c: stages.Clouds, parts: stages.Parts, t_start: np.ndarray, t_end: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
    """Per row: the seconds of logging its window allows (to its end, or to the node's last
    fix while it is still out) and the fixes that allows at the node's logging interval
    (median step between its fixes)."""
    n = parts.n_rows
    starts, counts = seg_starts(parts.member_row, n)
    last = np.where(counts > 0, c.t_us[np.maximum(starts + counts - 1, 0)] if len(c.t_us)
                    else 0, t_start)
    end = np.where(t_end >= FOREVER, last, t_end)
    allowed = np.maximum(end - t_start, 0) / 1e6
    same = np.r_[False, parts.member_row[1:] == parts.member_row[:-1]]
    step = np.diff(c.t_us, prepend=c.t_us[:1]) / 1e6
    idx = np.flatnonzero(same)
    interval = seg_median(step[idx], parts.member_row[idx], n, 2048)
    return allowed, allowed / interval


def _delivery(found: stages.WindowSet, parts: stages.Parts, params: dict[str, Any],
              used: pa.Table) -> dict[str, np.ndarray]:
    """Which rows are delivered, under which point index, for which time (µs, FOREVER for
    none): every part of a moved node on its own (``move_deliver = "each"``), or only its
    last part, for the whole stay."""
    w, rw, part = found.windows, parts.row_window, parts.row_part
    logged = w.kind[rw] == "logged"
    each = setting(params, "flags", "move_deliver") == "each"
    delivered = logged if each else logged & (part == np.where(parts.moved[rw], 2, 0))
    occ = w.occupation[rw].astype(np.int64)
    index = occ.copy()
    later = logged & (part == 2) & each
    if later.any():
        index[later] = later_part_index(w.line[rw][later], w.point[rw][later], occ[later], used)
    split = parts.moves.split_us[rw]
    dep, ret = w.deployed[rw], w.retrieved[rw]
    held_from = np.where(later, split, dep)
    held_to = np.where(logged & (part == 1) & each, split, ret)
    return {"delivered": delivered, "point_index": np.where(delivered, index, 0),
            "held_from": np.where(delivered, held_from, FOREVER),
            "held_to": np.where(delivered, held_to, FOREVER)}


def _rows(found: stages.WindowSet, parts: stages.Parts, st: dict[str, np.ndarray],
          grid: stages.GridPositions, est: stages.Estimate, hts: Heights, span: np.ndarray,
          spread: np.ndarray, params: dict[str, Any], unit: float, c: stages.Clouds,
          used: pa.Table) -> dict[str, np.ndarray]:
    """The columns of the positions table, one element per row (before sorting): station
    and occupation, window of the part, position and uncertainty, heights, counts, preplot
    checks and review flags."""
    w, rw, part = found.windows, parts.row_window, parts.row_part
    line, point, index = w.line[rw], w.point[rw], w.index[rw]
    own_key, st_key = flagmod.station_keys((line, point, index),
                                           (st["line"], st["point"], st["index"]))
    pre = flagmod.preplot_checks(grid.east, grid.north, own_key, st_key, st["easting"],
                                 st["northing"], st["line"], st["point"], unit_factor=unit)
    kind = w.kind[rw]
    occupied = est.occupied
    split = parts.moves.split_us[rw]
    t_start = np.where(part == 2, split, w.start[rw])
    t_end = np.where(part == 1, split - 1, w.end[rw])
    allowed, expected = _allowed(c, parts, t_start, t_end)
    flags = flagmod.flag_strings(
        {"n_used": est.n_used, "span_s": span, "allowed_s": allowed, "expected": expected,
         "unit_scale": np.where(occupied, est.robust.scale, 0.0), "moved": parts.moved[rw],
         "dist_preplot": pre["dist_preplot"], "dist_nearest": pre["dist_nearest"],
         "dh": hts.dh, "dh_sigma": np.hypot(hts.sigma_gnss, params["height"]["model_sigma"]),
         "off_model": hts.off_model, "kind": kind, "n_no_quality": est.n_no_quality}, params)
    cols = {
        "line": line, "point": point, "index": index, "node": w.node[rw], "kind": kind,
        "part": part.astype(np.int8), **_delivery(found, parts, params, used),
        "t_start": t_start, "t_end": t_end,
        "easting": grid.east, "northing": grid.north, "lat": grid.lat, "lon": grid.lon,
        "height": hts.height, "height_source": hts.source, "h_gnss": hts.h_gnss,
        "h_model": hts.h_model, "dh": hts.dh,
        "sigma_e": grid.sigma_e, "sigma_n": grid.sigma_n, "corr_en": grid.corr,
        "ell_major": grid.ell_major, "ell_minor": grid.ell_minor,
        "ell_bearing": grid.ell_bearing, "r95": grid.r95, "sigma_h": hts.sigma,
        "n_total": est.n_total, "n_used": est.n_used, "n_rejected": est.n_total - est.n_used,
        "n_eff": (est.covariance.n_eff if est.covariance is not None
                  else np.full(parts.n_rows, np.nan)), "span_s": span, "spread": spread, **pre,
        "estimator": np.full(parts.n_rows, params["estimate"]["estimator"], dtype=object),
        "flags": flags,
        "occupation": np.where(kind != "unlogged", w.occupation[rw], 0),
        "deployed": w.deployed[rw], "retrieved": w.retrieved[rw],
        "from_margins": found.from_margins[rw],
        "dof": np.full(parts.n_rows, np.nan),  # the normal quantile (batch, ar1)
        "n_no_quality": est.n_no_quality,
    }
    for key in ("sigma_e", "sigma_n", "corr_en", "ell_major", "ell_minor", "ell_bearing",
                "r95", "n_eff", "spread", "span_s", "h_gnss", "dh"):
        cols[key] = np.where(occupied, cols[key], np.nan)
    return cols


def _members(s: stages.Screened, c: stages.Clouds, parts: stages.Parts,
             est: stages.Estimate, order: np.ndarray) -> Members:
    """What became of every member, with rows numbered as in the sorted table."""
    rank = np.empty(parts.n_rows, dtype=np.int64)
    rank[order] = np.arange(parts.n_rows)
    rejected = np.zeros(len(c.fix), dtype=bool)
    rejected[np.flatnonzero(c.kept)] = est.robust.rejected
    return Members(fix=c.fix, row=rank[parts.member_row], part=parts.member_part,
                   screen=s.code[c.fix], rejected=rejected, fx=s.fx)


def _table(data: dict[str, np.ndarray], work: dict[str, np.ndarray] | None = None
           ) -> pa.Table:
    arrays = []
    for f in POSITION_SCHEMA:
        v = data[f.name]
        if pa.types.is_timestamp(f.type):
            v = np.where(v >= FOREVER, np.iinfo(np.int64).min, v)
            arr = pa.array(v.astype(np.int64), type=pa.int64(),
                           mask=v == np.iinfo(np.int64).min).cast(f.type)
        elif f.name in ("occupation", "point_index"):
            arr = pa.array(np.asarray(v, dtype=np.int8), type=f.type, mask=np.asarray(v) == 0)
        elif pa.types.is_floating(f.type):
            arr = pa.array(np.asarray(v, dtype=np.float64), type=f.type, from_pandas=True)
        elif pa.types.is_string(f.type):
            arr = pa.array([str(x) for x in v], type=f.type)
        else:
            arr = pa.array(np.asarray(v), type=f.type)
        arrays.append(arr)
    table = pa.Table.from_arrays(arrays, schema=POSITION_SCHEMA)
    for name, arr in work_arrays(work) if work is not None else []:
        table = table.append_column(name, arr)
    return table
