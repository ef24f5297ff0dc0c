"""Preplot stations and RTK check points: reading (CSV or SPS) and the checks they must pass.

Stations CSV: ``line,point,easting,northing[,elevation][,index][,code]``. Check points CSV:
``line,point,easting,northing,height[,surveyed_utc][,method][,index][,sigma_e,sigma_n,sigma_h]``.
Either may instead be SPS rev 2.1 point records. Coordinates are grid metres of the survey's
projected CRS; a coordinate outside that CRS's area of use refuses the file, and so does a
preplot with the same (line, point, index) twice. A check point repeated (surveyed again) is a
warning, as is a check point at no known station.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import InputError, UsageError
from archive.survey.crs import area_text, outside_area_of_use
from archive.survey.csvtable import read_csv_columns
from archive.survey.parsed import ParsedInput, problem
from archive.survey.schema import CONTROL_SCHEMA, STATION_SCHEMA
from archive.survey.sps import read_sps

STATION_REQUIRED = ("line", "point", "easting", "northing")
STATION_OPTIONAL = ("elevation", "index", "code")
CONTROL_REQUIRED = ("line", "point", "easting", "northing", "height")
CONTROL_OPTIONAL = ("surveyed_utc", "method", "index", "sigma_e", "sigma_n", "sigma_h")
FORMATS = ("csv", "sps")


def detect_format(data: bytes, path: str, fmt: str | None) -> str:
    """The format asked for, else guessed: SPS when the first record starts with H, R or S
    followed by a blank or digit in fixed columns, else CSV."""
    if fmt:
        fmt = fmt.lower()
        if fmt not in FORMATS:
            raise UsageError(f"unknown format {fmt!r}", hint="use csv or sps")
        return fmt
    suffix = Path(path).suffix.lower()
    if suffix in (".csv", ".txt") and b"," in data[:4096].split(b"\n", 1)[0]:
        return "csv"
    if suffix in (".sps", ".r", ".s", ".rps", ".sps21"):
        return "sps"
    first = data.lstrip()[:2]
    if first[:1] in (b"H", b"R", b"S") and b"," not in data[:200].split(b"\n", 1)[0]:
        return "sps"
    return "csv"


def read_stations(data: bytes, path: str, fmt: str | None = None) -> ParsedInput:
    """Parse a preplot (CSV or SPS) into STATION_SCHEMA; SPS headers go into ``meta``."""
    fmt = detect_format(data, path, fmt)
    meta: dict[str, Any] = {"format": fmt}
    if fmt == "sps":
        sps = read_sps(data, path)
        table = sps.points
        meta.update(revision=sps.revision, headers=[list(h) for h in sps.headers],
                    ignored=sps.ignored)
    else:
        c = read_csv_columns(data, path, STATION_REQUIRED, STATION_OPTIONAL)
        n = len(c)
        codes = c.text("code") if c.has("code") else np.full(n, "")
        table = pa.table(
            {
                "line": c.floats("line"),
                "point": c.floats("point"),
                "index": (c.ints("index", default=1, lo=1, hi=9) if c.has("index")
                          else np.ones(n, dtype=np.int64)).astype(np.int8),
                "code": pa.array(np.where(codes == "", None, codes).tolist(), type=pa.string()),
                "easting": c.floats("easting"),
                "northing": c.floats("northing"),
                "elevation": pa.array(c.floats("elevation", required=False)
                                      if c.has("elevation") else np.full(n, np.nan),
                                      from_pandas=True),
                "kind": np.full(n, "R"),
                "src_line": c.lines,
            },
            schema=STATION_SCHEMA,
        )
    if table.num_rows == 0:
        raise InputError(path, "no station records found",
                         expected="SPS R/S records or CSV rows under a header")
    kinds = pc.value_counts(table["kind"]).to_pylist()
    meta["counts"] = {d["values"]: d["counts"] for d in kinds}
    _refuse_duplicates(table, path, ("kind", "line", "point", "index"), "station")
    return ParsedInput(table=table, meta=meta)


def read_control(data: bytes, path: str, fmt: str | None = None) -> ParsedInput:
    """Parse RTK check points (CSV or SPS) into CONTROL_SCHEMA."""
    fmt = detect_format(data, path, fmt)
    meta: dict[str, Any] = {"format": fmt}
    if fmt == "sps":
        sps = read_sps(data, path)
        p = sps.points
        n = p.num_rows
        none_f = pa.nulls(n, pa.float64())
        table = pa.table(
            {"line": p["line"], "point": p["point"], "index": p["index"],
             "easting": p["easting"], "northing": p["northing"], "height": p["elevation"],
             "surveyed": pa.nulls(n, CONTROL_SCHEMA.field("surveyed").type),
             "method": pa.array(["SPS"] * n, type=pa.string()),
             "sigma_e": none_f, "sigma_n": none_f, "sigma_h": none_f,
             "src_line": p["src_line"]},
            schema=CONTROL_SCHEMA,
        )
        meta.update(revision=sps.revision, headers=[list(h) for h in sps.headers])
    else:
        c = read_csv_columns(data, path, CONTROL_REQUIRED, CONTROL_OPTIONAL)
        n = len(c)

        def opt_float(name: str) -> pa.Array:
            v = c.floats(name, required=False) if c.has(name) else np.full(n, np.nan)
            if np.any(v < 0):
                raise InputError(path, f"negative {name}", line=int(c.lines[np.argmax(v < 0)]),
                                 columns=name, expected="a standard deviation >= 0 in metres")
            return pa.array(v, from_pandas=True)

        method = c.text("method") if c.has("method") else np.full(n, "")
        table = pa.table(
            {
                "line": c.floats("line"), "point": c.floats("point"),
                "index": (c.ints("index", default=1, lo=1, hi=9) if c.has("index")
                          else np.ones(n, dtype=np.int64)).astype(np.int8),
                "easting": c.floats("easting"), "northing": c.floats("northing"),
                "height": pa.array(c.floats("height", required=False), from_pandas=True),
                "surveyed": (c.times("surveyed_utc", required=False, date_only=True)
                             if c.has("surveyed_utc")
                             else pa.nulls(n, CONTROL_SCHEMA.field("surveyed").type)),
                "method": pa.array(np.where(method == "", None, method).tolist(),
                                   type=pa.string()),
                "sigma_e": opt_float("sigma_e"), "sigma_n": opt_float("sigma_n"),
                "sigma_h": opt_float("sigma_h"), "src_line": c.lines,
            },
            schema=CONTROL_SCHEMA,
        )
    if table.num_rows == 0:
        raise InputError(path, "no check point records found",
                         expected="CSV rows under a header, or SPS R/S records")
    warnings = _repeats(table)
    return ParsedInput(table=table, warnings=warnings, meta=meta)


def check_area(table: pa.Table, epsg: int, path: str, *, margin_deg: float = 0.0) -> None:
    """Refuse coordinates outside the area of use of the survey CRS (first lines named)."""
    e = table["easting"].to_numpy()
    n = table["northing"].to_numpy()
    bad = outside_area_of_use(epsg, e, n, margin_deg=margin_deg)
    if bad.any():
        idx = np.flatnonzero(bad)
        lines = table["src_line"].to_numpy()[idx]
        first = int(idx[0])
        listed = ", ".join(str(int(x)) for x in lines[:10]) + (" ..." if len(idx) > 10 else "")
        raise InputError(
            path,
            f"{len(idx)} record(s) lie outside the area of use of EPSG:{epsg} "
            f"({area_text(epsg)}), e.g. E {e[first]:.1f} N {n[first]:.1f}; lines {listed}",
            line=int(lines[0]), columns="easting,northing",
            expected=f"grid coordinates in EPSG:{epsg}",
            hint="check the file's CRS, or whether easting and northing are swapped",
        )


def unknown_stations(table: pa.Table, stations: pa.Table | None, what: str) -> list[dict[str, Any]]:
    """Warnings for records whose (line, point, index) is not a receiver station."""
    if stations is None:
        return [problem("no-stations", f"no preplot loaded yet: {what} not checked against "
                        "stations")]
    rec = stations.filter(pc.equal(stations["kind"], "R"))
    known = pd.MultiIndex.from_arrays([rec["line"].to_numpy(), rec["point"].to_numpy(),
                                       rec["index"].to_numpy().astype(np.int64)])
    keys = pd.MultiIndex.from_arrays([table["line"].to_numpy(), table["point"].to_numpy(),
                                      table["index"].to_numpy().astype(np.int64)])
    missing = np.flatnonzero(~keys.isin(known))
    lines, pts, idx = (table[k].to_numpy() for k in ("line", "point", "index"))
    src = table["src_line"].to_numpy()
    return [problem("unknown-station", f"{what} at line {lines[i]:g} point {pts[i]:g} "
                    f"index {idx[i]}, which is not a preplot receiver station", int(src[i]))
            for i in missing]


def _keys(table: pa.Table, cols: tuple[str, ...]) -> pd.DataFrame:
    return pd.DataFrame({k: table[k].to_numpy(zero_copy_only=False) for k in cols})


def _refuse_duplicates(table: pa.Table, path: str, cols: tuple[str, ...], what: str) -> None:
    df = _keys(table, cols)
    dup = df.duplicated(keep=False).to_numpy()
    if dup.any():
        src = table["src_line"].to_numpy()[dup]
        sub = df[dup]
        first = sub.iloc[0]
        same = src[(sub == first).all(axis=1).to_numpy()]
        raise InputError(
            path,
            f"{what} line {first['line']:g} point {first['point']:g} index {first['index']} "
            f"appears on lines {', '.join(str(int(x)) for x in same)}"
            f" ({int(dup.sum())} records share a key with another)",
            line=int(same[1]), columns="line,point,index",
            expected=f"each (line, point, index) once per {what} kind",
            hint="remove the repeated records, or give them different point indexes",
        )


def _repeats(table: pa.Table) -> list[dict[str, Any]]:
    df = _keys(table, ("line", "point", "index"))
    dup = np.flatnonzero(df.duplicated(keep="first").to_numpy())
    src = table["src_line"].to_numpy()
    return [problem("repeated", f"check point line {df['line'].iat[i]:g} point "
                    f"{df['point'].iat[i]:g} index {df['index'].iat[i]} surveyed again", int(src[i]))
            for i in dup]
