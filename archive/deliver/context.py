"""What every delivered file states about itself: survey, CRS, datum, units and provenance.

The writers are pure functions ``(table, DeliveryContext) -> bytes``; the context carries the
facts their headers print. CRS facts (datum, spheroid, projection method and parameters)
come from pyproj for the survey's EPSG code, never from hand-typed text.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from functools import lru_cache

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import Refused
from archive.store.ledger import Anchor
from archive.survey.crs import crs_from_epsg
from archive.survey.heights import gnss_height_datum
from archive.survey.keys import station_text

# Which instant the day-of-year / time fields of SPS and SEG-P1 records hold.
TIME_BASIS = "UTC, when the node was laid out (deployment log)"
TIME_COLUMN = "deployed"
POSITION_MAPPED = "receiver (node) as solved from its GNSS fixes"
ANCHOR_LABEL = "Ledger anchor"
"""The header label of the anchor (:class:`archive.store.ledger.Anchor`) in SPS and SEG-P1."""
DECISIONS_TEXT = ("per record in the lineage manifest beside this file (its name + "
                  "'.lineage.json'): occupations[].flags, .flags_acknowledged, .decisions "
                  "-> edits[] (kind, reason, by, at)")
"""Where SPS and SEG-P1 files, which have no column for them, say flags and decisions are."""
CAUTION = ("positions for seismic processing; not a certified or legal survey, not for "
           "boundaries, construction or safety setbacks")


@dataclass(frozen=True)
class CrsFacts:
    """Facts about a projected CRS that a delivery header states."""

    epsg: int
    name: str
    datum: str
    ellipsoid: str
    semi_major: float
    inverse_flattening: float
    geographic_epsg: int | None
    geographic_name: str
    method: str
    method_code: int | None
    params: tuple[tuple[str, float, str], ...]  # (name, value, unit)
    unit: str


@lru_cache(maxsize=32)
def crs_facts(epsg: int) -> CrsFacts:
    """Datum, spheroid, projection method and parameters of a projected CRS (pyproj)."""
    crs = crs_from_epsg(epsg)
    op = crs.coordinate_operation
    geo = crs.geodetic_crs
    params = tuple((p.name, float(p.value), p.unit_name) for p in (op.params if op else []))
    code = None
    if op is not None and op.method_code:
        try:
            code = int(op.method_code)
        except ValueError:
            code = None
    return CrsFacts(
        epsg=epsg, name=crs.name, datum=crs.datum.name if crs.datum else "",
        ellipsoid=crs.ellipsoid.name if crs.ellipsoid else "",
        semi_major=float(crs.ellipsoid.semi_major_metre) if crs.ellipsoid else float("nan"),
        inverse_flattening=float(crs.ellipsoid.inverse_flattening) if crs.ellipsoid else 0.0,
        geographic_epsg=geo.to_epsg() if geo else None, geographic_name=geo.name if geo else "",
        method=op.method_name if op else "", method_code=code, params=params,
        unit=crs.axis_info[0].unit_name if crs.axis_info else "",
    )


@dataclass(frozen=True)
class DeliveryContext:
    """The survey and provenance facts a delivered file states in its header."""

    survey: str
    crs_epsg: int
    client: str = ""
    contractor: str = ""
    area: str = ""
    vertical_datum: str = ""
    run_id: str = ""
    edit_set_hash: str = ""
    edit_ids: tuple[int, ...] = field(default_factory=tuple)
    code_version: str = ""
    produced_at: datetime | None = None
    anchor: Anchor | None = None  # the delivery's place in the ledger, stated in the header
    # how the run turned GNSS heights into the model's datum (archive.survey.heights)
    height_mode: str = "gga"
    height_param: str = ""

    @property
    def crs(self) -> CrsFacts:
        """pyproj facts of the survey CRS."""
        return crs_facts(self.crs_epsg)

    @property
    def gnss_datum(self) -> str:
        """What a GNSS height (a station off the elevation model) is measured from."""
        return gnss_height_datum(self.height_mode, self.height_param, self.vertical_datum)


def height_datums(table: pa.Table, ctx: DeliveryContext) -> np.ndarray:
    """The vertical datum of each record's height: the delivery's (the elevation model's)
    unless the height is a GNSS one, whose datum the survey's height mode gives."""
    gnss = text_column(table, "height_source") == "gnss"
    return np.where(gnss, ctx.gnss_datum, ctx.vertical_datum).astype(str)


def other_datum_stations(table: pa.Table, ctx: DeliveryContext) -> list[str]:
    """'1001/5002 index 1' for each record whose height is not in the delivery's datum."""
    rows = np.flatnonzero(height_datums(table, ctx) != ctx.vertical_datum)
    return [station_label(table, int(i)).removeprefix("station ") for i in rows]


def station_label(table: pa.Table, i: int) -> str:
    """'station 1001/2001 index 1' for row ``i`` of a positions-like table."""
    return "station " + station_text(table.column("line")[i].as_py(),
                                     table.column("point")[i].as_py(),
                                     table.column("index")[i].as_py())


def check_unique_keys(table: pa.Table, fmt_name: str) -> None:
    """Refuse a table in which (line, point, index) is not unique: processing keys receiver
    positions on it, so a repeated key would silently lose or mix up a position."""
    n = table.num_rows
    if n < 2:
        return
    keys = table.select(["line", "point", "index"]).group_by(["line", "point", "index"]) \
        .aggregate([("line", "count")])
    dup = keys.filter(pc.greater(keys["line_count"], 1))
    if dup.num_rows == 0:
        return
    names = ", ".join(station_label(dup, i) + f" ({dup['line_count'][i].as_py()} records)"
                      for i in range(min(dup.num_rows, 5)))
    raise Refused(f"{fmt_name}: {dup.num_rows} key(s) (line, point, index) appear more than "
                  f"once: {names}", hint="each occupation of a station needs its own point "
                                        "index; this is a fault of the table, not of the data: "
                                        "report it with the run id")


def digit_indices(table: pa.Table, fmt_name: str, where: str, suggest: str) -> np.ndarray:
    """The point index column after the key check, refusing indices that are not one digit
    1-9 (``where`` names the column that holds it in the format)."""
    check_unique_keys(table, fmt_name)
    index = column(table, "index", 1.0)
    bad = ~((index >= 1) & (index <= 9))
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise Refused(f"{fmt_name}: {station_label(table, i)}: point index {index[i]:g} cannot "
                      f"be written ({where} holds one digit, 1-9): the station is occupied "
                      "more often than the format can number",
                      hint=f"deliver as {suggest}, or merge indistinguishable occupations "
                           "with --merge-occupations")
    return index


def numbers_text(values: np.ndarray) -> np.ndarray:
    """Line/point numbers as short text: ``1001.00`` -> ``1001``, ``1001.50`` -> ``1001.5``."""
    text = np.char.mod("%.2f", np.asarray(values, dtype=np.float64))
    return np.char.rstrip(np.char.rstrip(text, "0"), ".")


def time_fields(table: pa.Table, name: str = TIME_COLUMN) -> tuple[np.ndarray, ...]:
    """(valid, year, day of year, hour, minute, second) of a UTC timestamp column, vectorised."""
    n = table.num_rows
    if name not in table.column_names:
        zeros = np.zeros(n, dtype=np.int64)
        return np.zeros(n, dtype=bool), zeros, zeros, zeros, zeros, zeros
    col = table.column(name).cast(pa.timestamp("us", tz="UTC"))
    valid = ~np.asarray(col.is_null().to_numpy(zero_copy_only=False), dtype=bool)
    us = col.cast(pa.int64()).fill_null(0).to_numpy(zero_copy_only=False)
    t = us.astype("datetime64[us]")
    years = t.astype("datetime64[Y]")
    year = years.astype(np.int64) + 1970
    doy = (t.astype("datetime64[D]") - years.astype("datetime64[D]")).astype(np.int64) + 1
    sec = (t - t.astype("datetime64[D]")).astype("timedelta64[s]").astype(np.int64)
    return valid, year, doy, sec // 3600, (sec // 60) % 60, sec % 60


def fixed_field(values: np.ndarray, spec: str, width: int, *, table: pa.Table, field_name: str,
                fmt_name: str, columns: str, suggest: str) -> np.ndarray:
    """Format numbers with a printf ``spec`` right-aligned in ``width`` characters.

    NaN gives blanks. A value whose text is wider than the field is refused (never spilled
    into the next columns): :class:`Refused` names the station, the field and its columns.
    """
    v = np.asarray(values, dtype=np.float64)
    finite = np.isfinite(v)
    safe = np.where(finite, v, 0.0)
    text = np.char.mod(spec, safe)
    too_wide = finite & (np.char.str_len(text) > width)
    if too_wide.any():
        i = int(np.flatnonzero(too_wide)[0])
        raise Refused(
            f"{fmt_name}: {station_label(table, i)}: {field_name} {float(v[i])!r} does not fit "
            f"{width} columns ({columns}); {int(too_wide.sum())} value(s) of this field do not fit",
            hint=f"deliver this run as {suggest} for full precision",
        )
    text = np.char.rjust(text, width)
    return np.where(finite, text, " " * width)


def column(table: pa.Table, name: str, default: float = np.nan) -> np.ndarray:
    """A numeric column as float64 with nulls as NaN (a constant when the column is absent)."""
    if name not in table.column_names:
        return np.full(table.num_rows, default, dtype=np.float64)
    return table.column(name).to_numpy(zero_copy_only=False).astype(np.float64)


def text_column(table: pa.Table, name: str, default: str = "") -> np.ndarray:
    """A string column as a numpy str array with nulls as ``default``."""
    if name not in table.column_names:
        return np.full(table.num_rows, default, dtype=object).astype(str)
    return np.array([default if x is None else x for x in table.column(name).to_pylist()],
                    dtype=str) if table.num_rows else np.array([], dtype=str)
