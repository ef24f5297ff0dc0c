"""Deliveries state the vertical datum their heights are in: the elevation model's."""

from __future__ import annotations

import numpy as np
import rasterio
from rasterio.transform import from_origin

from archive.deliver.deliveries import _heights_datum
from archive.store.models import Survey
from archive.survey.inputs import load_input
from archive.survey.surveys import create_survey


def _tiny_dem(path):
    with rasterio.open(path, "w", driver="GTiff", width=4, height=4, count=1, dtype="float32",
                       crs="EPSG:32614", transform=from_origin(583000, 4063000, 2, 2)) as ds:
        ds.write(np.full((1, 4, 4), 400.0, dtype="float32"))


def test_heights_datum_comes_from_the_model_the_run_used(arc, tmp_path):
    _tiny_dem(tmp_path / "dem.tif")
    stated = create_survey(arc, "Kestrel Flats 3D", "EPSG:32614", vertical_datum="local MSL")
    bare = create_survey(arc, "Kestrel Flats 3D north", "EPSG:32614")
    for s in (stated, bare):
        load_input(arc, s.id, "dem", tmp_path / "dem.tif", vertical_datum="NAVD88 (GEOID18)")
    with arc.session() as s:
        stated, bare = s.get(Survey, stated.id), s.get(Survey, bare.id)
    used = {"input_versions": {"dem": 1}}
    assert _heights_datum(arc, bare, used) == "NAVD88 (GEOID18)"
    assert _heights_datum(arc, stated, used) == (
        "NAVD88 (GEOID18) (elevation model; survey states local MSL)")
    assert _heights_datum(arc, stated, {"input_versions": {"dem": None}}) == "local MSL"
