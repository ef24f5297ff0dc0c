"""A set position replaces the solver's solution: height, counts, times and position flags."""

from __future__ import annotations

import numpy as np
import pyarrow.compute as pc
import pytest
import rasterio
from rasterio.transform import from_origin

from archive.deliver.final import final_positions
from archive.edits import decisions as ed
from archive.survey.inputs import load_input
from tests.support.builders import delivery_archive, make_run, positions_table
from tests.support.delivery_tables import final_table


def _row(table, line, point):
    m = pc.and_(pc.equal(table["line"], line), pc.equal(table["point"], point))
    return table.filter(m).to_pylist()[0]


@pytest.fixture
def setup(survey_arc, tmp_path):
    flags = ["", "far-from-plan;moved;height-mismatch", "", "", "", "", "", ""]
    sid, final, run, _ = delivery_archive(survey_arc, tmp_path, flags=flags)
    return survey_arc, sid, final, run


def test_set_position_without_model_takes_the_source_height_and_clears_position_flags(setup):
    arc, sid, final_in, run = setup
    e = ed.set_position(arc, sid, 1001, 2002, source="preplot", reason="node found off peg")
    r = _row(final_positions(arc, sid, run), 1001, 2002)
    old = _row(final_in, 1001, 2002)
    # preplot elevation = solver height + 0.3 (tests/deliver/builders.py load_stations)
    assert r["height"] == pytest.approx(old["height"] + 0.3, abs=0.005)  # written to 0.01
    assert r["height_source"] == "preplot"
    # the solver's position flags go; a height flag is not about the position
    assert r["flags"] == "height-mismatch"
    assert r["n_used"] == 0 and r["n_rejected"] == 0 and r["t_end"] is None
    assert r["node"] == old["node"] and r["source"] == f"edit:{e.id};node:deployed"
    c = ed.set_position(arc, sid, 1001, 2001, source="control", reason="RTK shot")
    r = _row(final_positions(arc, sid, run), 1001, 2001)
    # check point height = solver height - 0.1 (builders.load_stations)
    assert r["height"] == pytest.approx(_row(final_in, 1001, 2001)["height"] - 0.1, abs=5e-4)
    assert r["height_source"] == "control" and c.id
    ed.set_position(arc, sid, 1001, 2003, source="given", easting=612400.0,
                    northing=3512300.0, reason="tape measured")
    r = _row(final_positions(arc, sid, run), 1001, 2003)
    assert r["height"] is None and r["height_source"] == "none"


def test_set_position_resamples_the_runs_elevation_model(survey_arc, tmp_path):
    arc = survey_arc
    sid, final_in, _run, _ = delivery_archive(arc, tmp_path)
    # a tilted plane, 10 m pixels: z = 300 + 0.1 * (x - 612000) (values at pixel centres)
    x0, y0, px = 612000.0, 3513000.0, 10.0
    cx = x0 + px * (np.arange(100) + 0.5)
    z = np.tile(300.0 + 0.1 * (cx - x0), (100, 1)).astype("float32")
    with rasterio.open(tmp_path / "dem.tif", "w", driver="GTiff", width=100, height=100,
                       count=1, dtype="float32", crs="EPSG:32614",
                       transform=from_origin(x0, y0, px, px)) as ds:
        ds.write(z[None])
    load_input(arc, sid, "dem", tmp_path / "dem.tif", vertical_datum="NAVD88 (GEOID18)")
    t = final_table(8)
    run = make_run(arc, positions_table(t), [], label="with model",
                   input_versions={"dem": 1, "stations": 1})
    new_e, new_n = 612700.0, 3512500.0
    ed.set_position(arc, sid, 1001, 2002, source="given", easting=new_e, northing=new_n,
                    reason="found 300 m east")
    r = _row(final_positions(arc, sid, run), 1001, 2002)
    # plane value at the new position (a bilinear sample of a plane is the plane)
    assert r["height"] == pytest.approx(300.0 + 0.1 * (new_e - x0), abs=0.01)
    assert r["height_source"] == "model"
