"""Peak memory of a whole-archive solve as the number of fixes grows.

    python -m bench.memory [--sizes 1e6,3e6,1e7] [--partition-fixes N] [--workers N] [--keep DIR]
    python -m bench.memory --sizes 1e8        # about 10,000 nodes: minutes, several GB of disk

For each size a bench archive is built in a child process (an invented patch of Kestrel
Flats 3D: one node per station, 10,000 fixes per node logged every 30 s, a camp before and
after the deployment, Gauss-Markov and white horizontal noise, some void fixes); then
``solve_survey`` runs in a fresh child process, which reports its own peak resident set
size (``ru_maxrss``) next to its size just before solving. The solve reads the fix tables
one node partition at a time (``archive.solve.inputs.PARTITION_FIXES`` fixes at most, a node
never split), so its peak should stop growing once the survey is bigger than one partition:
that plateau is what this benchmark shows. When an archive was solved before (kept with
``--keep``), its run's manifest is solved again and "same digest" says whether the positions
are bit-identical to the recorded run (they may not be when ``--partition-fixes`` differs
from the first solve: the solver's floating-point sums depend on the partition cut).

The bench archive holds synthetic fix tables registered the way the loader registers parsed
logs (objects first, then one transaction with the raw-file rows and their ledger event);
each raw object is a one-line description of the synthetic source instead of NMEA text, whose
parse cost ``bench/ingest.py`` measures.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from datetime import datetime
from pathlib import Path

import numpy as np

FIXES_PER_NODE = 10_000
INTERVAL_S = 30.0
NODES_PER_CHUNK = 100
PER_LINE = 100
ORIGIN = (583200.0, 4062400.0)  # the demo survey's first station, EPSG:32614
EPSG = 32614
T0 = np.datetime64("2025-04-07T00:00:00", "us")


def _rss_mb() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # Linux: kB


def _stations(n: int) -> tuple[np.ndarray, ...]:
    i = np.arange(n)
    line, point = 1001.0 + i // PER_LINE, 2001.0 + i % PER_LINE
    e = ORIGIN[0] + (i % PER_LINE) * 50.0
    north = ORIGIN[1] + (i // PER_LINE) * 300.0
    return line, point, e, north


def _chunk_fixes(first: int, count: int, e0: np.ndarray, n0: np.ndarray, seed: int):
    """Fix columns of ``count`` nodes starting at node ``first`` (vectorised over nodes)."""
    from archive.seeds.gnss_errors import gauss_markov

    from archive.survey.crs import WGS84_GEOGRAPHIC, transformer

    rng = np.random.default_rng([seed, first])
    m = FIXES_PER_NODE
    shape = (count, m)
    def gm(sigma: float) -> np.ndarray:  # the seeds' error model: slow part, 30 min
        return gauss_markov(rng, m, INTERVAL_S, sigma, 1800.0, size=count)

    hdop = rng.uniform(0.7, 2.2, shape)
    de = gm(2.0) + rng.normal(0, 0.5, shape) * hdop
    dn = gm(2.0) + rng.normal(0, 0.5, shape) * hdop
    k = np.arange(m)
    on = (k >= 400) & (k < m - 400)  # 3.3 h in camp before and after the deployment
    camp_e, camp_n = ORIGIN[0] - 1500.0, ORIGIN[1] - 1200.0
    pe = np.where(on, e0[:, None], camp_e) + de
    pn = np.where(on, n0[:, None], camp_n) + dn
    void = rng.random(shape) < 0.02
    lon, lat = transformer(EPSG, WGS84_GEOGRAPHIC).transform(pe.ravel(), pn.ravel())
    t = T0 + (k * INTERVAL_S * 1e6).astype("timedelta64[us]")
    return {
        "time": np.broadcast_to(t, shape), "lat": np.asarray(lat).reshape(shape),
        "lon": np.asarray(lon).reshape(shape), "h_msl": 240.0 + gm(4.0), "void": void,
        "hdop": hdop.astype(np.float32), "sats": rng.integers(6, 13, shape).astype(np.int16),
        "deployed": t[400], "retrieved": t[m - 400],
    }


def build(root: Path, n_fixes: int, seed: int = 7) -> dict:
    """Create the bench archive at ``root`` holding about ``n_fixes`` fixes."""
    import pyarrow as pa
    from archive.seeds import files

    from archive.ingest.schema import FIX_SCHEMA
    from archive.store.archive import Archive
    from archive.store.models import RawFile, utcnow
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    n_nodes = max(1, round(n_fixes / FIXES_PER_NODE))
    line, point, e, north = _stations(n_nodes)
    nodes = [f"{400000 + i}" for i in range(n_nodes)]
    arc = Archive.init(root, actor="bench")
    survey = create_survey(arc, "Kestrel Flats 3D", f"EPSG:{EPSG}", vertical_datum="NAVD88",
                           client="Harrow Basin Energy", contractor="Bluestem Geophysical crew 7")
    work = root / "inputs"
    work.mkdir()
    files.write_preplot(work / "preplot.sps", [("H00", "SPS format version num.", "SPS 2.1")],
                        line, point, e, north, np.full(n_nodes, 240.0))
    load_input(arc, survey.id, "stations", work / "preplot.sps")
    deployed_at, retrieved_at = [], []
    for first in range(0, n_nodes, NODES_PER_CHUNK):
        count = min(NODES_PER_CHUNK, n_nodes - first)
        c = _chunk_fixes(first, count, e[first:first + count], north[first:first + count], seed)
        rows, puts = [], []
        for j in range(count):
            node = nodes[first + j]
            valid = ~c["void"][j]
            table = pa.table({
                "node": pa.array([node] * FIXES_PER_NODE), "time": c["time"][j],
                "lat": c["lat"][j], "lon": c["lon"][j], "h_ell": c["h_msl"][j] - 27.4,
                "h_msl": c["h_msl"][j], "geoid_sep": np.full(FIXES_PER_NODE, -27.4),
                "quality": pa.array(np.where(valid, 1, 0).astype(np.int8)),
                "fix_type": pa.array(np.where(valid, 3, 1).astype(np.int8)), "valid": valid,
                "n_sats": c["sats"][j], "pdop": c["hdop"][j] * np.float32(1.7),
                "hdop": c["hdop"][j], "vdop": c["hdop"][j] * np.float32(1.4),
                "raw_hash": pa.array(["0" * 64] * FIXES_PER_NODE),
                "raw_line": np.arange(1, FIXES_PER_NODE + 1, dtype=np.int64),
                "sentence": pa.array(["GGA"] * FIXES_PER_NODE),
                "no_quality": np.zeros(FIXES_PER_NODE, dtype=bool),
                "weeks_added": np.zeros(FIXES_PER_NODE, dtype=np.int16),
            }, schema=FIX_SCHEMA)
            raw = arc.objects.put_bytes(f"synthetic fixes of node {node}, seed {seed}\n".encode())
            puts.append((node, raw, arc.objects.put_table(table), int(valid.sum())))
        t_first, t_last = (datetime.fromisoformat(f"{x.astype('datetime64[us]')}+00:00")
                           for x in (c["time"][0, 0], c["time"][0, -1]))
        deployed_at += [c["deployed"]] * count
        retrieved_at += [c["retrieved"]] * count
        with arc.transaction() as tx:
            for node, (rh, rs), (fh, fs), n_valid in puts:
                arc.register_object(tx, rh, rs, "raw")
                arc.register_object(tx, fh, fs, "fixes")
                row = RawFile(
                    survey_id=survey.id, object_hash=rh, original_name=f"{node}.synthetic",
                    node=node, format="synthetic", size=rs, received_at=utcnow(),
                    received_by=arc.actor, parser="bench-synthetic", n_lines=FIXES_PER_NODE,
                    n_accepted=FIXES_PER_NODE, n_rejected=0, n_ignored=0,
                    n_fixes=FIXES_PER_NODE, n_valid=n_valid, fixes_hash=fh, details="{}",
                    t_first=t_first, t_last=t_last)
                tx.add(row)
                rows.append(row)
            tx.flush()
            arc.log(tx, "load.fixes", {"bench": "synthetic", "nodes": count}, survey_id=survey.id,
                    rows=rows)
    iso = [f"{str(x.astype('datetime64[s]'))}Z" for x in (deployed_at[0], retrieved_at[0])]
    files.write_csv(work / "deployments.csv",
                    ["node", "line", "point", "deployed_utc", "retrieved_utc"],
                    [(nodes[i], f"{line[i]:.0f}", f"{point[i]:.0f}", *iso)
                     for i in range(n_nodes)])
    load_input(arc, survey.id, "deployments", work / "deployments.csv")
    arc.close()
    return {"nodes": n_nodes, "fixes": n_nodes * FIXES_PER_NODE}


def solve(root: Path, partition_fixes: int | None, workers: int | None) -> dict:
    """Solve the bench archive in this (fresh) process; peak RSS before and after."""
    from archive.progress import NoProgress
    from archive.solve import inputs as solve_inputs
    from archive.solve import run as solve_run
    from archive.solve import solving
    from archive.store.archive import Archive
    from archive.store.hashing import table_digest

    limit = partition_fixes or solve_inputs.PARTITION_FIXES
    solving.partitions = lambda a, inp, skip=None: solve_inputs.partitions(
        a, inp, limit=limit, skip=skip)
    arc = Archive.open(root, actor="bench")
    with arc.session() as s:
        sid = arc.survey(s).id
    inp = solve_inputs.survey_inputs(arc, sid, {"stations": None, "nodes": None})
    n_parts = len(solving.partitions(arc, inp))
    del inp
    before = _rss_mb()
    t0 = time.perf_counter()
    res = solve_run.solve_survey(arc, sid, workers=workers, incremental=False)
    same = True
    if not res.created:  # solved before (same manifest): solve its manifest again, unrecorded
        run = solve_run.get_run(arc, sid, res.run_id)
        manifest = solve_run.run_manifest(arc, run)
        inp = solve_inputs.survey_inputs(arc, sid, manifest["selection"], manifest=manifest)
        table, _, _ = solving.solve_inputs(arc, manifest, inp, NoProgress(), workers=workers)
        same = table_digest(table) == run.positions_digest  # vs the first, recorded solve
    seconds = time.perf_counter() - t0
    arc.close()
    return {"rss_before_mb": round(before, 1), "rss_peak_mb": round(_rss_mb(), 1),
            "seconds": round(seconds, 2), "partitions": n_parts, "partition_fixes": limit,
            "positions": res.n_positions, "same_digest": same}


def _child(*args: str) -> dict:
    out = subprocess.run([sys.executable, "-m", "bench.memory", *args], check=True,
                         capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="1e6,3e6,1e7",
                    help="comma-separated fix counts (1e8 works: minutes, several GB of disk)")
    ap.add_argument("--partition-fixes", type=int, default=None,
                    help="fixes per node partition (default: the solver's)")
    ap.add_argument("--workers", type=int, default=None, help="solve on a local Dask cluster")
    ap.add_argument("--keep", default=None, help="build the archives here and keep them")
    ap.add_argument("--build", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--solve", default=None, help=argparse.SUPPRESS)
    ap.add_argument("--fixes", type=float, default=None, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.build:
        print(json.dumps(build(Path(a.build), int(a.fixes))))
        return
    if a.solve:
        print(json.dumps(solve(Path(a.solve), a.partition_fixes, a.workers)))
        return
    base = Path(a.keep) if a.keep else Path(tempfile.mkdtemp(prefix="nodekeep-bench-"))
    extra = []
    if a.partition_fixes:
        extra += ["--partition-fixes", str(a.partition_fixes)]
    if a.workers:
        extra += ["--workers", str(a.workers)]
    print(f"{'fixes':>12} {'nodes':>7} {'parts':>5} {'build s':>8} {'solve s':>8} "
          f"{'fixes/s':>10} {'RSS before':>11} {'RSS peak':>9}  same digest")
    for size in (float(s) for s in a.sizes.split(",")):
        root = base / f"arc-{int(size):d}"
        t0 = time.perf_counter()
        if not (root / "nodekeep.toml").exists():
            built = _child("--build", str(root), "--fixes", str(size))
        else:
            built = {"nodes": round(size / FIXES_PER_NODE), "fixes": int(size)}
        t_build = time.perf_counter() - t0
        r = _child("--solve", str(root), *extra)
        print(f"{built['fixes']:>12,} {built['nodes']:>7,} {r['partitions']:>5} "
              f"{t_build:>8.1f} {r['seconds']:>8.1f} {built['fixes'] / r['seconds']:>10,.0f} "
              f"{r['rss_before_mb']:>8.0f} MB {r['rss_peak_mb']:>6.0f} MB  "
              f"{'yes' if r['same_digest'] else 'NO'}", flush=True)
    if not a.keep:
        import shutil

        shutil.rmtree(base, ignore_errors=True)
    print(f"partition limit {r['partition_fixes']:,} fixes; peak RSS is the solving process's "
          f"maximum resident set size (ru_maxrss); cores: {os.cpu_count()}")


if __name__ == "__main__":
    main()
