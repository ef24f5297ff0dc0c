"""Delimited text logs (CSV, TSV, ...) -> canonical fix table, through a mapping profile.

Lines are split with the same compiled line splitter as NMEA logs (CR, LF or CR LF), so
line numbers are exact. Blank lines, comment lines, the lines skipped by the profile and
the header are ignored; a line with non-text bytes is rejected as ``binary``, one with too
few fields as ``unreadable``, one whose time or coordinates do not read as ``malformed``,
one outside the possible range (latitude beyond 90, minutes >= 60) as ``out-of-range``.
Fields are split on the delimiter; surrounding quotes and spaces are trimmed (quoted fields
holding the delimiter are not supported). Every step works on whole columns.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from archive.errors import UsageError
from archive.ingest.formats import LogOptions
from archive.ingest.nmea_scan import split_lines
from archive.ingest.profile import Profile
from archive.ingest.result import (
    ParseResult,
    constant_strings,
    empty_rejects,
    line_texts,
    rejects_table,
    sort_fixes,
)
from archive.ingest.schema import FIX_SCHEMA

NUMBER = r"^[+-]?(\d+\.?\d*|\.\d+)([eE][+-]?\d+)?$"
_OK, _IGN, _BIN, _UNREAD, _MALF, _RANGE = 0, 1, 2, 3, 4, 5
_NAMES = np.array(["", "", "binary", "unreadable", "malformed", "out-of-range"], dtype=object)


def _numbers(col: pa.Array) -> tuple[np.ndarray, np.ndarray]:
    """(values, bad) of a string column: empty -> NaN, not a number -> NaN and bad."""
    s = pc.utf8_trim(col, " \"'")
    empty = pc.equal(pc.utf8_length(s), 0).to_numpy(zero_copy_only=False)
    good = pc.match_substring_regex(s, NUMBER).to_numpy(zero_copy_only=False)
    vals = np.full(len(col), np.nan)
    if good.any():
        vals[good] = pc.cast(pc.filter(s, pa.array(good)), pa.float64()).to_numpy()
    return vals, ~good & ~empty


def _times(col: pa.Array, fmt: str) -> np.ndarray:
    """Microseconds since 1970 UTC (int64), or the minimum int64 where unreadable."""
    s = pc.utf8_trim(col, " \"'").to_pandas()
    if fmt == "unix":
        t = pd.to_datetime(pd.to_numeric(s, errors="coerce"), unit="s", utc=True)
    elif fmt == "iso8601":
        t = pd.to_datetime(s, format="ISO8601", errors="coerce", utc=True)
    else:
        t = pd.to_datetime(s, format=fmt, errors="coerce", utc=True)
    return t.dt.as_unit("us").to_numpy(dtype="datetime64[us]", na_value=np.datetime64("NaT")
                                      ).astype(np.int64)


def _angle(vals: np.ndarray, hemi: np.ndarray | None, neg: str, ddmm: bool, maxdeg: float
           ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """(degrees, malformed, out_of_range)."""
    bad = np.zeros(len(vals), dtype=bool)
    sign = np.sign(vals)
    sign[sign == 0] = 1
    mag = np.abs(vals)
    if ddmm:
        deg = np.floor(mag / 100.0)
        minutes = mag - deg * 100.0
        rng = minutes >= 60.0
        mag = deg + minutes / 60.0
    else:
        rng = np.zeros(len(vals), dtype=bool)
    if hemi is not None:
        h = np.char.upper(np.char.strip(hemi.astype(str), " \"'"))
        bad |= ~np.isin(h, ["N", "S", "E", "W"])
        sign = np.where(h == neg, -1.0, 1.0) * sign
    rng |= mag > maxdeg
    return sign * mag, bad, rng


def parse_delimited(data: bytes, *, profile: Profile, node: str, raw_hash: str) -> ParseResult:
    """Parse delimited text with ``profile``; bad lines become rejects, never exceptions."""
    buf = np.frombuffer(data, dtype=np.uint8)
    starts, ends, n = split_lines(buf, True)
    starts, ends = starts[:n], ends[:n]
    status = np.full(n, _OK, dtype=np.int8)
    lengths = ends - starts
    texts = line_texts(buf, starts, ends, limit=1 << 30)
    binary = np.zeros(n, dtype=bool)
    if n:
        bad_byte = (buf < 32) & (buf != 9) | (buf > 126)
        bad_byte[buf == 10] = False
        bad_byte[buf == 13] = False
        cum = np.concatenate([[0], np.cumsum(bad_byte)])
        binary = (cum[ends] - cum[starts]) > 0
    stripped = pc.utf8_trim_whitespace(texts)
    blank = pc.equal(pc.utf8_length(stripped), 0).to_numpy(zero_copy_only=False)
    status[blank | (lengths == 0)] = _IGN
    if profile.comment:
        com = pc.starts_with(stripped, profile.comment).to_numpy(zero_copy_only=False)
        status[com] = _IGN
    status[binary] = _BIN
    # lines before the data: skipped lines, then the header
    candidates = np.flatnonzero(status == _OK)
    head_names: list[str] = []
    skip = profile.skip_lines + (1 if profile.header else 0)
    if candidates.size:
        pre = candidates[:skip]
        status[pre] = _IGN
        if profile.header and len(pre) == skip:
            line = texts[int(pre[-1])].as_py()
            head_names = [x.strip().strip("\"'") for x in line.split(profile.delimiter)]
    if not (status == _OK).any():
        return _result(buf, starts, ends, status, _table(np.zeros(0, np.int64), *[np.zeros(0)] * 3,
                                                         {}, profile, node, raw_hash))
    index: dict[str, int] = {}
    for key, ref in profile.columns.items():
        if isinstance(ref, int):
            index[key] = ref - 1
        elif ref in head_names:
            index[key] = head_names.index(ref)
        else:
            from archive.errors import InputError

            raise InputError(profile.source, f"column {ref!r} (columns.{key}) is not in the "
                             "header of the log", expected=", ".join(head_names) or "a header",
                             hint="fix the profile's column names")
    rows = np.flatnonzero(status == _OK)
    fields = pc.split_pattern(pc.take(texts, pa.array(rows)), profile.delimiter)
    nfield = pc.list_value_length(fields).to_numpy(zero_copy_only=False)
    enough = nfield > max(index.values())
    status[rows[~enough]] = _UNREAD
    rows, fields = rows[enough], pc.filter(fields, pa.array(enough))
    cols = {k: pc.list_element(fields, i) for k, i in index.items()}
    bad = np.zeros(len(rows), dtype=bool)
    rng = np.zeros(len(rows), dtype=bool)
    nums: dict[str, np.ndarray] = {}
    for k in ("lat", "lon", "height", "geoid_sep", "quality", "n_sats", "pdop", "hdop", "vdop",
              "fix_type"):
        if k in cols:
            v, b = _numbers(cols[k])
            nums[k] = v
            bad |= b
    t = _times(cols["time"], profile.time_format) if len(rows) else np.zeros(0, np.int64)
    bad |= t == np.iinfo(np.int64).min
    bad |= ~np.isfinite(nums["lat"]) | ~np.isfinite(nums["lon"])
    ddmm = profile.coordinates == "ddmm"
    hemi_lat = cols["lat_hemisphere"].to_numpy(zero_copy_only=False) if "lat_hemisphere" in cols \
        else None
    hemi_lon = cols["lon_hemisphere"].to_numpy(zero_copy_only=False) if "lon_hemisphere" in cols \
        else None
    lat, b1, r1 = _angle(nums["lat"], hemi_lat, "S", ddmm, 90.0)
    lon, b2, r2 = _angle(nums["lon"], hemi_lon, "W", ddmm, 180.0)
    bad |= b1 | b2
    rng |= r1 | r2
    q = nums.get("quality", np.full(len(rows), -1.0))
    rng |= np.isfinite(q) & ((q < -1) | (q > 8))
    rng &= ~bad
    status[rows[bad]] = _MALF
    status[rows[rng]] = _RANGE
    keep = ~bad & ~rng
    fixes = _table(rows[keep], t[keep], lat[keep], lon[keep],
                   {k: v[keep] for k, v in nums.items()}, profile, node, raw_hash)
    return _result(buf, starts, ends, status, fixes)


def _result(buf, starts, ends, status, fixes: pa.Table) -> ParseResult:
    n = len(status)
    rj = np.flatnonzero(status >= _BIN)
    rejects = rejects_table(rj + 1, _NAMES[status[rj]], line_texts(buf, starts[rj], ends[rj])
                            ) if rj.size else empty_rejects()
    n_acc = int((status == _OK).sum())
    n_ign = int((status == _IGN).sum())
    return ParseResult(fixes, rejects, n, n_acc, n - n_acc - n_ign, n_ign)


def _table(lines, t, lat, lon, nums, profile: Profile, node: str, raw_hash: str) -> pa.Table:
    m = len(lines)
    nan = np.full(m, np.nan)

    def f64(x):
        return pa.array(x, pa.float64(), mask=~np.isfinite(x))

    def f32(x):
        return pa.array(x.astype(np.float32), pa.float32(), mask=~np.isfinite(x))

    def ints(x, typ):
        ok = np.isfinite(x)
        return pa.array(np.where(ok, x, 0).astype(typ.to_pandas_dtype()), typ, mask=~ok)

    h = nums.get("height", nan)
    sep = nums.get("geoid_sep", nan)
    if profile.height_kind == "ellipsoidal":
        h_ell, h_msl = h, nan
    else:
        h_ell, h_msl = h + sep, h
    q = nums.get("quality", np.full(m, -1.0))
    q = np.where(np.isfinite(q), q, -1).astype(np.int8)
    cols = {
        "node": constant_strings(node, m),
        "time": pa.array(t.astype("datetime64[us]"), FIX_SCHEMA.field("time").type),
        "lat": pa.array(lat, pa.float64()), "lon": pa.array(lon, pa.float64()),
        "h_ell": f64(h_ell), "h_msl": f64(h_msl), "geoid_sep": f64(sep),
        "quality": pa.array(q, pa.int8()),
        "fix_type": ints(nums.get("fix_type", nan), pa.int8()),
        "valid": pa.array(q != 0),
        "n_sats": ints(nums.get("n_sats", nan), pa.int16()),
        "pdop": f32(nums.get("pdop", nan)), "hdop": f32(nums.get("hdop", nan)),
        "vdop": f32(nums.get("vdop", nan)),
        "raw_hash": constant_strings(raw_hash, m),
        "raw_line": pa.array(lines + 1, pa.int64()),
        "sentence": pa.nulls(m, pa.string()),
        # a record saying nothing of its quality: no quality, satellites or HDOP column
        "no_quality": pa.array((q < 0) & ~np.isfinite(nums.get("n_sats", nan))
                               & ~np.isfinite(nums.get("hdop", nan))),
        "weeks_added": pa.array(np.zeros(m, np.int16), pa.int16()),
    }
    return sort_fixes(pa.table(cols, schema=FIX_SCHEMA))


def parse_log(data: bytes, options: LogOptions) -> ParseResult:
    """The ``delimited`` log format's parse function (:mod:`archive.ingest.formats`): the
    profile named in ``options`` is read (and checked) here."""
    from archive.ingest.profile import load_profile

    if not options.profile_path:
        raise UsageError("delimited logs need a profile",
                         hint="pass --profile FILE (see docs/ingest.md)")
    return parse_delimited(data, profile=load_profile(options.profile_path), node=options.node,
                           raw_hash=options.raw_hash)
