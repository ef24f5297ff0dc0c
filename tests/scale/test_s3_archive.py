"""A whole archive on S3 objects: real loaders, parallel parsing, elevation model sampling."""

from __future__ import annotations

import numpy as np
import pytest
import rasterio

from archive.ingest.load import load_fix_files
from archive.store.archive import Archive
from archive.store.verify import verify_archive
from archive.survey.dem import spot_sample
from tests.support.scale import populate

pytestmark = pytest.mark.slow


def test_loads_parse_in_worker_processes_and_dem_samples_from_the_bucket(
        tmp_path, small_scenario, s3_url):
    arc = Archive.init(tmp_path / "arc", objects_url=s3_url, actor="tester")
    try:
        survey_id = populate(arc, small_scenario, n_logs=0)
        # Two worker processes parse and write their tables straight to the bucket.
        report = load_fix_files(arc, survey_id, small_scenario.logs[:3], workers=2)
        assert report.ok and len(report.loaded) == 3, [f.error for f in report.failed]
        for f in report.loaded:
            assert arc.objects.exists(f.raw_hash)
        check = verify_archive(arc)
        assert check.ok, check.problems
        assert not check.dangling

        # Reference: rasterio reading the original GeoTIFF at a pixel centre, where bilinear
        # interpolation must return the pixel value itself (GDAL convention: values belong
        # to pixel centres; see archive/survey/dem.py).
        with rasterio.open(small_scenario.dem) as ds:
            row, col = ds.height // 2, ds.width // 3
            x, y = ds.xy(row, col)  # centre of the pixel
            expected = float(next(ds.sample([(x, y)]))[0])
        got = spot_sample(arc, survey_id, x, y)
        assert got["elevation"] == pytest.approx(expected, abs=1e-3)
        assert np.isfinite(got["elevation"])
    finally:
        arc.close()
