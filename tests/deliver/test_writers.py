"""Exchange-format writers read back by independent readers (tests/deliver/helpers.py)."""

from __future__ import annotations

import csv
import io
import json
from datetime import UTC, datetime

import numpy as np
import pyarrow as pa
import pytest
from pyproj import Transformer

from archive.deliver.context import POSITION_MAPPED, TIME_BASIS
from archive.deliver.csvfile import CSV_COLUMNS, write_csv
from archive.deliver.gis import write_geojson, write_gpkg
from archive.deliver.segp1 import write_segp1
from archive.deliver.sps import write_sps
from archive.errors import Refused
from tests.support.delivery_tables import context, final_table, read_segp1, read_sps_r


def test_sps_synthetic_vector_exact():
    # synthetic round-trip vector laid out by SEG SPS format rev 2.1 (2006), point record
    # layout (computed, matches the spec's column table).
    expected = ("R   1001.00   2001.00  1G1   0 0.0   0 0   0.0 500123.4 6123456.7 "
                "123.4123123456")
    assert len(expected) == 80
    t = pa.table({
        "line": [1001.0], "point": [2001.0], "index": pa.array([1], pa.int8()),
        "code": ["G1"], "static": [0.0], "point_depth": [0.0], "datum": [0.0],
        "uphole": [0.0], "water_depth": [0.0], "easting": [500123.4],
        "northing": [6123456.7], "height": [123.4],
        # day 123 of 2024 is 2 May (leap year): 2024-01-01 + 122 days; the day/time
        # columns hold when the node was laid out (the occupation's start)
        "deployed": pa.array([datetime(2024, 5, 2, 12, 34, 56, tzinfo=UTC)],
                             pa.timestamp("us", tz="UTC")),
    })
    text = write_sps(t, context()).decode("ascii")
    records = [r for r in text.splitlines() if r.startswith("R")]
    assert records == [expected]


def test_sps_read_back_column_by_column():
    t = final_table(40)
    text = write_sps(t, context()).decode("ascii")
    lines = text.splitlines()
    assert all(len(r) == 80 for r in lines)
    rows = read_sps_r(text)
    assert len(rows) == t.num_rows
    d = t.to_pydict()
    for i, r in enumerate(rows):
        # SPS rev 2.1 precisions: F10.2 line/point, F9.1 / F10.1 grid, F6.1 elevation.
        assert r["line"] == pytest.approx(d["line"][i], abs=0.005)
        assert r["point"] == pytest.approx(d["point"][i], abs=0.005)
        assert r["blank"] == "  "
        assert r["index"] == 1
        assert r["easting"] == pytest.approx(d["easting"][i], abs=0.05 + 1e-9)
        assert r["northing"] == pytest.approx(d["northing"][i], abs=0.05 + 1e-9)
        assert r["elevation"] == pytest.approx(d["height"][i], abs=0.05 + 1e-9)
        te = d["deployed"][i]  # day/time columns: when the node was laid out
        assert r["doy"] == te.timetuple().tm_yday
        assert r["time"] == te.strftime("%H%M%S")
        assert r["static"] is None and r["water"] is None  # not known: left blank


def test_sps_header_states_crs_datum_units_and_run():
    text = write_sps(final_table(3), context()).decode("ascii")
    heads = {r[:4].strip(): r[32:].strip() for r in text.splitlines() if r.startswith("H")}
    assert all(len(r) == 80 for r in text.splitlines())
    assert heads["H00"].startswith("SPS 2.1")
    assert "EPSG:32614" in heads["H13"] and "UTM zone 14N" in heads["H13"]
    assert "WGS 84" in heads["H12"]
    assert heads["H17"] == "NAVD88 (model)"
    assert heads["H20"] == "metre"
    assert heads["H03"] == "Harrow Basin Energy"
    # UTM zone 14N central meridian -99 degrees (EPSG:32614 definition, read through pyproj)
    assert heads["H22"].startswith("-99")
    h26 = [r[32:].strip() for r in text.splitlines() if r.startswith("H26")]
    assert "a" * 48 in h26 and "a" * 16 in h26 and "b" * 48 in h26  # run id over 2 records
    assert TIME_BASIS in h26 and POSITION_MAPPED in h26  # stated in full, not cut at col 80


@pytest.mark.parametrize("field,value,cols", [
    ("easting", 12_345_678.9, "47-55"), ("northing", 123_456_789.0, "56-65"),
    ("height", 12_345.6, "66-71"), ("line", 12_345_678.0, "2-11"),
])
def test_sps_refuses_values_that_do_not_fit(field, value, cols):
    t = final_table(4)
    arr = t.column(field).to_numpy().copy()
    arr[1] = value
    t = t.set_column(t.schema.get_field_index(field), field, pa.array(arr))
    with pytest.raises(Refused) as exc:
        write_sps(t, context())
    msg = str(exc.value)
    assert "/2002 index 1" in msg and "station " in msg and cols in msg and "CSV" in msg


