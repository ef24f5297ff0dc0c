"""Deliveries say what the standards say they hold, on a generated survey (Kestrel Flats 3D,
same-day size, seed 7): the preplot's point codes in SPS, the SEG-P1 precision and the
coordinate as that file holds it in 'where', the time of a node that died early, and the
datum of each height.

The delivered files are read back with the independent readers of
tests/support/delivery_tables.py (SEG SPS rev 2.1 (2006) point record; SEG-P1 data record,
SEG 1983).
"""

from __future__ import annotations

import csv
import json
from datetime import datetime

import numpy as np
import pytest
import rasterio

from archive.deliver.deliveries import deliver
from archive.lineage.where import where
from archive.solve.run import solve_survey
from archive.survey.inputs import load_input
from tests.support.delivery_tables import read_segp1, read_sps_r
from tests.support.scenarios import scenario_archive

RECIPIENT = "Harrow Basin Energy processing centre"
CODES = ("G1", "V2", "A7", "X")  # varied, so a blank or constant code cannot pass


@pytest.fixture(scope="module")
def survey(tmp_path_factory):
    base = tmp_path_factory.mktemp("standards")
    arc, sid, _, sc = scenario_archive(base, seed=7, size="same-day", dem=False, solve=False)
    out = []
    for i, rec in enumerate(sc.preplot.read_text().splitlines()):
        if rec.startswith("R"):  # SPS rev 2.1: point code in columns 25-26
            rec = (rec[:24] + f"{CODES[i % len(CODES)]:<2}" + rec[26:]).ljust(80)
        out.append(rec)
    preplot = base / "preplot-coded.sps"
    preplot.write_text("\n".join(out) + "\n")
    load_input(arc, sid, "stations", preplot)
    # an elevation model covering the western half of the spread: the eastern stations
    # are off the model and delivered with their GNSS height
    with rasterio.open(sc.dem) as src:
        z, profile = src.read(1), src.profile
    half = z.copy()
    half[:, z.shape[1] // 2:] = profile.get("nodata") or -9999.0
    profile["nodata"] = profile.get("nodata") or -9999.0
    dem = base / "half-dem.tif"
    with rasterio.open(dem, "w", **profile) as dst:
        dst.write(half, 1)
    load_input(arc, sid, "dem", dem, vertical_datum=sc.vertical_datum)
    run_id = solve_survey(arc, sid).run_id
    files = {}
    for fmt, ext in (("sps", "sps"), ("segp1", "p1"), ("csv", "csv")):
        deliver(arc, sid, run_id, fmt, base / f"r.{ext}", RECIPIENT, allow_flags=True)
        files[fmt] = base / f"r.{ext}"
    yield arc, sid, sc, preplot, files
    arc.close()


def _csv(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def test_sps_keeps_the_preplots_point_codes(survey):
    _arc, _sid, _sc, preplot, files = survey
    # SPS rev 2.1 point record, columns 25-26 point code (A2), read from both files by the
    # same independent column reader
    planned = {(r["line"], r["point"]): r["code"] for r in read_sps_r(preplot.read_text())}
    delivered = read_sps_r(files["sps"].read_text())
    assert len({r["code"] for r in delivered}) == len(CODES)
    for r in delivered:  # every occupation and part carries its station's code
        assert r["code"] == planned[(r["line"], r["point"])]


def test_segp1_writes_what_its_fields_allow_and_where_says_so(survey):
    arc, sid, _sc, _preplot, files = survey
    _heads, rows = read_segp1(files["segp1"].read_text())
    row = rows[0]
    # SEG-P1 (SEG 1983) easting F8 in columns 46-53: a 6-digit UTM easting leaves room for
    # one decimal; the 7-digit northing in 54-61 does not (8 columns, whole metres)
    east_text = files["segp1"].read_text().splitlines()[20][45:53]
    north_text = files["segp1"].read_text().splitlines()[20][53:61]
    assert "." in east_text and len(east_text.split(".")[1]) == 1
    assert "." not in north_text.strip()
    res = where(arc, sid, float(row["line"]), float(row["point"]),
                int(row["reshoot"].strip() or 1))
    entries = res["occupations"][0]["history"]
    p1 = next(e for e in entries if e["format"] == "segp1")
    held = p1["as_delivered"]
    assert held["decimals"] == {"easting": 1, "northing": 0, "height": 1}
    assert held["easting"] == row["easting"] and held["northing"] == row["northing"]
    assert held["height"] == row["elevation"]  # exactly what the file holds
    assert abs(p1["northing"] - held["northing"]) <= 0.5  # full precision beside it
    assert p1["northing"] != held["northing"]
    sps = next(e for e in entries if e["format"] == "sps")["as_delivered"]
    assert sps["decimals"] == {"easting": 1, "northing": 1, "height": 1}  # F9.1 F10.1 F6.1
    csv_entry = next(e for e in entries if e["format"] == "csv")["as_delivered"]
    assert csv_entry["decimals"] is None and csv_entry["northing"] == p1["northing"]


def test_a_node_that_died_keeps_its_logged_window(survey):
    """The rule (docs/delivery.md, "Times"): a record holds for the node's logged window,
    from lay-out to pickup, whether or not it logged all of it (it lay there); ``t_start``/
    ``t_end`` are the settled window the solver read, not the span of its fixes, and the
    flags say it stopped early. SPS/SEG-P1 day and time are the lay-out time."""
    arc, sid, sc, _preplot, files = survey
    died = next(p for p in sc.problems if p["kind"] == "died")
    log = {(float(r["line"]), float(r["point"]), r["node"]): r
           for r in _csv(sc.deployments)}
    logged = log[(died["line"], died["point"], died["node"])]
    rows = [r for r in _csv(files["csv"]) if r["node"] == died["node"]]
    assert len(rows) == 1
    r = rows[0]
    assert r["deployed"].startswith(logged["deployed_utc"].rstrip("Z"))
    assert r["retrieved"].startswith(logged["retrieved_utc"].rstrip("Z"))
    t_end = datetime.fromisoformat(r["t_end"].replace("Z", "+00:00"))
    log_end = datetime.fromisoformat(died["log_ends_utc"].replace("Z", "+00:00"))
    picked_up = datetime.fromisoformat(logged["retrieved_utc"].replace("Z", "+00:00"))
    assert log_end < t_end < picked_up  # the window read, beyond the last fix logged
    assert "short-span" in r["flags"].split(";")
    sps = [s for s in read_sps_r(files["sps"].read_text())
           if (s["line"], s["point"]) == (died["line"], died["point"])]
    laid = datetime.fromisoformat(logged["deployed_utc"].replace("Z", "+00:00"))
    assert sps[0]["time"] == laid.strftime("%H%M%S")  # SPS columns 75-80: lay-out time
    later = log_end + (picked_up - log_end) / 2  # a shot after the node stopped logging
    w = where(arc, sid, died["line"], died["point"], at=later)
    assert w["delivered"]["node"] == died["node"]
    assert any("logged only part of its stay" in n for n in w["notes"])


def test_each_height_names_its_datum(survey):
    arc, sid, sc, _preplot, files = survey
    rows = _csv(files["csv"])
    gnss = [r for r in rows if r["height_source"] == "gnss"]
    model = [r for r in rows if r["height_source"] == "model"]
    assert gnss and model  # the half model leaves stations on both sides
    assert {r["vertical_datum"] for r in model} == {sc.vertical_datum}
    assert {r["vertical_datum"] for r in gnss} == {
        "receiver's own geoid (GNSS GGA altitude), not the elevation model's datum"}
    h26 = [line for line in files["sps"].read_text().splitlines()
           if line.startswith("H26")]
    named = " ".join(line[32:].strip() for line in h26)
    assert "Heights not in H17 datum" in " ".join(h26)
    assert f"{len(gnss)} record(s), GNSS height" in named
    lineage = json.loads((files["csv"].parent / "r.csv.lineage.json").read_text())
    assert len(lineage["heights"]["other_datum"]) == len(gnss)
    heads, _ = read_segp1(files["segp1"].read_text())
    text = " ".join(h[4:].strip() for h in heads)  # continued statements joined
    assert f"{len(gnss)} record(s) GNSS height in another datum" in text
    assert np.isfinite([float(r["height"]) for r in gnss]).all()
