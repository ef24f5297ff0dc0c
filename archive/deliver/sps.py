"""SPS rev 2.1 receiver point file: H header records and R point records, 80 columns.

Point record columns (1-based, inclusive; SEG SPS rev 2.1, Jan 2006):
1 ``R`` · 2-11 line F10.2 · 12-21 point F10.2 · 22-23 blank · 24 point index I1 ·
25-26 point code A2 · 27-30 static I4 · 31-34 point depth F4.1 · 35-38 seismic datum I4 ·
39-40 uphole I2 · 41-46 water depth F6.1 · 47-55 easting F9.1 · 56-65 northing F10.1 ·
66-71 surface elevation F6.1 · 72-74 day of year I3 · 75-80 time hhmmss.

Header records: columns 1-4 record id (``H`` + item), 5-32 description, 33-80 data; data
longer than 48 characters continues on H26 records described ``(continued)``. The
fields nodekeep has no value for (point code, static, depth, datum, uphole, water depth)
are left blank unless the table carries them (``code``, ``static``, ``point_depth``,
``datum``, ``uphole``, ``water_depth``). A value that does not fit its field is refused.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from archive.deliver.context import (
    ANCHOR_LABEL,
    DECISIONS_TEXT,
    POSITION_MAPPED,
    TIME_BASIS,
    DeliveryContext,
    column,
    digit_indices,
    fixed_field,
    other_datum_stations,
    station_label,
    text_column,
    time_fields,
)
from archive.deliver.headers import header_lines
from archive.errors import Refused
from archive.survey.crs import survey_crs

FORMAT = "SPS rev 2.1"
SUGGEST = "CSV (--format csv)"


def header_records(ctx: DeliveryContext, table: pa.Table | None = None) -> list[str]:
    """The H records stating survey, client, CRS, datum, projection, units and provenance."""
    crs = ctx.crs
    p = {name: (value, unit) for name, value, unit in crs.params}

    def param(*names: str) -> str:
        for n in names:
            if n in p:
                return f"{p[n][0]:.9g} {p[n][1]}"
        return "n/a"

    lat0 = param("Latitude of natural origin", "Latitude of false origin",
                 "Latitude of projection centre")
    lon0 = param("Longitude of natural origin", "Longitude of false origin",
                 "Longitude of projection centre", "Longitude of origin")
    fe = param("False easting", "Easting at false origin", "Easting at projection centre")
    fn = param("False northing", "Northing at false origin", "Northing at projection centre")
    parallels = [param(n) for n in ("Latitude of 1st standard parallel",
                                    "Latitude of 2nd standard parallel") if n in p]
    scale = param("Scale factor at natural origin", "Scale factor on initial line")
    recs = [
        ("H00", "SPS format version num.", "SPS 2.1 (receiver points only)"),
        ("H01", "Description of survey area", ctx.survey + (f", {ctx.area}" if ctx.area else "")),
        ("H02", "Date of survey", _date_span(table)),
        ("H021", "Post-plot date of issue",
         ctx.produced_at.strftime("%Y-%m-%d %H:%M:%S UTC") if ctx.produced_at else ""),
        ("H03", "Client", ctx.client),
        ("H04", "Geophysical contractor", ctx.contractor),
        ("H07", "Positioning software", f"nodekeep {ctx.code_version}".strip()),
        ("H08", "Coordinate location", "receiver position as solved"),
        ("H10", "Clock time w.r.t. GMT", "0 (all times UTC)"),
        ("H12", "Geodetic datum,-spheroid", f"{crs.datum}, {crs.ellipsoid}"),
        ("H13", "Coordinate reference system", f"EPSG:{crs.epsg} {crs.name}"),
        ("H14", "Geodetic datum parameters",
         f"a={crs.semi_major:.3f} 1/f={crs.inverse_flattening:.9f}"),
        ("H17", "Vertical datum", ctx.vertical_datum or "not stated"),
        ("H18", "Projection type",
         f"{crs.method} (EPSG method {crs.method_code})" if crs.method_code else crs.method),
        ("H19", "Projection zone", crs.name),
        ("H20", "Description of grid units", crs.unit),
        ("H201", "Factor to metre", repr(survey_crs(ctx.crs_epsg).unit_factor)),
        ("H21", "Standard parallel(s)", ", ".join(parallels) or f"none (origin lat {lat0})"),
        ("H22", "Central meridian", lon0),
        ("H231", "Grid origin", f"lat {lat0}, lon {lon0}"),
        ("H232", "Grid coord. at origin", f"E {fe}, N {fn}"),
        ("H241", "Scale factor", scale),
        ("H242", "Lat/long of scale factor", f"lat {lat0}, lon {lon0}"),
    ]
    recs += [("H26", "Projection parameter", f"{name} = {value:.12g} {unit}")
             for name, value, unit in crs.params]
    recs += [
        ("H26", "Position mapped", POSITION_MAPPED),
        ("H26", "Day/time columns 72-80", TIME_BASIS),
        ("H26", "Point index column 24", "one per occupation of the station (a node deployed "
                                         "there), numbered in order of deployment, and one per "
                                         "part of a node that moved during its stay; the "
                                         "lineage manifest gives each one's node and window"),
        ("H26", "Units and precision", f"E/N {crs.unit} to 0.1, elevation metre to 0.1"),
        *_other_datum_records(ctx, table),
        ("H26", "Producing run", ctx.run_id),
        ("H26", "Edit set", ctx.edit_set_hash),
        ("H26", "Edit ids in force", ",".join(str(i) for i in ctx.edit_ids) or "none"),
    ]
    if ctx.anchor is not None:  # where the delivery sits in the archive's ledger
        recs.append(("H26", ANCHOR_LABEL, ctx.anchor.text()))
    recs.append(("H26", "Flags and decisions", DECISIONS_TEXT))
    recs.append(("H26", "Not a certified survey", "for seismic processing, not legal/setback use"))
    return [line for r in recs for line in header_lines(*r, continuation_item="H26")]


def _other_datum_records(ctx: DeliveryContext, table: pa.Table | None
                         ) -> list[tuple[str, str, str]]:
    """H26 records naming the records whose height is not in the H17 datum (a GNSS height
    where the elevation model has no value) and the datum it is in."""
    if table is None or table.num_rows == 0:
        return []
    names = other_datum_stations(table, ctx)
    if not names:
        return []
    which = "every record" if len(names) == table.num_rows else ", ".join(names)
    return [("H26", "Heights not in H17 datum",
             f"{len(names)} record(s), GNSS height, {ctx.gnss_datum}: {which}")]


def _date_span(table: pa.Table | None) -> str:
    """First deployment to last retrieval (or fix) of the delivered occupations."""
    import pyarrow.compute as pc

    if table is None or table.num_rows == 0:
        return ""
    lows = [pc.min(table.column(c)).as_py() for c in ("deployed", "t_start")
            if c in table.column_names]
    highs = [pc.max(table.column(c)).as_py() for c in ("retrieved", "t_end", "deployed")
             if c in table.column_names]
    lows, highs = [t for t in lows if t is not None], [t for t in highs if t is not None]
    if not lows or not highs:
        return ""
    return f"{min(lows):%Y-%m-%d} to {max(highs):%Y-%m-%d} (occupations, UTC)"


def point_records(table: pa.Table) -> list[str]:
    """R records for every row of a final-positions table (line, point, index, easting, ...)."""
    n = table.num_rows
    if n == 0:
        return []

    def f(name: str, spec: str, width: int, cols: str, label: str) -> np.ndarray:
        return fixed_field(column(table, name), spec, width, table=table, field_name=label,
                           fmt_name=FORMAT, columns=cols, suggest=SUGGEST)

    index = digit_indices(table, FORMAT, "column 24", SUGGEST)
    for name in ("easting", "northing"):
        missing = ~np.isfinite(column(table, name))
        if missing.any():
            i = int(np.flatnonzero(missing)[0])
            raise Refused(f"{FORMAT}: {station_label(table, i)} has no {name}",
                          hint="set a position with 'nodekeep edit set-position' or reject "
                               "the station with 'nodekeep edit reject'")
    code = text_column(table, "code")
    if (np.char.str_len(code) > 2).any():
        i = int(np.flatnonzero(np.char.str_len(code) > 2)[0])
        raise Refused(f"{FORMAT}: {station_label(table, i)}: point code {code[i]!r} is longer "
                      "than 2 characters (columns 25-26)", hint=f"deliver as {SUGGEST}")
    valid, _year, doy, hh, mm, ss = time_fields(table)
    doy_t = np.where(valid, np.char.mod("%3d", doy), "   ")
    time_t = np.where(valid, np.char.mod("%02d", hh), "  ")
    time_t = np.char.add(time_t, np.where(valid, np.char.mod("%02d", mm), "  "))
    time_t = np.char.add(time_t, np.where(valid, np.char.mod("%02d", ss), "  "))
    parts = [
        np.full(n, "R"),
        f("line", "%10.2f", 10, "2-11", "line"),
        f("point", "%10.2f", 10, "12-21", "point"),
        np.full(n, "  "),
        np.char.mod("%1d", index.astype(np.int64)),
        np.char.ljust(code, 2),
        f("static", "%4.0f", 4, "27-30", "static correction"),
        f("point_depth", "%4.1f", 4, "31-34", "point depth"),
        f("datum", "%4.0f", 4, "35-38", "seismic datum"),
        f("uphole", "%2.0f", 2, "39-40", "uphole time"),
        f("water_depth", "%6.1f", 6, "41-46", "water depth"),
        f("easting", "%9.1f", 9, "47-55", "easting"),
        f("northing", "%10.1f", 10, "56-65", "northing"),
        f("height", "%6.1f", 6, "66-71", "surface elevation"),
        doy_t,
        time_t,
    ]
    out = parts[0]
    for p in parts[1:]:
        out = np.char.add(out, p)
    return out.tolist()


def write_sps(table: pa.Table, ctx: DeliveryContext) -> bytes:
    """The whole SPS rev 2.1 receiver file (ASCII, one 80-column record per line, LF ends)."""
    lines = header_records(ctx, table) + point_records(table)
    return ("\n".join(lines) + "\n").encode("ascii", errors="replace")
