"""Simulated surveys for the solver tests, and archives holding them.

The archive fixture loads the preplot, the deployment log and an elevation model through
the survey loaders (CSV and GeoTIFF files, as a crew would) and stores each node's fixes
the way the fix loader stores a parsed raw file: raw bytes, a fixes Parquet object, one
``raw_files`` row and its ledger event.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest
from rasterio.transform import Affine

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.solve.simulate import SimConfig, Simulation, simulate
from archive.store.archive import Archive
from archive.store.models import RawFile, utcnow
from archive.survey.inputs import load_input
from tests.survey.rasters import write_tif

SMALL = SimConfig(n_lines=2, n_points=6, days=3.0, n_moves=1, n_swaps=1, n_unlogged=1, seed=11)


@pytest.fixture(scope="session")
def big_sim() -> Simulation:
    """48 stations, 3.2 days each at 30 s: the accuracy and calibration data set."""
    return simulate(SimConfig(n_lines=6, n_points=8, n_moves=3, n_swaps=2, n_unlogged=1,
                              seed=2024))


@pytest.fixture(scope="session")
def big_solved(big_sim: Simulation):
    """The big simulation solved with the default parameters (no elevation model)."""
    return solve_fixes(big_sim.fixes, big_sim.deployments, big_sim.stations,
                       default_params(), big_sim.meta["epsg"], want_members=True)


def _iso(us: int) -> str:
    return np.datetime64(int(us), "us").astype(str) + "Z"


def store_simulation(arc: Archive, sim: Simulation, tmp: Path, *, dem: bool = True) -> int:
    """Load a simulation into the archive's only survey; returns the survey id."""
    with arc.session() as s:
        sid = arc.survey(s).id
    st = sim.stations.to_pydict()
    lines = ["line,point,easting,northing,elevation"] + [
        f"{st['line'][i]:.0f},{st['point'][i]:.0f},{st['easting'][i]:.2f},"
        f"{st['northing'][i]:.2f},{st['elevation'][i]:.2f}" for i in range(sim.stations.num_rows)]
    (tmp / "preplot.csv").write_text("\n".join(lines) + "\n")
    load_input(arc, sid, "stations", tmp / "preplot.csv")
    dp = sim.deployments
    dep_us = pc.cast(dp["deployed"], pa.int64()).to_pylist()
    ret_us = pc.cast(dp["retrieved"], pa.int64()).to_pylist()
    d = dp.to_pydict()
    rows = ["node,line,point,deployed_utc,retrieved_utc"] + [
        f"{d['node'][i]},{d['line'][i]:.0f},{d['point'][i]:.0f},{_iso(dep_us[i])},"
        f"{_iso(ret_us[i])}" for i in range(dp.num_rows)]
    (tmp / "deployments.csv").write_text("\n".join(rows) + "\n")
    load_input(arc, sid, "deployments", tmp / "deployments.csv")
    if dem:
        e0, n0 = min(st["easting"]) - 100, max(st["northing"]) + 100
        z = 240.0 + 0.02 * np.arange(40)[None, :] * np.ones((40, 1))  # gentle eastward slope
        write_tif(tmp / "dem.tif", z.astype(np.float32), Affine(10, 0, e0, 0, -10, n0),
                  crs=f"EPSG:{sim.meta['epsg']}")
        load_input(arc, sid, "dem", tmp / "dem.tif", vertical_datum="NAVD88 (model)")
    fixes = sim.fixes
    for node in sorted(set(fixes["node"].to_pylist())):
        part = fixes.filter(pc.equal(fixes["node"], node))
        raw = f"simulated log of node {node}, {part.num_rows} epochs\n".encode()
        raw_hash, raw_size = arc.objects.put_bytes(raw)
        part = part.set_column(part.schema.get_field_index("raw_hash"), "raw_hash",
                               pa.array([raw_hash] * part.num_rows))
        fixes_hash, fixes_size = arc.objects.put_table(part)
        t = part["time"]
        with arc.transaction() as tx:
            arc.register_object(tx, raw_hash, raw_size, "raw")
            arc.register_object(tx, fixes_hash, fixes_size, "fixes")
            row = RawFile(survey_id=sid, object_hash=raw_hash, original_name=f"{node}.nmea",
                          node=node, format="nmea", size=raw_size, received_at=utcnow(),
                          received_by=arc.actor, parser="simulated", n_lines=part.num_rows,
                          n_accepted=part.num_rows, n_rejected=0, n_ignored=0,
                          n_fixes=part.num_rows, n_valid=part.num_rows,
                          t_first=pc.min(t).as_py(), t_last=pc.max(t).as_py(),
                          fixes_hash=fixes_hash)
            tx.add(row)
            arc.log(tx, "load.fixes", {"raw": raw_hash}, survey_id=sid, rows=[row])
    return sid


@pytest.fixture(scope="module")
def small_sim() -> Simulation:
    """12 stations with one move, one swapped pair and one unlogged deployment."""
    return simulate(SMALL)


@pytest.fixture
def sim_arc(survey_arc: Archive, small_sim: Simulation, tmp_path: Path) -> tuple[Archive, int]:
    """An archive holding the small simulation (preplot, log, model, fixes)."""
    sid = store_simulation(survey_arc, small_sim, tmp_path)
    return survey_arc, sid