def test_segp1_read_back_and_lat_lon_against_pyproj():
    t = final_table(30)
    text = write_segp1(t, context()).decode("ascii")
    headers, rows = read_segp1(text)
    assert len(headers) == 20  # GDAL's SEG-P1 reader skips a 20-record header (§7.2)
    assert all(len(h) == 80 for h in headers)
    assert len(rows) == t.num_rows
    d = t.to_pydict()
    # Reference: pyproj inverse UTM 14N -> WGS 84 geographic, built here independently.
    tr = Transformer.from_crs("EPSG:32614", "EPSG:4326", always_xy=True)
    lon, lat = tr.transform(np.array(d["easting"]), np.array(d["northing"]))
    for i, r in enumerate(rows):
        assert r["id"] == " " and r["reshoot"] == " " and r["spare"] == "   "
        assert r["line"] == f"{int(d['line'][i]):<16d}"
        assert r["point"] == int(d["point"][i])
        # 0.01 arc-second rounding: half a hundredth of a second = 1.39e-6 degree
        assert r["lat"] == pytest.approx(lat[i], abs=0.005 / 3600 + 1e-12)
        assert r["lon"] == pytest.approx(lon[i], abs=0.005 / 3600 + 1e-12)
        # easting fits 8 columns with 0.1 m; a 7-digit northing only as whole metres
        assert r["easting"] == pytest.approx(d["easting"][i], abs=0.05 + 1e-9)
        assert r["northing"] == pytest.approx(d["northing"][i], abs=0.5 + 1e-9)
        assert r["elevation"] == pytest.approx(d["height"][i], abs=0.05 + 1e-9)
        te = d["deployed"][i]  # day/time columns: when the node was laid out
        assert r["year"] == te.year % 100
        assert r["doy"] == te.timetuple().tm_yday and r["time"] == te.strftime("%H%M%S")
    text = " ".join(x[4:].strip() for x in headers)
    assert "Grid units: metre; precision E 0.1, N 1" in text
    assert "Transverse Mercator" in text and "lon0=-99deg" in text
    assert f"Time basis: {TIME_BASIS}" in text and f"Position mapped: {POSITION_MAPPED}" in text


def test_segp1_southern_western_hemisphere():
    # A point in the southern/western hemisphere: UTM zone 23S (EPSG:32723) near 47 W, 16 S.
    tr = Transformer.from_crs("EPSG:4326", "EPSG:32723", always_xy=True)
    e, n = tr.transform(-47.123456, -15.987654)
    t = final_table(1).set_column(4, "easting", pa.array([e])).set_column(
        5, "northing", pa.array([n]))
    _, rows = read_segp1(write_segp1(t, context(crs_epsg=32723)).decode("ascii"))
    assert rows[0]["lat"] == pytest.approx(-15.987654, abs=0.005 / 3600 + 1e-9)
    assert rows[0]["lon"] == pytest.approx(-47.123456, abs=0.005 / 3600 + 1e-9)


@pytest.mark.parametrize("field,value,what", [
    ("northing", 123_456_789.0, "northing"), ("height", 123_456.0, "elevation"),
    ("point", 2001.5, "whole number"), ("index", 10, "point index"),
])
def test_segp1_refuses_unfit_values(field, value, what):
    t = final_table(4)
    arr = t.column(field).to_numpy().copy()
    arr[1] = value
    t = t.set_column(t.schema.get_field_index(field), field, pa.array(arr, t.schema.field(field).type))
    with pytest.raises(Refused) as exc:
        write_segp1(t, context())
    msg = str(exc.value)
    assert "station 1001/" in msg and what in msg and "SPS" in msg and "CSV" in msg


def test_csv_full_precision_and_flags():
    t = final_table(5)
    flags = ["", "far-from-plan;moved", "", "", ""]
    t = t.set_column(t.schema.get_field_index("flags"), "flags", pa.array(flags))
    rows = list(csv.DictReader(io.StringIO(write_csv(t, context()).decode("utf-8"))))
    assert list(rows[0])[:15] == list(CSV_COLUMNS)[:15]
    for i, r in enumerate(rows):
        assert float(r["easting"]) == t.column("easting")[i].as_py()  # bit-exact round trip
        assert float(r["northing"]) == t.column("northing")[i].as_py()
        assert r["flags"] == flags[i] and r["crs"] == "EPSG:32614"
    assert rows[1]["flags"].split(";") == ["far-from-plan", "moved"]


