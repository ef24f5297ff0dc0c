"""Loading survey inputs: versions, custody (objects, ledger, verify), validation refusals."""

from __future__ import annotations

import json

import numpy as np
import pytest
from sqlalchemy import select

from archive.errors import InputError, UsageError
from archive.store.models import LedgerEvent
from archive.store.verify import verify_archive
from archive.survey.dem import open_dem
from archive.survey.inputs import current_input, list_inputs, load_input, survey_for
from archive.survey.schema import CONTROL_SCHEMA, STATION_SCHEMA
from tests.support.rasters import write_tif

STATIONS = """line,point,easting,northing,elevation,code
1001,2001,612000.0,3890000.0,301.2,G1
1001,2002,612025.0,3890000.0,,G1
1005,2001,612000.0,3890200.0,305.0,
"""


def write(tmp_path, name, text):
    p = tmp_path / name
    p.write_text(text)
    return p


def sid(arc):
    return survey_for(arc).id


def test_versions_stay_queryable_and_custody_holds(survey_arc, tmp_path):
    arc = survey_arc
    v1 = load_input(arc, sid(arc), "stations", write(tmp_path, "pre1.csv", STATIONS))
    changed = STATIONS.replace("612025.0", "612026.5")
    v2 = load_input(arc, sid(arc), "stations", write(tmp_path, "pre2.csv", changed))
    assert (v1.version.version, v2.version.version) == (1, 2)
    row, table = current_input(arc, sid(arc), "stations")
    assert row.version == 2 and table.schema.equals(STATION_SCHEMA, check_metadata=True)
    assert table["easting"].to_pylist()[1] == 612026.5
    old_row, old = current_input(arc, sid(arc), "stations", version=1)
    assert old_row.source_hash == v1.version.source_hash and old["easting"][1].as_py() == 612025.0
    assert old["elevation"].to_pylist() == [301.2, None, 305.0]
    assert old["src_line"].to_pylist() == [2, 3, 4]
    # the source bytes are stored as they came
    assert arc.objects.read_bytes(old_row.source_hash) == STATIONS.encode()
    listed = list_inputs(arc, sid(arc))
    assert [(d["kind"], d["version"], d["current"]) for d in listed] == [("stations", 2, True)]
    assert len(list_inputs(arc, sid(arc), all_versions=True)) == 2
    with arc.session() as s:
        events = s.scalars(select(LedgerEvent).where(LedgerEvent.action == "load.stations")).all()
    assert len(events) == 2
    payload = json.loads(events[1].payload)
    assert payload["source"] == v2.version.source_hash and payload["version"] == 2
    assert payload["rows"][0]["table"] == "input_versions"
    report = verify_archive(arc)
    assert report.ok, report.as_dict()
    with pytest.raises(UsageError, match="no stations version 7"):
        current_input(arc, sid(arc), "stations", version=7)
    assert current_input(arc, sid(arc), "control") is None


def test_duplicate_station_refused_with_lines(survey_arc, tmp_path):
    text = STATIONS + "1001,2002,612030.0,3890001.0,,\n"
    with pytest.raises(InputError) as err:
        load_input(survey_arc, sid(survey_arc), "stations", write(tmp_path, "d.csv", text))
    assert "appears on lines 3, 5" in str(err.value) and err.value.columns == "line,point,index"
    assert list_inputs(survey_arc, sid(survey_arc)) == []


def test_outside_area_of_use_refused(survey_arc, tmp_path):
    # 150000 E lies west of 102°W at this northing: outside EPSG:32614's area of use
    text = STATIONS + "1009,2001,150000.0,3890000.0,,\n"
    with pytest.raises(InputError, match=r"d\.csv:5: 1 record\(s\) lie outside the area of use"):
        load_input(survey_arc, sid(survey_arc), "stations", write(tmp_path, "d.csv", text))
    # swapped columns are caught the same way
    swapped = "line,point,easting,northing\n1,1,3890000.0,612000.0\n"
    with pytest.raises(InputError, match="swapped"):
        load_input(survey_arc, sid(survey_arc), "stations", write(tmp_path, "s.csv", swapped))


def test_unparseable_csv_value_names_line_and_column(survey_arc, tmp_path):
    text = STATIONS + "1009,2001,61200O.0,3890000.0,,\n"
    with pytest.raises(InputError) as err:
        load_input(survey_arc, sid(survey_arc), "stations", write(tmp_path, "d.csv", text))
    e = err.value
    assert (e.line, e.columns) == (5, "easting") and "61200O.0" in str(e)
    with pytest.raises(InputError, match="missing column"):
        load_input(survey_arc, sid(survey_arc), "stations",
                   write(tmp_path, "m.csv", "line,point,x,y\n1,1,2,3\n"))


