"""Mapping profiles: how the columns of a logger's delimited text become canonical fixes.

A profile is a small TOML file (see ``docs/ingest.md``)::

    [format]
    delimiter = ","            # one character; "\\t" for TSV
    header = true              # the first line (after skip_lines) names the columns
    skip_lines = 0             # lines before the header (or before the data)
    comment = "#"              # lines starting with this are ignored ("" for none)

    [columns]                  # a column name (with header) or a 1-based position
    time = "utc"
    lat = "latitude"
    lon = "longitude"
    height = "alt"             # optional
    geoid_sep = "sep"          # optional
    quality = "fix"            # optional; n_sats, pdop, hdop, vdop, fix_type optional too
    lat_hemisphere = "ns"      # only with coordinates = "ddmm"
    lon_hemisphere = "ew"

    [time]
    format = "%Y-%m-%d %H:%M:%S"   # strptime codes, or "iso8601", or "unix" (seconds)

    [coordinates]
    format = "degrees"         # or "ddmm" (ddmm.mmmm, hemisphere letter or sign)

    [height]
    kind = "ellipsoidal"       # or "msl" (above mean sea level; geoid_sep optional)
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from archive.errors import InputError

REQUIRED_COLUMNS = ("time", "lat", "lon")
OPTIONAL_COLUMNS = ("height", "geoid_sep", "quality", "n_sats", "pdop", "hdop", "vdop",
                    "fix_type", "lat_hemisphere", "lon_hemisphere")
SECTIONS = {"format", "columns", "time", "coordinates", "height"}


@dataclass(frozen=True)
class Profile:
    """A validated mapping profile."""

    columns: dict[str, str | int]
    delimiter: str = ","
    header: bool = True
    skip_lines: int = 0
    comment: str = "#"
    time_format: str = "iso8601"
    coordinates: str = "degrees"
    height_kind: str = "ellipsoidal"
    source: str = "<profile>"
    extra: dict[str, Any] = field(default_factory=dict)


def _fail(path: str, key: str, problem: str, expected: str | None = None) -> InputError:
    return InputError(path, f"key {key!r}: {problem}", expected=expected,
                      hint="fix the profile (see docs/ingest.md)")


def profile_from_dict(d: dict[str, Any], source: str = "<profile>") -> Profile:
    """Validate a profile given as a dict (the parsed TOML)."""
    unknown = set(d) - SECTIONS
    if unknown:
        raise _fail(source, sorted(unknown)[0], "unknown section",
                    expected="one of " + ", ".join(sorted(SECTIONS)))
    fmt = d.get("format", {})
    cols = d.get("columns")
    if not isinstance(cols, dict):
        raise _fail(source, "columns", "missing section", expected="a [columns] table")
    for k in cols:
        if k not in REQUIRED_COLUMNS + OPTIONAL_COLUMNS:
            raise _fail(source, f"columns.{k}", "unknown column",
                        expected="one of " + ", ".join(REQUIRED_COLUMNS + OPTIONAL_COLUMNS))
    for k in REQUIRED_COLUMNS:
        if k not in cols:
            raise _fail(source, f"columns.{k}", "missing", expected="a column name or position")
    header = fmt.get("header", True)
    if not isinstance(header, bool):
        raise _fail(source, "format.header", f"{header!r} is not true/false")
    for k, v in cols.items():
        ok = (isinstance(v, str) and v != "") if header else (isinstance(v, int) and v >= 1)
        if isinstance(v, int) and not isinstance(v, bool) and v >= 1:
            ok = True
        if not ok:
            raise _fail(source, f"columns.{k}", f"{v!r} is not a column",
                        expected="a column name (with header = true) or a 1-based position")
    delim = fmt.get("delimiter", ",")
    if not isinstance(delim, str) or len(delim) != 1 or delim in "\r\n\"":
        raise _fail(source, "format.delimiter", f"{delim!r} is not a single character",
                    expected='"," or "\\t" or ";"')
    skip = fmt.get("skip_lines", 0)
    if not isinstance(skip, int) or isinstance(skip, bool) or skip < 0:
        raise _fail(source, "format.skip_lines", f"{skip!r}", expected="a whole number >= 0")
    comment = fmt.get("comment", "#")
    if not isinstance(comment, str):
        raise _fail(source, "format.comment", f"{comment!r}", expected="a string")
    tfmt = d.get("time", {}).get("format", "iso8601")
    if not isinstance(tfmt, str) or not (tfmt in ("iso8601", "unix") or "%" in tfmt):
        raise _fail(source, "time.format", f"{tfmt!r}",
                    expected='"iso8601", "unix" or strptime codes such as "%Y-%m-%d %H:%M:%S"')
    coords = d.get("coordinates", {}).get("format", "degrees")
    if coords not in ("degrees", "ddmm"):
        raise _fail(source, "coordinates.format", f"{coords!r}", expected='"degrees" or "ddmm"')
    hkind = d.get("height", {}).get("kind", "ellipsoidal")
    if hkind not in ("ellipsoidal", "msl"):
        raise _fail(source, "height.kind", f"{hkind!r}", expected='"ellipsoidal" or "msl"')
    if "geoid_sep" in cols and hkind != "msl":
        raise _fail(source, "columns.geoid_sep", "a geoid separation goes with height.kind = "
                    '"msl"', expected='height.kind = "msl"')
    return Profile(columns=dict(cols), delimiter=delim, header=header, skip_lines=skip,
                   comment=comment, time_format=tfmt, coordinates=coords, height_kind=hkind,
                   source=source)


def load_profile(path: str | Path) -> Profile:
    """Read and validate a TOML profile; errors name the file and the key."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            d = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(str(path), "no such profile file") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(str(path), f"not valid TOML: {exc}",
                         hint="fix the profile (see docs/ingest.md)") from None
    return profile_from_dict(d, str(path))
