"""Inputs that used to be accepted and should not be: a cut elevation model, a preplot whose
header names another CRS, a preplot that drops most stations, and CSV line numbers that
ignored line breaks inside quoted fields.

Each refusal is one line with the documented exit code, no input version is recorded, and
the override (where there is one) is kept with the version and in the ledger.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from click.testing import CliRunner
from sqlalchemy import select

from archive.store.archive import Archive
from archive.store.models import InputVersion, LedgerEvent
from tests.support.cli import SURVEY_EPSG, invoke
from tests.support.reliability import make_survey_archive

REFUSED, INPUT = 4, 1


@pytest.fixture
def arc_dir(tmp_path: Path) -> Path:
    return make_survey_archive(tmp_path / "archive", None)


def versions(root: Path, kind: str) -> list[InputVersion]:
    with Archive.open(root) as arc, arc.session() as s:
        return list(s.scalars(select(InputVersion).where(InputVersion.kind == kind)
                              .order_by(InputVersion.version)))


def last_event(root: Path) -> dict:
    with Archive.open(root) as arc, arc.session() as s:
        ev = s.scalars(select(LedgerEvent).order_by(LedgerEvent.seq.desc()).limit(1)).one()
        return {"action": ev.action, **json.loads(ev.payload)}


def refused(result, code: int, *words: str) -> str:
    assert result.exit_code == code, result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: "), result.stderr
    assert "internal error" not in result.output
    for w in words:
        assert w in lines[0], (w, lines[0])
    return lines[0]


# -- elevation model read whole before it is accepted ------------------------------------
def test_elevation_model_with_cut_pixels(arc_dir: Path, tmp_path: Path):
    import rasterio
    from rasterio.transform import from_origin

    good = tmp_path / "model.tif"
    with rasterio.open(good, "w", driver="GTiff", width=256, height=256, count=1,
                       dtype="float32", crs=f"EPSG:{SURVEY_EPSG}", tiled=True, blockxsize=64,
                       blockysize=64, transform=from_origin(583000, 4064000, 10, 10)) as ds:
        ds.write(np.linspace(400, 420, 256 * 256, dtype=np.float32).reshape(256, 256), 1)
    data = good.read_bytes()
    assert int.from_bytes(data[4:8], "little") < 1024  # directory first: the header still reads
    cut = tmp_path / "model-cut.tif"
    cut.write_bytes(data[: len(data) // 2])
    runner = CliRunner()
    with rasterio.open(cut) as ds:  # rasterio (GDAL) opens it: only the pixels are missing
        assert ds.width == 256
    line = refused(invoke(runner, arc_dir, "load", "dem", str(cut), "--vertical-datum",
                          "NAVD88"), INPUT, "model-cut.tif", "cannot be read", "rows")
    assert "cut short" in line
    assert versions(arc_dir, "dem") == []
    ok = invoke(runner, arc_dir, "load", "dem", str(good), "--vertical-datum", "NAVD88",
                "--json")
    assert ok.exit_code == 0, ok.output
    meta = json.loads(versions(arc_dir, "dem")[0].meta)
    assert meta["height_range"] == pytest.approx([400.0, 420.0], abs=1e-3)
    assert meta["valid_share"] == 1.0


# -- preplot header CRS --------------------------------------------------------------------
def _sps(tmp_path: Path, name: str, header_crs: str | None, n: int = 20,
         zone_phrase: str | None = None) -> Path:
    lines = ["H00 SPS format version num.     SPS 2.1 JAN2006"]
    if header_crs:
        lines.append(f"H13 Coordinate reference system {header_crs}")
    if zone_phrase:
        lines.append(f"H19 Projection zone             {zone_phrase}")
    for i in range(n):
        lines.append(f"R   1001.00{5001 + i:10.2f}  1G1   0 0.0   0 0   0.0"
                     f"{583200.0 + 7 * i:9.1f}{4062400.0 + 49.5 * i:10.1f} 409.6")
    path = tmp_path / name
    path.write_text("\n".join(lines) + "\n")
    return path


def test_preplot_header_names_another_crs(arc_dir: Path, tmp_path: Path):
    runner = CliRunner()
    other = _sps(tmp_path, "preplot-z15.sps", "EPSG:32615 WGS 84 / UTM zone 15N")
    line = refused(invoke(runner, arc_dir, "load", "stations", str(other)), REFUSED,
                   "preplot-z15.sps", "H13", "EPSG:32615", f"EPSG:{SURVEY_EPSG}",
                   "--crs-from-survey")
    assert versions(arc_dir, "stations") == []
    zone = _sps(tmp_path, "preplot-zone.sps", None, zone_phrase="UTM zone 15N")
    refused(invoke(runner, arc_dir, "load", "stations", str(zone)), REFUSED, "UTM zone 15N")
    same = _sps(tmp_path, "preplot-z14.sps", f"EPSG:{SURVEY_EPSG} WGS 84 / UTM zone 14N",
                zone_phrase="UTM zone 14N")
    assert invoke(runner, arc_dir, "load", "stations", str(same)).exit_code == 0
    reason = "header copied from the neighbouring prospect; coordinates checked in zone 14"
    done = invoke(runner, arc_dir, "load", "stations", str(other), "--crs-from-survey", reason)
    assert done.exit_code == 0, done.output
    meta = json.loads(versions(arc_dir, "stations")[-1].meta)
    assert meta["overrides"] == [{"option": "crs_from_survey", "reason": reason,
                                  "detail": "header H13 names EPSG:32615; coordinates taken "
                                            f"as EPSG:{SURVEY_EPSG}"}]
    event = last_event(arc_dir)
    assert event["action"] == "load.stations" and event["overrides"][0]["reason"] == reason
    assert "EPSG:32615" in line


def test_preplot_that_drops_most_stations(arc_dir: Path, tmp_path: Path):
    runner = CliRunner()
    full = _sps(tmp_path, "preplot.sps", None, n=40)
    one = _sps(tmp_path, "preplot-one.sps", None, n=1)
    most = _sps(tmp_path, "preplot-most.sps", None, n=39)  # 1 of 40 dropped: 2.5 %
    assert invoke(runner, arc_dir, "load", "stations", str(full)).exit_code == 0
    refused(invoke(runner, arc_dir, "load", "stations", str(one)), REFUSED, "preplot-one.sps",
            "1 station(s)", "lacking 39 of the 40", "version 1", "97.5%", "--replace")
    assert [v.version for v in versions(arc_dir, "stations")] == [1]
    assert invoke(runner, arc_dir, "load", "stations", str(most)).exit_code == 0
    done = invoke(runner, arc_dir, "load", "stations", str(one), "--replace")
    assert done.exit_code == 0, done.output
    latest = versions(arc_dir, "stations")[-1]
    assert latest.version == 3 and latest.n_rows == 1
    assert json.loads(latest.meta)["overrides"][0]["option"] == "replace"
    assert last_event(arc_dir)["overrides"][0]["detail"].startswith("1 station(s), lacking 38")


# -- CSV line numbers are physical lines ---------------------------------------------------
def test_csv_errors_name_physical_lines(arc_dir: Path, tmp_path: Path):
    runner = CliRunner()
    preplot = _sps(tmp_path, "preplot.sps", None, n=5)
    assert invoke(runner, arc_dir, "load", "stations", str(preplot)).exit_code == 0
    log = tmp_path / "deployments.csv"
    log.write_text(
        "node,line,point,deployed_utc,retrieved_utc,note\n"             # 1
        '301001,1001,5001,2025-04-07T14:00:00Z,2025-04-10T14:00:00Z,"stake moved,\n'  # 2
        'see crew sheet\n'                                              # 3
        'page 2"\n'                                                     # 4
        "301002,1001,5002,2025-04-07T14:05:00Z,2025-04-10T14:05:00Z,\n"  # 5
        '301003,1001,5003,2025-04-07T14:10:00Z,2025-04-10T14:10:00Z,"wet\n'  # 6
        'ground"\n'                                                     # 7
        "301004,1001,5004,7 April,2025-04-10T14:15:00Z,\n")             # 8
    line = refused(invoke(runner, arc_dir, "load", "deployments", str(log)), INPUT,
                   "deployments.csv:8", "'7 April'", "deployed_utc")
    assert "deployments.csv:5" not in line