def test_stations_from_sps_keep_headers(survey_arc, tmp_path):
    rec = "R   1001.00   2001.00  1G1   0 0.0   0 0   0.0 612000.0 3890000.0 301.2123123456"
    src = "S   1001.00   2001.00  1E1   0 0.0   0 0   0.0 612000.0 3890000.0 301.2123123456"
    text = "H00 SPS format version num.     SPS V2.1\nH01 Survey area                 Kestrel Flats 3D\n"
    text += rec + "\n" + src + "\n"
    res = load_input(survey_arc, sid(survey_arc), "stations", write(tmp_path, "pre.sps", text))
    assert res.meta["format"] == "sps" and res.meta["counts"] == {"R": 1, "S": 1}
    row, _ = current_input(survey_arc, sid(survey_arc), "stations")
    meta = json.loads(row.meta)
    assert meta["headers"] == [["H00", "SPS format version num.", "SPS V2.1"],
                               ["H01", "Survey area", "Kestrel Flats 3D"]]


def test_control_points_csv_and_sps(survey_arc, tmp_path):
    arc = survey_arc
    load_input(arc, sid(arc), "stations", write(tmp_path, "pre.csv", STATIONS))
    text = ("line,point,easting,northing,height,surveyed_utc,method,sigma_e,sigma_n,sigma_h\n"
            "1001,2001,612000.4,3890000.3,301.05,2024-05-02T15:04:05Z,RTK,0.01,0.01,0.02\n"
            "1001,2001,612000.5,3890000.2,301.07,2024-05-09T10:00:00+02:00,RTK,,,\n"
            "1077,2001,612000.5,3890000.2,,,,,,\n")
    res = load_input(arc, sid(arc), "control", write(tmp_path, "rtk.csv", text))
    t = res.table
    assert t.schema.equals(CONTROL_SCHEMA, check_metadata=True)
    assert [w["code"] for w in res.warnings] == ["repeated", "unknown-station"]
    assert [w["line"] for w in res.warnings] == [3, 4]
    # +02:00 converted to UTC
    assert t["surveyed"][1].as_py().isoformat() == "2024-05-09T08:00:00+00:00"
    assert t["sigma_h"].to_pylist() == [0.02, None, None]
    sps = "R   1001.00   2002.00  1G1   0 0.0   0 0   0.0 612025.3 3890000.1 300.9123123456\n"
    res2 = load_input(arc, sid(arc), "control", write(tmp_path, "rtk.sps", sps), format="sps")
    assert res2.version.version == 2 and res2.table["height"].to_pylist() == [300.9]
    assert res2.warnings == []
    with pytest.raises(InputError, match="negative sigma_e"):
        load_input(arc, sid(arc), "control", write(tmp_path, "neg.csv",
                   "line,point,easting,northing,height,sigma_e\n1001,2001,612000,3890000,1,-1\n"))


def test_dem_version_and_sampler(survey_arc, tmp_path):
    from rasterio.transform import Affine

    z = np.arange(12, dtype=np.float32).reshape(3, 4) + 300
    path = write_tif(tmp_path / "model.tif", z, Affine(10, 0, 612000, 0, -10, 3890030))
    with pytest.raises(UsageError, match="vertical datum"):
        load_input(survey_arc, sid(survey_arc), "dem", path)
    res = load_input(survey_arc, sid(survey_arc), "dem", path, vertical_datum="NAVD88 (GEOID18)")
    assert res.table is None and res.version.table_hash is None
    row, table = current_input(survey_arc, sid(survey_arc), "dem")
    assert table is None and json.loads(row.meta)["crs_epsg"] == 32614
    with open_dem(survey_arc, sid(survey_arc)) as s:
        assert s.source_hash == row.source_hash and s.vertical_datum == "NAVD88 (GEOID18)"
        assert s.crs_epsg == 32614
        # centre of pixel (row 1, col 1) is (612015, 3890015): value z[1, 1]
        assert s.sample(np.array([612015.0]), np.array([3890015.0]), 32614)[0] == 305.0
    bad = tmp_path / "bad.tif"
    bad.write_bytes(b"II*\x00garbage")
    with pytest.raises(InputError, match="GeoTIFF"):
        load_input(survey_arc, sid(survey_arc), "dem", bad, vertical_datum="x")
    assert verify_archive(survey_arc).ok


def test_loads_on_each_backend(any_survey_arc, tmp_path):
    arc = any_survey_arc
    load_input(arc, sid(arc), "stations", write(tmp_path, "pre.csv", STATIONS))
    dep = ("node,line,point,deployed_utc,retrieved_utc\n"
           "KF-0001,1001,2001,2024-05-01T06:00:00Z,2024-05-05T06:00:00Z\n"
           "KF-0002,1001,2001,2024-05-04T06:00:00Z,\n")
    res = load_input(arc, sid(arc), "deployments", write(tmp_path, "dep.csv", dep))
    assert [w["code"] for w in res.warnings] == ["station-occupied"]
    load_input(arc, sid(arc), "stations", write(tmp_path, "pre2.csv", STATIONS + "1005,2002,612025,3890200,,\n"))
    kinds = [(d["kind"], d["version"]) for d in list_inputs(arc, sid(arc), all_versions=True)]
    assert kinds == [("stations", 1), ("stations", 2), ("deployments", 1)]
    row, table = current_input(arc, sid(arc), "deployments")
    assert json.loads(row.warnings)[0]["line"] == 3 and table.num_rows == 2
    assert verify_archive(arc).ok
