"""SEG-P1 (SEG 1983 positional exchange) receiver file: 20 H header records, 80-column data.

Header records: ``Hnn`` in columns 1-3, free text in 5-80 (``description: data``, long data
continued on the next record indented by two spaces). Statements that need more than 20
records are refused, never cut.

Data record columns (1-based, inclusive):
1 record id (blank) · 2-17 line name, left-justified · 18-25 point number I8 ·
26 reshoot code (the occupation's point index: blank for 1, the digit 2-9 otherwise) · 27-35 latitude DDMMSSss + N/S · 36-45 longitude DDDMMSSss + E/W ·
46-53 easting F8 · 54-61 northing F8 · 62-66 elevation F5 · 67-68 year I2 ·
69-71 day of year I3 · 72-77 time hhmmss (UTC) · 78-80 spare.

Latitude and longitude are on the geographic CRS of the survey's projected CRS (the datum the
header names), computed from the delivered grid coordinates with pyproj, to 0.01 arc-second
with an implied decimal point. The grid and elevation fields are written with one decimal
when every value of the file fits, else as whole metres; the header says which. A value
that does not fit even as whole metres, a point number that is not a whole number, or a
point index above 9 (one digit in column 26) is refused, never spilled into the next
columns. A station occupied more than once has one record per occupation: the point index
goes in the reshoot-code column, as the header states, so (line, point, column 26) is unique.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa

from archive.deliver.context import (
    ANCHOR_LABEL,
    POSITION_MAPPED,
    TIME_BASIS,
    DeliveryContext,
    column,
    digit_indices,
    fixed_field,
    numbers_text,
    other_datum_stations,
    station_label,
    time_fields,
)
from archive.deliver.headers import ascii_text, wrap_data
from archive.errors import Refused
from archive.survey.crs import transformer

FORMAT = "SEG-P1"
SUGGEST = "SPS (--format sps) or CSV (--format csv)"
N_HEADER = 20
FREE_WIDTH = 76  # header text in columns 5-80

SHORT_PARAM = {
    "Latitude of natural origin": "lat0", "Longitude of natural origin": "lon0",
    "Scale factor at natural origin": "k0", "False easting": "FE", "False northing": "FN",
    "Latitude of false origin": "latF", "Longitude of false origin": "lonF",
    "Latitude of 1st standard parallel": "lat1", "Latitude of 2nd standard parallel": "lat2",
    "Easting at false origin": "EF", "Northing at false origin": "NF",
    "Latitude of projection centre": "latC", "Longitude of projection centre": "lonC",
    "Azimuth at projection centre": "alphaC", "Angle from Rectified to Skew Grid": "gammaC",
    "Scale factor at projection centre": "kC", "Scale factor on initial line": "kC",
    "Easting at projection centre": "EC", "Northing at projection centre": "NC",
    "Longitude of origin": "lon0",
}
UNIT_SHORT = {"degree": "deg", "metre": "m", "unity": "", "US survey foot": "ftUS", "foot": "ft"}


def dms_fields(degrees: np.ndarray, deg_width: int, pos: str, neg: str) -> np.ndarray:
    """Degrees -> 'DDMMSSss' + hemisphere text (seconds to 0.01", implied decimal point)."""
    d = np.asarray(degrees, dtype=np.float64)
    total = np.round(np.abs(d) * 360000.0).astype(np.int64)  # hundredths of arc-second
    deg = total // 360000
    minutes = (total // 6000) % 60
    hundredths = total % 6000
    text = np.char.add(np.char.mod(f"%0{deg_width}d", deg), np.char.mod("%02d", minutes))
    text = np.char.add(text, np.char.mod("%04d", hundredths))
    return np.char.add(text, np.where(d < 0, neg, pos))


def reshoot_codes(index: np.ndarray) -> np.ndarray:
    """Column 26 of each record: blank for point index 1, else the index digit (2-9)."""
    idx = np.asarray(index, dtype=np.int64)
    return np.where(idx == 1, " ", np.char.mod("%d", idx))


# Field widths of the grid and elevation values (SEG 1983 data record: F8, F8, F5).
WIDTHS = {"easting": 8, "northing": 8, "height": 5}


def grid_decimals(values: np.ndarray, width: int) -> int:
    """Decimals one field of the file is written with: one (0.1 unit, the precision of the
    SPS grid fields) when every value of the file fits ``width`` columns with it, else
    none (whole units)."""
    v = np.asarray(values, dtype=np.float64)
    v = v[np.isfinite(v)]
    one = np.char.str_len(np.char.mod("%.1f", v)) if v.size else np.zeros(0)
    return 1 if (one <= width).all() else 0


def decimals(table: pa.Table) -> dict[str, int]:
    """The decimals a SEG-P1 file of this table writes for easting, northing and height."""
    return {name: grid_decimals(column(table, name), width) for name, width in WIDTHS.items()}


def _grid(table: pa.Table, values: np.ndarray, width: int, label: str, cols: str,
          ) -> tuple[np.ndarray, int]:
    """Format with one decimal when every value fits, else whole metres (refuse otherwise)."""
    decimals = grid_decimals(values, width)
    text = fixed_field(values, f"%{width}.{decimals}f", width, table=table, field_name=label,
                       fmt_name=FORMAT, columns=cols, suggest=SUGGEST)
    return text, decimals


def _free_lines(items: list[tuple[str, str]]) -> list[str]:
    """``description: data`` texts over 76 columns, long data continuing indented."""
    lines: list[str] = []
    for desc, data in items:
        first, *rest = wrap_data(ascii_text(f"{desc}: {data}", desc), FREE_WIDTH)
        lines.append(first)
        lines += [f"  {p}" for p in wrap_data(" ".join(rest), FREE_WIDTH - 2)] if rest else []
    return lines


def header_records(ctx: DeliveryContext, precision: dict[str, int],
                   n_other_datum: int = 0) -> list[str]:
    """Exactly 20 H records: survey, datum/spheroid, projection and parameters, units, time
    basis, what position is mapped, producing run, edit set, the ledger anchor and where
    the flags and decisions of each record are (the lineage manifest).

    Each record is ``Hnn`` and free text in columns 5-80: ``description: data``, long data
    continuing on the next record indented by two spaces; projection
    parameters use compact names (:data:`SHORT_PARAM`). When the statements need more than
    20 records the file is refused (:class:`Refused`), never cut.
    """
    crs = ctx.crs
    params = " ".join(
        f"{SHORT_PARAM.get(n, n.replace(' ', '_'))}={v:.12g}{UNIT_SHORT.get(u, '_' + u.replace(' ', '_'))}"
        for n, v, u in crs.params
    )
    unit = crs.unit

    def prec(name: str) -> str:
        return "0.1" if precision.get(name, 0) == 1 else "1"

    def hprec() -> str:
        return "0.1 metre" if precision.get("height", 0) == 1 else "1 metre"

    produced = ctx.produced_at.strftime("%Y-%m-%d %H:%M UTC") if ctx.produced_at else ""
    items = [
        ("Survey", ctx.survey + (f", {ctx.area}" if ctx.area else "")),
        ("Client", ctx.client),
        ("Contractor", ctx.contractor),
        ("Geodetic datum and spheroid", f"{crs.datum}; {crs.ellipsoid} "
                                        f"a={crs.semi_major:.3f} 1/f={crs.inverse_flattening:.9f}"),
        ("Coordinate reference system", f"EPSG:{crs.epsg} {crs.name}"),
        ("Projection and parameters", f"{crs.method} (EPSG method {crs.method_code}): "
                                      f"{params or 'none'}"),
        ("Grid units", f"{unit}; precision E {prec('easting')}, N {prec('northing')}"),
        ("Latitude/longitude", f"EPSG:{crs.geographic_epsg} {crs.geographic_name}, "
                               "DDMMSSss 0.01 sec"),
        ("Elevation", f"{ctx.vertical_datum or 'datum not stated'}, {hprec()}"
                      + (f"; {n_other_datum} record(s) GNSS height in another datum "
                         "(lineage 'heights')" if n_other_datum else "")),
        ("Time basis", TIME_BASIS),
        ("Reshoot code col 26", "occupation's point index, blank = 1"),
        ("Position mapped", POSITION_MAPPED),
        ("Run", ctx.run_id),
        ("Edit set", ctx.edit_set_hash),
        ("Produced", f"{produced} nodekeep {ctx.code_version}, {len(ctx.edit_ids)} edits"),
    ]
    if ctx.anchor is not None:
        items.append((ANCHOR_LABEL, ctx.anchor.text()))
    lines = _free_lines([*items, ("Flags, decisions", "per record in this file's .lineage.json")])
    if len(lines) > N_HEADER:  # no record left for the review pointer: it joins "Produced"
        produced_at = next(i for i, (d, _) in enumerate(items) if d == "Produced")
        items[produced_at] = ("Produced", f"{produced} nodekeep {ctx.code_version}; decisions: "
                                          ".lineage.json")
        lines = _free_lines(items)
    if len(lines) > N_HEADER:
        raise Refused(f"{FORMAT}: the header statements need {len(lines)} records, the format "
                      f"has {N_HEADER} (long CRS name, parameters or survey text)",
                      hint=f"deliver as {SUGGEST}, whose headers have no record limit")
    lines += [""] * (N_HEADER - len(lines))
    return [f"H{k:02d} {text:<{FREE_WIDTH}}" for k, text in enumerate(lines, 1)]


def data_records(table: pa.Table, ctx: DeliveryContext) -> tuple[list[str], dict[str, int]]:
    """The 80-column data records and the decimals written for easting/northing/height."""
    n = table.num_rows
    if n == 0:
        return [], {"easting": 1, "northing": 1, "height": 1}
    index = digit_indices(table, FORMAT, "the reshoot code, column 26,", SUGGEST)
    east, north = column(table, "easting"), column(table, "northing")
    for name, v in (("easting", east), ("northing", north)):
        if (~np.isfinite(v)).any():
            i = int(np.flatnonzero(~np.isfinite(v))[0])
            raise Refused(f"{FORMAT}: {station_label(table, i)} has no {name}",
                          hint="set a position with 'nodekeep edit set-position' or reject "
                               "the station with 'nodekeep edit reject'")
    line_t = numbers_text(column(table, "line"))
    if (np.char.str_len(line_t) > 16).any():
        i = int(np.flatnonzero(np.char.str_len(line_t) > 16)[0])
        raise Refused(f"{FORMAT}: {station_label(table, i)}: line name {line_t[i]} does not "
                      "fit 16 columns (2-17)", hint=f"deliver as {SUGGEST}")
    point = column(table, "point")
    frac = point != np.round(point)
    if frac.any():
        i = int(np.flatnonzero(frac)[0])
        raise Refused(f"{FORMAT}: {station_label(table, i)}: point number {point[i]:g} is not "
                      "a whole number (columns 18-25, I8)", hint=f"deliver as {SUGGEST}")
    point_t = fixed_field(point, "%8.0f", 8, table=table, field_name="point number",
                          fmt_name=FORMAT, columns="18-25", suggest=SUGGEST)
    geo = ctx.crs.geographic_epsg or 4326
    lon, lat = transformer(ctx.crs_epsg, geo).transform(east, north)
    east_t, de = _grid(table, east, 8, "easting", "46-53")
    north_t, dn = _grid(table, north, 8, "northing", "54-61")
    height_t, dh = _grid(table, column(table, "height"), 5, "elevation", "62-66")
    valid, year, doy, hh, mm, ss = time_fields(table)
    parts = [
        np.full(n, " "),
        np.char.ljust(line_t, 16),
        point_t,
        reshoot_codes(index),
        dms_fields(lat, 2, "N", "S"),
        dms_fields(lon, 3, "E", "W"),
        east_t,
        north_t,
        height_t,
        np.where(valid, np.char.mod("%02d", year % 100), "  "),
        np.where(valid, np.char.mod("%3d", doy), "   "),
        np.where(valid, np.char.mod("%02d", hh), "  "),
        np.where(valid, np.char.mod("%02d", mm), "  "),
        np.where(valid, np.char.mod("%02d", ss), "  "),
        np.full(n, "   "),
    ]
    out = parts[0]
    for p in parts[1:]:
        out = np.char.add(out, p)
    return out.tolist(), {"easting": de, "northing": dn, "height": dh}


def write_segp1(table: pa.Table, ctx: DeliveryContext) -> bytes:
    """The whole SEG-P1 file: 20 header records then one data record per station."""
    records, precision = data_records(table, ctx)
    lines = header_records(ctx, precision, len(other_datum_stations(table, ctx))) + records
    return ("\n".join(lines) + "\n").encode("ascii", errors="replace")
