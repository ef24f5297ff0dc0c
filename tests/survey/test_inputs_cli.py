"""Command line of the survey inputs: exit codes and messages (CliRunner)."""

from __future__ import annotations

import json

from rasterio.transform import Affine

from tests.support.cli import invoke
from tests.support.rasters import CHECK_GT, CHECK_Z, write_tif

STATIONS = "line,point,easting,northing\n1001,2001,612000,3890000\n1001,2002,612025,3890000\n"


def test_load_list_and_sample(survey_arc, runner, tmp_path):
    root = survey_arc.root
    (tmp_path / "pre.csv").write_text(STATIONS)
    r = invoke(runner, root, "load", "stations", str(tmp_path / "pre.csv"))
    assert r.exit_code == 0, r.output
    assert "loaded stations version 1 of Kestrel Flats 3D from pre.csv: 2 rows (R 2)" in r.output
    dep = tmp_path / "dep.csv"
    dep.write_text("Serial,Line,Point,In,Out\n"
                   "KF-0001,1001,2001,2024-05-01T06:00:00Z,\n"
                   "KF-0002,1001,2001,2024-05-02T06:00:00Z,\n")
    cols = "node=Serial,line=Line,point=Point,deployed_utc=In,retrieved_utc=Out"
    r = invoke(runner, root, "load", "deployments", str(dep), "--columns", cols, "--strict")
    assert r.exit_code == 4
    assert r.stderr.startswith("error: ") and "dep.csv:3: station 1001/2001" in r.stderr
    assert r.stderr.count("\n") == 1
    r = invoke(runner, root, "load", "deployments", str(dep), "--columns", cols)
    assert r.exit_code == 0 and "1 warning(s):\n  dep.csv:3: station 1001/2001" in r.output
    r = invoke(runner, root, "load", "stations", str(tmp_path / "pre.csv"), "--json")
    data = json.loads(r.output)
    assert data["version"] == 2 and data["kind"] == "stations" and len(data["source_hash"]) == 64
    r = invoke(runner, root, "inputs", "--all-versions", "--json")
    assert [(d["kind"], d["version"], d["current"]) for d in json.loads(r.output)] == [
        ("stations", 1, False), ("stations", 2, True), ("deployments", 1, True)]
    r = invoke(runner, root, "inputs")
    assert r.exit_code == 0 and "deployments" in r.output and "stations     2" in r.output
    # elevation model: the 3x3 check grid of tests/survey/rasters.py (GDAL geotransform
    # convention), moved into the survey area
    r = invoke(runner, root, "dem", "sample", "612000", "3890000")
    assert r.exit_code == 2 and "the survey has no dem loaded" in r.stderr
    assert "nodekeep load dem FILE --vertical-datum TEXT" in r.stderr
    gt = Affine(2, 0, 612000, 0, -2, 3890006)
    tif = write_tif(tmp_path / "m.tif", CHECK_Z, gt)
    r = invoke(runner, root, "load", "dem", str(tif), "--vertical-datum", "NAVD88 (GEOID18)")
    assert r.exit_code == 0 and "3x3 pixels, EPSG:32614, pixel-is-area" in r.output
    # a raster has no rows: the listing and the status screen name it instead of "0 rows"
    r = invoke(runner, root, "inputs")
    [dem_line] = [x for x in r.output.splitlines() if x.startswith("dem ")]
    assert dem_line.split()[3:5] == ["m.tif", "-"]
    r = invoke(runner, root, "status")
    assert "dem v1 (m.tif)" in r.output and "0 rows" not in r.output
    r = invoke(runner, root, "dem", "sample", "612002", "3890004")
    assert r.exit_code == 0 and r.output.strip().endswith("12.000 m (NAVD88 (GEOID18))")
    lon, lat = -97.7775, 35.1505  # well outside this 6 m model
    r = invoke(runner, root, "dem", "sample", str(lon), str(lat), "--crs", "EPSG:4326", "--json")
    assert json.loads(r.output)["elevation"] is None
    r = invoke(runner, root, "verify", "--json")
    assert r.exit_code == 0, r.output


def test_errors_are_one_line(survey_arc, runner, tmp_path):
    root = survey_arc.root
    bad = tmp_path / "pre.sps"
    bad.write_text("R   1001.00   2001.00  1G1   0 0.0   0 0   0.0 6120x0.0 3890000.0 301.2123123456\n")
    r = invoke(runner, root, "load", "stations", str(bad))
    assert r.exit_code == 1
    assert r.stderr.startswith("error: ") and r.stderr.count("\n") == 1
    assert f"{bad}:1: easting is '6120x0.0' (columns 47-55); expected map grid easting" in r.stderr
    r = invoke(runner, root, "load", "dem", str(bad), "--vertical-datum", "x")
    assert r.exit_code == 1 and "not readable as a GeoTIFF" in r.stderr
    (tmp_path / "c.csv").write_text("line,point,easting,northing\n1,1,612000,3890000\n")
    r = invoke(runner, root, "load", "control", str(tmp_path / "c.csv"))
    assert r.exit_code == 1 and "missing column(s) height" in r.stderr
    r = invoke(runner, root, "load", "dem", str(write_tif(tmp_path / "k.tif", CHECK_Z, CHECK_GT)))
    assert r.exit_code == 2 and "--vertical-datum" in r.output + r.stderr
    r = invoke(runner, root, "load", "stations", str(tmp_path / "c.csv"), "--survey", "Nowhere")
    assert r.exit_code == 2 and "no survey named 'Nowhere'" in r.stderr
