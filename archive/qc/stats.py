"""Differences to RTK check points, for the solved positions and for the preplot.

Pure functions over Arrow tables (positions of :data:`archive.solve.schema.POSITION_SCHEMA`,
check points of :data:`archive.survey.schema.CONTROL_SCHEMA`, stations of
:data:`archive.survey.schema.STATION_SCHEMA`). Stations are matched by (line, point, index); a station occupied more than once is compared
through the occupation that was in the ground when the check point was surveyed (else the
nearest in time; a check point without a survey time checks the last occupation).

Sign convention: every difference is *position minus check point* (dE = E - E_check), so a
positive dE means the position lies east of the check point. The preplot columns compare
the planned station coordinates with the same check points: what stake-out at the planned
position would have delivered. Both are computed on the same stations, so the two columns
of the summary are a paired comparison.

Percentiles use numpy's default ("linear", definition 7 of Hyndman & Fan 1996,
*Sample quantiles in statistical packages*, The American Statistician 50(4)).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from archive.qc.accuracy import Accuracy, accuracy_from_errors

KEY = ["line", "point", "index"]

POINT_SCHEMA = pa.schema([
    pa.field("line", pa.float64()), pa.field("point", pa.float64()), pa.field("index", pa.int8()),
    pa.field("occupation", pa.int8()), pa.field("node", pa.string()),
    pa.field("easting", pa.float64()), pa.field("northing", pa.float64()),
    pa.field("height", pa.float64()),
    pa.field("check_e", pa.float64()), pa.field("check_n", pa.float64()),
    pa.field("check_h", pa.float64()),
    pa.field("preplot_e", pa.float64()), pa.field("preplot_n", pa.float64()),
    pa.field("preplot_h", pa.float64()),
    pa.field("de", pa.float64()), pa.field("dn", pa.float64()), pa.field("dh", pa.float64()),
    pa.field("dist", pa.float64()),
    pa.field("pre_de", pa.float64()), pa.field("pre_dn", pa.float64()),
    pa.field("pre_dh", pa.float64()), pa.field("pre_dist", pa.float64()),
    pa.field("r95", pa.float64()), pa.field("flags", pa.string()),
])
"""One row per station with a delivered position and a check point."""


def delivered(positions: pa.Table) -> pa.Table:
    """The delivered row of each station (``delivered`` true, with a horizontal position)."""
    mask = pc.and_(
        pc.fill_null(positions["delivered"], False),
        pc.is_valid(positions["easting"]),
    )
    return positions.filter(mask)


def _nearest_occupation(df: pd.DataFrame) -> pd.DataFrame:
    """One row per check point: the occupation in the ground when it was surveyed, else the
    one nearest in time, else (no survey time) the last occupation of the station."""
    big = np.iinfo(np.int64).max
    t = df["surveyed"]
    has_t = t.notna().to_numpy()
    tt = np.where(has_t, _us(t), 0)
    d0 = np.where(df["deployed"].notna(), _us(df["deployed"]), -big)
    d1 = np.where(df["retrieved"].notna(), _us(df["retrieved"]), big)
    gap = np.where(tt < d0, d0 - tt, np.where(tt >= d1, tt - d1 + 1, 0)).astype(float)
    order = -np.where(df["deployed"].notna(), _us(df["deployed"]), 0).astype(float)
    df = df.assign(_gap=np.where(has_t, gap, order))
    return df.sort_values(["_chk", "_gap"], kind="stable").drop_duplicates("_chk", keep="first")


def _us(col: pd.Series) -> np.ndarray:
    """UTC times as integer microseconds since 1970 (NaT as 0), whatever the resolution."""
    t = pd.to_datetime(col, utc=True).fillna(pd.Timestamp(0, tz="UTC"))
    return ((t - pd.Timestamp(0, tz="UTC")) // pd.Timedelta(microseconds=1)).to_numpy(
        dtype=np.int64)


def join_checks(positions: pa.Table, control: pa.Table,
                stations: pa.Table | None = None) -> pa.Table:
    """Per occupation with a delivered position and a check point: the differences.

    Each check point is tied to the occupation in the ground when it was surveyed (else the
    nearest in time; without a survey time, the last occupation), and an occupation
    surveyed more than once keeps its latest check.

    The preplot comes from the positions table (``preplot_e``/``preplot_n``), or from
    ``stations`` when the positions carry none; the preplot height from ``stations``'
    elevation when given. Returns a table of :data:`POINT_SCHEMA`, sorted by station.
    """
    dl = delivered(positions)
    cols = [*KEY, "node", "easting", "northing", "height", "preplot_e", "preplot_n", "r95",
            "flags"]
    pos = dl.select(cols).to_pandas()
    for c in ("occupation", "deployed", "retrieved"):
        pos[c] = dl[c].to_pandas() if c in dl.column_names else None
    pos["occupation"] = pos["occupation"].fillna(pos["index"])
    chk = control.select([*KEY, "easting", "northing", "height", "surveyed", "src_line"]) \
        .to_pandas().rename(columns={"easting": "check_e", "northing": "check_n",
                                     "height": "check_h"})
    chk["_chk"] = np.arange(len(chk))
    df = pos.merge(chk[[*KEY, "check_e", "check_n", "check_h", "surveyed", "src_line",
                        "_chk"]], on=KEY, how="inner")
    # each check point to the occupation it surveyed, then the latest check per occupation
    df = _nearest_occupation(df)
    df = df.sort_values(["surveyed", "src_line"], na_position="first", kind="stable")
    df = df.drop_duplicates([*KEY, "occupation"], keep="last")
    df["preplot_h"] = np.nan
    if stations is not None and stations.num_rows:
        st = stations.select([*KEY, "easting", "northing", "elevation"]).to_pandas()
        st = st.drop_duplicates(KEY, keep="last").rename(
            columns={"easting": "st_e", "northing": "st_n", "elevation": "st_h"})
        df = df.merge(st, on=KEY, how="left")
        df["preplot_e"] = df["preplot_e"].fillna(df["st_e"])
        df["preplot_n"] = df["preplot_n"].fillna(df["st_n"])
        df["preplot_h"] = df["st_h"].astype(float)
    df["de"] = df["easting"] - df["check_e"]
    df["dn"] = df["northing"] - df["check_n"]
    df["dh"] = df["height"] - df["check_h"]
    df["dist"] = np.hypot(df["de"], df["dn"])
    df["pre_de"] = df["preplot_e"] - df["check_e"]
    df["pre_dn"] = df["preplot_n"] - df["check_n"]
    df["pre_dh"] = df["preplot_h"] - df["check_h"]
    df["pre_dist"] = np.hypot(df["pre_de"], df["pre_dn"])
    df = df.sort_values([*KEY, "occupation"], kind="stable")
    df["index"] = df["index"].astype("int8")
    df["occupation"] = df["occupation"].astype("int8")
    return pa.Table.from_pandas(df[POINT_SCHEMA.names], schema=POINT_SCHEMA, preserve_index=False)


def _f(x: float) -> float | None:
    return None if x is None or not math.isfinite(x) else float(x)


@dataclass(frozen=True)
class Distances:
    """Distribution of a non-negative difference (horizontal distance or |dH|), metres."""

    n: int
    mean: float | None
    median: float | None
    rms: float | None
    p95: float | None
    max: float | None

    @classmethod
    def of(cls, values: np.ndarray) -> Distances:
        v = np.asarray(values, dtype=float)
        v = v[np.isfinite(v)]
        if v.size == 0:
            return cls(0, None, None, None, None, None)
        return cls(int(v.size), _f(v.mean()), _f(np.median(v)), _f(np.sqrt(np.mean(v * v))),
                   _f(np.percentile(v, 95)), _f(v.max()))


@dataclass(frozen=True)
class Axis:
    """Bias (mean) and spread (standard deviation, ddof = 1) of a signed difference, metres."""

    n: int
    bias: float | None
    spread: float | None

    @classmethod
    def of(cls, values: np.ndarray) -> Axis:
        v = np.asarray(values, dtype=float)
        v = v[np.isfinite(v)]
        if v.size == 0:
            return cls(0, None, None)
        return cls(int(v.size), _f(v.mean()), _f(v.std(ddof=1)) if v.size > 1 else None)


@dataclass(frozen=True)
class Summary:
    """Summary of differences to the check points for one source (solved or preplot)."""

    horizontal: Distances
    east: Axis
    north: Axis
    vertical: Axis
    vertical_abs: Distances
    accuracy: Accuracy | None
    within_tolerance: float | None  # fraction of stations with dist <= tolerance

    def as_dict(self) -> dict[str, Any]:
        """Plain data (None where a figure cannot be computed)."""
        return {
            "horizontal": vars(self.horizontal).copy(), "east": vars(self.east).copy(),
            "north": vars(self.north).copy(), "vertical": vars(self.vertical).copy(),
            "vertical_abs": vars(self.vertical_abs).copy(),
            "accuracy": self.accuracy.as_dict() if self.accuracy else None,
            "within_tolerance": self.within_tolerance,
        }


def summarise(de: np.ndarray, dn: np.ndarray, dh: np.ndarray, tolerance: float) -> Summary:
    """Summary figures of east, north and vertical differences (see module docstring)."""
    de = np.asarray(de, dtype=float)
    dn = np.asarray(dn, dtype=float)
    ok = np.isfinite(de) & np.isfinite(dn)
    dist = np.hypot(de[ok], dn[ok])
    return Summary(
        horizontal=Distances.of(dist),
        east=Axis.of(de[ok]), north=Axis.of(dn[ok]),
        vertical=Axis.of(dh), vertical_abs=Distances.of(np.abs(np.asarray(dh, dtype=float))),
        accuracy=accuracy_from_errors(de[ok], dn[ok]),
        within_tolerance=_f(float(np.mean(dist <= tolerance))) if dist.size else None,
    )


@dataclass(frozen=True)
class Comparison:
    """Solved and preplot positions against the same check points, side by side."""

    points: pa.Table
    solved: Summary
    preplot: Summary
    tolerance: float
    beyond: pa.Table = field(repr=False)
    within_own_r95: float | None  # fraction of check points inside the solver's own R95


def compare(positions: pa.Table, control: pa.Table, stations: pa.Table | None = None,
            *, tolerance: float) -> Comparison:
    """Join, summarise both sources and list the stations beyond ``tolerance`` metres."""
    if not tolerance > 0:
        raise ValueError("tolerance must be a positive number of metres")
    pts = join_checks(positions, control, stations)
    col = {n: pts[n].to_numpy(zero_copy_only=False).astype(float)
           for n in ("de", "dn", "dh", "pre_de", "pre_dn", "pre_dh", "dist", "r95")}
    solved = summarise(col["de"], col["dn"], col["dh"], tolerance)
    preplot = summarise(col["pre_de"], col["pre_dn"], col["pre_dh"], tolerance)
    r95_ok = np.isfinite(col["r95"])
    within = _f(float(np.mean(col["dist"][r95_ok] <= col["r95"][r95_ok]))) if r95_ok.any() else None
    return Comparison(points=pts, solved=solved, preplot=preplot, tolerance=float(tolerance),
                      beyond=beyond_tolerance(pts, tolerance), within_own_r95=within)


def beyond_tolerance(points: pa.Table, tolerance: float) -> pa.Table:
    """Rows of ``points`` whose horizontal distance exceeds ``tolerance``, largest first."""
    dist = points["dist"].to_numpy(zero_copy_only=False).astype(float)
    idx = np.flatnonzero(np.nan_to_num(dist, nan=-1.0) > tolerance)
    idx = idx[np.argsort(-dist[idx], kind="stable")]
    return points.take(pa.array(idx, type=pa.int64()))
