"""One station's fix cloud, recomputed from a run's manifest: which fixes were used.

The cloud is every fix of the station's deployment window(s) (and of an unlogged cluster
reported at the station) with what the run did with it: ``used``, ``rejected`` (beyond the
chi-square limit of its cloud) or ``screened`` (by a receiver quality test or an exclusion
edit), and why. The solver works per window, so solving one station alone from the same
objects and parameters gives exactly the statuses of the full run. Fixes outside every
window never appear. For the QC report's plots and for ``trace``.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.edits.spans import manifest_spans
from archive.errors import UsageError
from archive.solve.engine import solve_fixes
from archive.solve.inputs import load_fix_tables, survey_inputs
from archive.solve.run import get_run, run_manifest, run_positions
from archive.solve.screen import SCREEN_REASONS
from archive.solve.windows import FOREVER, Windows, no_windows
from archive.store.archive import Archive
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer
from archive.survey.keys import station_mask, station_text

CLOUD_SCHEMA = pa.schema([
    pa.field("time", pa.timestamp("us", tz="UTC"), nullable=False),
    pa.field("lat", pa.float64()), pa.field("lon", pa.float64()),
    pa.field("east", pa.float64()), pa.field("north", pa.float64()),
    pa.field("hdop", pa.float64()), pa.field("node", pa.string()),
    pa.field("part", pa.int8()), pa.field("status", pa.string()),
    pa.field("reason", pa.string()), pa.field("raw_hash", pa.string()),
    pa.field("raw_line", pa.int64()), pa.field("occupation", pa.int8()),
], metadata={"nodekeep.table": "cloud"})


def _unlogged_windows(positions: pa.Table, line: float, point: float,
                      index: int | None) -> Windows:
    rows = positions.filter(pc.and_(station_mask(positions, line, point, index),
                                    pc.equal(positions["kind"], "unlogged")))
    n = rows.num_rows
    return Windows(
        node=np.array(rows["node"].to_pylist(), dtype=object), code=np.full(n, -1),
        start=pc.cast(rows["t_start"], pa.int64()).to_numpy(zero_copy_only=False),
        end=pc.cast(rows["t_end"], pa.int64()).to_numpy(zero_copy_only=False),
        line=np.full(n, float(line)), point=np.full(n, float(point)),
        index=rows["index"].to_numpy().astype(np.int8),
        kind=np.full(n, "unlogged", dtype=object),
        occupation=np.zeros(n, dtype=np.int8), deployed=np.full(n, FOREVER, dtype=np.int64),
        retrieved=np.full(n, FOREVER, dtype=np.int64))


def station_cloud(arc: Archive, run_id: str, line: float, point: float,
                  index: int | None = None, *, occupation: int | None = None) -> pa.Table:
    """The fixes of one station's window(s) in run ``run_id`` and their status (see doc).

    Every occupation of (line, point) by default; ``index`` keeps the preplot station of
    that point index, ``occupation`` the one occupation delivered under that point index
    (its ``occupation`` column says which occupation each fix belongs to; null for an
    unlogged cluster).
    """
    run = get_run(arc, None, run_id)
    manifest = run_manifest(arc, run)
    inp = survey_inputs(arc, run.survey_id, manifest["selection"], manifest=manifest)
    dep = inp.deployments.filter(station_mask(inp.deployments, line, point, index))
    if occupation is not None:
        dep = dep.filter(pc.equal(dep["occupation"], int(occupation)))
    extra = (_unlogged_windows(run_positions(arc, run), line, point, index)
             if occupation is None else no_windows())
    nodes = set(dep["node"].to_pylist()) | set(extra.node.tolist())
    if not nodes:
        which = (f" occupation {occupation}" if occupation is not None
                 else f" index {index}" if index is not None else "")
        raise UsageError(f"station {station_text(line, point)}{which} has no deployment in run "
                         f"{run.id[:12]}", hint="check the line and point numbers")
    hashes = list(dict.fromkeys(h for n, h, _ in inp.fix_files if n in nodes or n == ""))
    fixes = load_fix_tables(arc, hashes)
    fixes = fixes.filter(pc.is_in(fixes["node"], value_set=pa.array(sorted(nodes))))
    epsg = manifest["survey"]["crs_epsg"]
    out = solve_fixes(fixes, dep, inp.stations, manifest["params"], epsg,
                      excludes=manifest_spans(manifest["edits"]), detect_unlogged=False,
                      extra_windows=extra, want_members=True)
    m = out.members
    fx, f = m.fx, m.fix
    occ = np.asarray(out.positions["occupation"].fill_null(0).to_numpy(zero_copy_only=False),
                     dtype=np.int8)[m.row]
    east, north = transformer(WGS84_GEOGRAPHIC, epsg).transform(fx.lon[f], fx.lat[f])
    status = np.where(m.screen > 0, "screened", np.where(m.rejected, "rejected", "used"))
    reasons = np.array(SCREEN_REASONS, dtype=object)[m.screen]
    reasons = np.where(m.rejected & (m.screen == 0), "outlier", reasons)
    return pa.table({
        "time": pa.array(fx.t_us[f], pa.int64()).cast(pa.timestamp("us", tz="UTC")),
        "lat": fx.lat[f], "lon": fx.lon[f], "east": np.asarray(east, dtype=float),
        "north": np.asarray(north, dtype=float), "hdop": fx.hdop[f],
        "node": np.array(fx.node_names, dtype=object)[fx.node_code[f]].tolist(),
        "part": pa.array(m.part, pa.int8()), "status": status.astype(str).tolist(),
        "reason": [str(r) for r in reasons], "raw_hash": fx.raw_hashes(f),
        "raw_line": fx.raw_line[f],
        "occupation": pa.array(occ, pa.int8(), mask=occ == 0),
    }, schema=CLOUD_SCHEMA)
