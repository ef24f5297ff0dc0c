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
from archive.solve.schema import POSITION_SCHEMA, conform_positions
from archive.solve.segments import seg_median
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


def solve_fixes(fixes: pa.Table, deployments: pa.Table, stations: pa.Table,
                params: dict[str, Any], crs_epsg: int, *,
                excludes: list[Span] | None = None,
                sampler: Sampler | None = None, orthometric: Orthometric | None = None,
                detect_unlogged: bool = True, extra_windows: Windows | None = None,
                want_members: bool = False) -> SolveOutput:
    """Solve every deployment of ``deployments`` from ``fixes`` (see module doc).

    ``excludes`` are the exclude spans in force (:mod:`archive.edits.spans`);
    ``extra_windows`` adds windows given directly (an unlogged cluster's window, when one
    station's cloud is recomputed without searching the node tracks again).
    """
    unit = survey_crs(crs_epsg).unit_factor  # metres per CRS unit (1 for metric grids)
    st = _stations(stations)
    screened = stages.screen(fixes, params, excludes or [])
    found = stages.find_windows(screened, deployments, st, params, crs_epsg, unit,
                                detect_unlogged=detect_unlogged, extra=extra_windows)
    clouds = stages.gather_clouds(screened, found, params["estimate"]["scale_sample"])
    parts = stages.split_moves(clouds, params["flags"])
    est = stages.estimate(screened, clouds, parts, found.from_margins, params)
    grid = stages.to_grid(clouds, parts, est, crs_epsg, unit)
    span, spread = stages.span_and_spread(est, parts.n_rows)
    hts = _heights(screened, clouds, parts, est, grid, params, sampler, orthometric)
    rows = _rows(found, parts, st, grid, est, hts, span, spread, params, unit)
    order = np.lexsort((rows["part"], rows["t_start"], rows["node"].astype(str),
                        rows["index"], rows["point"], rows["line"],
                        (rows["kind"] == "unlogged").astype(np.int8)))
    positions = conform_positions(_table({k: v[order] for k, v in rows.items()}), params)
    w = found.windows
    stats = {"n_fixes": len(screened.fx), "n_duplicates": screened.fx.n_duplicates,
             "n_windows": len(w), "n_unlogged": int((w.kind == "unlogged").sum()),
             "n_kept": int(screened.kept.sum()), "n_in_windows": len(clouds.fix)}
    members = _members(screened, clouds, parts, est, order) if want_members else None
    return SolveOutput(positions=positions, members=members, stats=stats)


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


def _rows(found: stages.WindowSet, parts: stages.Parts, st: dict[str, np.ndarray],
          grid: stages.GridPositions, est: stages.Estimate, hts: Heights, span: np.ndarray,
          spread: np.ndarray, params: dict[str, Any], unit: float) -> dict[str, np.ndarray]:
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
    flags = flagmod.flag_strings(
        {"n_used": est.n_used, "span_s": span,
         "unit_scale": np.where(occupied, est.robust.scale, 0.0), "moved": parts.moved[rw],
         "dist_preplot": pre["dist_preplot"], "dist_nearest": pre["dist_nearest"],
         "dh": hts.dh, "off_model": hts.off_model, "kind": kind,
         "n_no_quality": est.n_no_quality}, params)
    split = parts.moves.split_us[rw]
    t_start = np.where(part == 2, split, w.start[rw])
    t_end = np.where(part == 1, split - 1, w.end[rw])
    cols = {
        "line": line, "point": point, "index": index, "node": w.node[rw], "kind": kind,
        "part": part.astype(np.int8),
        "delivered": (kind == "logged") & (part == np.where(parts.moved[rw], 2, 0)),
        "t_start": t_start, "t_end": t_end,
        "easting": grid.east, "northing": grid.north, "lat": grid.lat, "lon": grid.lon,
        "height": hts.height, "height_source": hts.source, "h_gnss": hts.h_gnss,
        "h_model": hts.h_model, "dh": hts.dh,
        "sigma_e": grid.sigma_e, "sigma_n": grid.sigma_n, "corr_en": grid.corr,
        "ell_major": grid.ell_major, "ell_minor": grid.ell_minor,
        "ell_bearing": grid.ell_bearing, "r95": grid.r95, "sigma_h": hts.sigma,
        "n_total": est.n_total, "n_used": est.n_used, "n_rejected": est.n_total - est.n_used,
        "n_eff": est.covariance.n_eff, "span_s": span, "spread": spread, **pre,
        "estimator": np.full(parts.n_rows, params["estimate"]["estimator"], dtype=object),
        "flags": flags,
        "occupation": np.where(kind == "logged", w.occupation[rw], 0),
        "deployed": w.deployed[rw], "retrieved": w.retrieved[rw],
        "from_margins": found.from_margins[rw],
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


def _table(data: dict[str, np.ndarray]) -> pa.Table:
    arrays = []
    for f in POSITION_SCHEMA:
        v = data[f.name]
        if pa.types.is_timestamp(f.type):
            v = np.where(v >= FOREVER, np.iinfo(np.int64).min, v)
            arr = pa.array(v.astype(np.int64), type=pa.int64(),
                           mask=v == np.iinfo(np.int64).min).cast(f.type)
        elif f.name == "occupation":
            arr = pa.array(np.asarray(v, dtype=np.int8), type=f.type, mask=np.asarray(v) == 0)
        elif pa.types.is_floating(f.type):
            arr = pa.array(np.asarray(v, dtype=np.float64), type=f.type, from_pandas=True)
        elif pa.types.is_string(f.type):
            arr = pa.array([str(x) for x in v], type=f.type)
        else:
            arr = pa.array(np.asarray(v), type=f.type)
        arrays.append(arr)
    return pa.Table.from_arrays(arrays, schema=POSITION_SCHEMA)
