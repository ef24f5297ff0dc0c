"""Archives holding a simulated survey: the preplot, the deployment log and an elevation model
loaded through the survey loaders, each node's fixes stored the way the fix loader stores them."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from archive.seeds.simulate import Simulation
from rasterio.transform import Affine

from archive.store.archive import Archive
from archive.store.models import RawFile, utcnow
from archive.survey.inputs import load_input
from tests.support.rasters import write_tif


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
