"""Delimited logs through mapping profiles, and the profile's own error messages."""

from __future__ import annotations

import datetime as dt

import pytest

from archive.errors import InputError
from archive.ingest.delimited import parse_delimited
from archive.ingest.profile import load_profile, profile_from_dict

H = "c" * 64

DDMM_PROFILE = """
[format]
delimiter = "\\t"
header = true
skip_lines = 1

[columns]
time = "utc"
lat = "lat"
lat_hemisphere = "ns"
lon = "lon"
lon_hemisphere = "ew"
height = "alt"
geoid_sep = "sep"
quality = "fix"
n_sats = "sv"
hdop = "hdop"

[time]
format = "%d/%m/%Y %H:%M:%S"

[coordinates]
format = "ddmm"

[height]
kind = "msl"
"""


def test_tsv_ddmm_msl(tmp_path):
    p = tmp_path / "logger.toml"
    p.write_text(DDMM_PROFILE)
    prof = load_profile(p)
    data = (b"Bluestem crew 7 node export\r\n"
            b"utc\tlat\tns\tlon\tew\talt\tsep\tfix\tsv\thdop\r\n"
            # the coordinates of DePriest's GGA example, 4807.038 N 01131.000 E
            b"23/03/1994 12:35:19\t4807.038\tN\t01131.000\tE\t545.4\t46.9\t1\t8\t0.9\r\n"
            b"\r\n"
            b"23/03/1994 12:35:20\t3330.000\tS\t07015.000\tW\t10.0\t\t0\t3\t\r\n")
    r = parse_delimited(data, profile=prof, node="KF-7", raw_hash=H)
    assert (r.n_lines, r.n_accepted, r.n_rejected, r.n_ignored) == (5, 2, 0, 3)
    d = r.fixes.to_pydict()
    assert d["time"][0] == dt.datetime(1994, 3, 23, 12, 35, 19, tzinfo=dt.UTC)
    assert d["lat"][0] == pytest.approx(48 + 7.038 / 60)  # DePriest: 48.1173 N
    assert d["lon"][0] == pytest.approx(11 + 31 / 60)
    assert d["h_ell"][0] == pytest.approx(592.3)  # 545.4 m MSL + 46.9 m separation
    assert (d["lat"][1], d["lon"][1]) == (pytest.approx(-33.5), pytest.approx(-70.25))
    assert d["h_msl"][1] == 10.0 and d["h_ell"][1] is None  # no separation: unknown
    assert d["valid"] == [True, False] and d["raw_line"] == [3, 5]


def test_csv_degrees_iso_positional_columns():
    prof = profile_from_dict({"format": {"header": False},
                              "columns": {"time": 1, "lat": 2, "lon": 3, "height": 4}})
    data = (b"2024-03-01T06:00:00Z,35.5,-101.25,880.5\n"
            b"2024-03-01T06:00:01.5Z,35.5,-101.25,880.6\n"
            b"2024-03-01T06:00:02Z,135.5,-101.25,880.6\n"
            b"2024-03-01T06:00:03Z,abc,-101.25,880.6\n"
            b"2024-03-01T06:00:04Z,35.5\n")
    r = parse_delimited(data, profile=prof, node="n", raw_hash=H)
    assert r.rejects.to_pydict()["reason"] == ["out-of-range", "malformed", "unreadable"]
    d = r.fixes.to_pydict()
    assert d["time"][1] == dt.datetime(2024, 3, 1, 6, 0, 1, 500000, tzinfo=dt.UTC)
    assert d["h_ell"] == [880.5, 880.6] and d["quality"] == [-1, -1]


@pytest.mark.parametrize("text,key", [
    ("[columns]\nlat='a'\nlon='b'\n", "columns.time"),
    ("[columns]\ntime='t'\nlat='a'\nlon='b'\nspeed='s'\n", "columns.speed"),
    ("[format]\ndelimiter=',,'\n[columns]\ntime='t'\nlat='a'\nlon='b'\n", "format.delimiter"),
    ("[columns]\ntime='t'\nlat='a'\nlon='b'\n[coordinates]\nformat='dms'\n",
     "coordinates.format"),
    ("[columns]\ntime='t'\nlat='a'\nlon='b'\n[height]\nkind='geoid'\n", "height.kind"),
    ("[colums]\ntime='t'\n", "colums"),
])
def test_profile_errors_name_file_and_key(tmp_path, text, key):
    p = tmp_path / "bad.toml"
    p.write_text(text)
    with pytest.raises(InputError) as exc:
        load_profile(p)
    assert str(p) in str(exc.value) and repr(key) in str(exc.value)


def test_profile_not_toml_and_missing_header_column(tmp_path):
    p = tmp_path / "broken.toml"
    p.write_text("[columns\n")
    with pytest.raises(InputError, match="not valid TOML"):
        load_profile(p)
    prof = profile_from_dict({"columns": {"time": "t", "lat": "lat", "lon": "longitude"}},
                             "kf.toml")
    with pytest.raises(InputError, match=r"kf.toml: column 'longitude' \(columns.lon\)"):
        parse_delimited(b"t,lat,lon\n2024-03-01T00:00:00Z,1,2\n", profile=prof, node="n",
                        raw_hash=H)