def test_geojson_rfc7946_lonlat_from_pyproj():
    t = final_table(6)
    doc = json.loads(write_geojson(t, context()))
    assert doc["type"] == "FeatureCollection" and "crs" not in doc  # RFC 7946 §4: no crs member
    tr = Transformer.from_crs("EPSG:32614", "EPSG:4326", always_xy=True)
    for i, f in enumerate(doc["features"]):
        lon, lat = tr.transform(t.column("easting")[i].as_py(), t.column("northing")[i].as_py())
        # RFC 7946 §3.1.1: lon first. The survey's heights follow the receivers' own geoid
        # (GGA): no path to the ellipsoid, so no third value (§4: it would have to be a
        # height above the WGS 84 ellipsoid); the orthometric height stays a property.
        x, y = f["geometry"]["coordinates"]
        assert (x, y) == pytest.approx((lon, lat), abs=1e-9)
        assert f["properties"]["easting"] == t.column("easting")[i].as_py()
        assert f["properties"]["height"] == t.column("height")[i].as_py()
        assert f["properties"]["vertical_datum"] == "NAVD88 (model)"
    assert doc["nodekeep"]["ellipsoidal_height"].startswith("none")


def test_geojson_third_value_is_height_above_the_ellipsoid_constant():
    """RFC 7946 §3.1.1 (third element: altitude) and §4 (height in metres above or below the
    WGS 84 reference ellipsoid): with a constant separation N = 26.5 m, h = H + N."""
    t = final_table(4)
    doc = json.loads(write_geojson(t, context(height_mode="constant", height_param="26.5")))
    for i, f in enumerate(doc["features"]):
        assert len(f["geometry"]["coordinates"]) == 3
        h = f["geometry"]["coordinates"][2]
        assert h == pytest.approx(t.column("height")[i].as_py() + 26.5, abs=1e-9)
        assert f["properties"]["height"] == t.column("height")[i].as_py()  # orthometric
        assert f["properties"]["geoid_separation"] == 26.5


def test_geojson_third_value_through_a_geoid_grid(tmp_path):
    """h = H + N(lon, lat) with N read by PROJ from a geoid grid: N = -30 + 2(lon + 99) +
    3(lat - 31) is linear, so bilinear interpolation gives it exactly; a station off the grid
    gets two coordinates, never a guess (RFC 7946 §3.1.1: the third element is optional)."""
    from tests.support.rasters import write_gtx

    lats = 31.0 + 0.5 * np.arange(5)
    lons = -99.0 + 0.5 * np.arange(5)
    n_grid = -30 + 2 * (lons[None, :] + 99) + 3 * (lats[:, None] - 31)
    grid = tmp_path / "kestrel_geoid.gtx"
    write_gtx(grid, lats[0], lons[0], 0.5, 0.5, n_grid)
    t = final_table(4)
    far = t.column("easting").to_pylist()
    far[3] = 900_000.0  # about 2.3 degrees further east: outside the grid
    t = t.set_column(t.schema.get_field_index("easting"), "easting", pa.array(far))
    doc = json.loads(write_geojson(t, context(height_mode="grid", height_param=str(grid))))
    tr = Transformer.from_crs("EPSG:32614", "EPSG:4326", always_xy=True)
    for i, f in enumerate(doc["features"][:3]):
        lon, lat = tr.transform(t.column("easting")[i].as_py(), t.column("northing")[i].as_py())
        n = -30 + 2 * (lon + 99) + 3 * (lat - 31)
        assert f["geometry"]["coordinates"][2] == pytest.approx(
            t.column("height")[i].as_py() + n, abs=1e-3)
    assert len(doc["features"][3]["geometry"]["coordinates"]) == 2


def test_gpkg_read_back_through_gdal(tmp_path):
    import pyogrio

    t = final_table(6)
    path = tmp_path / "r.gpkg"
    path.write_bytes(write_gpkg(t, context()))
    info = pyogrio.read_info(path, layer="receivers")
    assert info["features"] == 6 and "32614" in info["crs"]
    meta, table = pyogrio.read_arrow(path, layer="receivers")
    geoms = table.column(meta["geometry_name"] or "wkb_geometry").to_pylist()
    xy = np.array([np.frombuffer(g[-16:], "<f8") for g in geoms])  # GPKG header + WKB point
    np.testing.assert_allclose(xy[:, 0], t.column("easting").to_numpy(), atol=1e-9)
    np.testing.assert_allclose(xy[:, 1], t.column("northing").to_numpy(), atol=1e-9)
