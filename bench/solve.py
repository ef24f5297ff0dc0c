"""Benchmark of the solver: segment reductions against a pandas groupby-apply baseline.

    python -m bench.solve [--deployments 400] [--hours 24] [--large 20000000] [--workers 2]
                          [--cli 3000000]

1. The estimator stage (robust Huber centre by IRLS with MAD scale and chi-square rejection,
   then batch-means covariance) on every deployment at once with
   :func:`archive.solve.robust.robust_centre` and
   :func:`archive.solve.uncertainty.batch_covariance`, and the same estimator written the
   straightforward way: ``DataFrame.groupby(deployment).apply(one_cloud)``. Both run on the
   same arrays in this process; the script checks they agree and prints fixes/s per core
   and the ratio (target >= 20x), for day-long clouds and for the same fixes cut into
   clouds twelve times shorter (the ratio grows as clouds get shorter: the baseline pays
   a fixed cost per cloud and per numpy call, the compiled kernels do not). The kernels
   run on ``--threads`` threads (clouds split between them); the one-off loading of the
   compiled kernels from the on-disk cache is done before timing and printed apart.
2. With ``--large N``: N simulated fixes are written to a Parquet file, one row group per
   partition of nodes, and solved end to end from that file by
   :func:`archive.solve.engine.solve_fixes`, one row group at a time per worker process
   (streaming by node partition; each worker runs the kernels on one thread, the pool
   fills the cores), printing the time, the rate and the peak memory of parent and
   largest worker.
3. With ``--cli N``: a generated archive of about N fixes (one fix table per node, as the
   loader stores them) solved by ``nodekeep solve`` in a fresh process, from scratch, and by
   the engine alone on the same partitions with the arrays already in memory: both rates,
   their ratio, the command's start-up time and peak memory.
"""

from __future__ import annotations

import argparse
import os
import resource
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
from archive.seeds.gnss_errors import gauss_markov
from scipy.stats import chi2

from archive.ingest.schema import FIX_SCHEMA
from archive.solve import kernels
from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.solve.robust import robust_centre
from archive.solve.segments import from_local
from archive.solve.uncertainty import batch_covariance
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer
from archive.survey.schema import DEPLOYMENT_LOG_SCHEMA, STATION_SCHEMA

EPSG = 32614
T0_US = 1_714_521_600_000_000  # 2024-05-01T00:00:00Z


def clouds(n_dep: int, n_epochs: int, seed: int = 0, dt: float = 30.0
           ) -> tuple[np.ndarray, ...]:
    """Local east/north errors (Gauss–Markov 2 m, 30 min, bursts), HDOP, time, segment."""
    rng = np.random.default_rng(seed)
    shape = (n_dep, n_epochs)

    def gm() -> np.ndarray:  # the seeds' error model: one slow part, 2 m / 30 min
        return gauss_markov(rng, n_epochs, dt, 2.0, 1800.0, size=n_dep)

    hdop = rng.uniform(0.7, 2.5, shape)
    e, n = gm() + rng.normal(0, 0.5, shape), gm() + rng.normal(0, 0.5, shape)
    burst = rng.random(shape) < 0.01
    e[burst] += rng.uniform(15, 60, burst.sum())
    t = np.broadcast_to(np.arange(n_epochs) * dt, shape)
    seg = np.repeat(np.arange(n_dep), n_epochs)
    return e.ravel(), n.ravel(), hdop.ravel(), t.ravel().copy(), seg


def vectorised(e, n, hdop, t, seg, n_seg, p) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The estimator stage over all clouds at once (segment reductions)."""
    est = p["estimate"]
    r = robust_centre([e, n], hdop, seg, n_seg, estimator="huber", huber_k=est["huber_k"],
                      reject_quantile=est["reject_quantile"], iterations=est["iterations"],
                      scale_updates=est["scale_updates"], scale_sample=est["scale_sample"])
    ce, cn = r.centre
    cov = batch_covariance(e - ce[seg], n - cn[seg], r.weight, t, seg, n_seg,
                           batch_s=p["uncertainty"]["batch_hours"] * 3600,
                           min_batches=p["uncertainty"]["min_batches"])
    return ce, cn, cov.vee


def _sub(x: np.ndarray, cap: int) -> np.ndarray:
    m = len(x)
    if m <= cap:
        return x
    j = np.arange(cap)
    return x[((2 * j + 1) * m) // (2 * cap)]


def one_cloud(g: pd.DataFrame, p: dict) -> pd.Series:
    """The same estimator for one cloud, written plainly (the baseline)."""
    est = p["estimate"]
    k, cap = est["huber_k"], est["scale_sample"]
    e, n, h, t = (g[c].to_numpy() for c in ("e", "n", "hdop", "t"))
    prior = 1 / h**2
    ce, cn = np.median(_sub(e, cap)), np.median(_sub(n, cap))
    unit = np.sqrt(chi2.ppf(0.5, 2))
    limit = np.sqrt(chi2.ppf(est["reject_quantile"], 2))
    scale = 1.0
    for _ in range(est["scale_updates"]):
        scale = max(np.median(_sub(np.hypot(e - ce, n - cn) / h, cap)) / unit, 1e-3)
        for _ in range(est["iterations"]):
            r = np.hypot(e - ce, n - cn) / h / scale
            w = prior * k / np.maximum(r, k)
            ce, cn = np.sum(w * e) / np.sum(w), np.sum(w * n) / np.sum(w)
    active = np.hypot(e - ce, n - cn) / h / scale <= limit
    if not active.all():
        for _ in range(est["iterations"]):
            r = np.hypot(e - ce, n - cn) / h / scale
            w = prior * k / np.maximum(r, k) * active
            ce, cn = np.sum(w * e) / np.sum(w), np.sum(w * n) / np.sum(w)
    r = np.hypot(e - ce, n - cn) / h / scale
    w = prior * k / np.maximum(r, k) * active
    span = t[-1] - t[0]
    length = min(p["uncertainty"]["batch_hours"] * 3600, max(span, 1e-9) / 4)
    nb = max(int(np.ceil(span / length - 1e-9)), 1)
    b = np.minimum(((t - t[0]) / length).astype(int), nb - 1)
    wb = np.bincount(b, weights=w, minlength=nb)
    eb = np.bincount(b, weights=w * (e - ce), minlength=nb)
    u = eb - wb * eb.sum() / wb.sum()
    m = (wb > 0).sum()
    vee = m / (m - 1) * np.sum(u * u) / wb.sum() ** 2
    return pd.Series({"ce": ce, "cn": cn, "vee": vee})


def compare(n_dep: int, hours: float) -> None:
    """Part 1: vectorised vs groupby-apply on the same data."""
    p = default_params()
    n_epochs = int(hours * 120)
    e, n, h, t, seg = clouds(n_dep, n_epochs)
    total = len(e)
    t1 = time.perf_counter()
    vectorised(e[:2000], n[:2000], h[:2000], t[:2000], seg[:2000], int(seg[1999]) + 1, p)
    load = time.perf_counter() - t1
    fast = np.inf
    for _ in range(3):  # best of three: the machine is shared
        t1 = time.perf_counter()
        ce, cn, vee = vectorised(e, n, h, t, seg, n_dep, p)
        fast = min(fast, time.perf_counter() - t1)
    threads = kernels.get_threads()
    df = pd.DataFrame({"seg": seg, "e": e, "n": n, "hdop": h, "t": t})
    t1 = time.perf_counter()
    base = df.groupby("seg", sort=True).apply(one_cloud, p, include_groups=False)
    slow = time.perf_counter() - t1
    diff = max(np.max(np.abs(base["ce"].to_numpy() - ce)), np.max(np.abs(base["cn"].to_numpy() - cn)))
    vdiff = np.max(np.abs(base["vee"].to_numpy() - vee) / vee)
    print(f"estimator stage, {n_dep} deployments x {n_epochs} fixes = {total:,} fixes")
    print(f"  compiled kernels   : {fast:7.3f} s  {total / fast / threads:12,.0f} fixes/s per core"
          f"  ({threads} threads; loading the compiled kernels took {load:.2f} s once)")
    print(f"  groupby-apply      : {slow:7.2f} s  {total / slow:12,.0f} fixes/s per core")
    print(f"  ratio              : {slow / fast:7.1f} x   (target >= 20 x; per core "
          f"{slow / (fast * threads):.1f} x)")
    print(f"  agreement          : centres within {diff:.1e} m, variances within {vdiff:.1e}")


# -- part 2: a large streamed end-to-end run ---------------------------------------------

def _partition(first_node: int, n_nodes: int, n_epochs: int, seed: int) -> tuple[pa.Table, ...]:
    """Fixes, deployments and stations of ``n_nodes`` nodes, one per station."""
    rng = np.random.default_rng(seed)
    ids = np.arange(first_node, first_node + n_nodes)
    st_e = 600000.0 + (ids % 400) * 25.0
    st_n = 3580000.0 + (ids // 400) * 200.0
    lon0, lat0 = transformer(EPSG, WGS84_GEOGRAPHIC).transform(st_e, st_n)
    e, n, h, t, seg = clouds(n_nodes, n_epochs, seed=seed)
    lat, lon = from_local(e, n, np.asarray(lat0)[seg], np.asarray(lon0)[seg])
    nodes = np.array([f"KF{i:07d}" for i in ids], dtype=object)
    n_all = len(e)
    fixes = pa.table({
        "node": pa.array(nodes[seg], pa.string()),
        "time": pa.array(T0_US + (t * 1e6).astype(np.int64)).cast(FIX_SCHEMA.field("time").type),
        "lat": lat, "lon": lon, "h_ell": np.full(n_all, 215.0), "h_msl": np.full(n_all, 240.0),
        "geoid_sep": np.full(n_all, -25.0), "quality": pa.array(np.ones(n_all), pa.int8()),
        "fix_type": pa.array(np.full(n_all, 3), pa.int8()), "valid": np.ones(n_all, bool),
        "n_sats": pa.array(rng.integers(6, 13, n_all), pa.int16()),
        "pdop": pa.array((h * 1.6).astype(np.float32)), "hdop": pa.array(h.astype(np.float32)),
        "vdop": pa.array((h * 1.3).astype(np.float32)),
        "raw_hash": pa.array(np.full(n_all, "0" * 64, dtype=object), pa.string()),
        "raw_line": np.tile(np.arange(1, n_epochs + 1), n_nodes),
    }, schema=FIX_SCHEMA)
    end = T0_US + int(n_epochs * 30e6)
    deps = pa.table({
        "node": nodes.tolist(), "line": 1001.0 + ids // 400, "point": 2001.0 + ids % 400,
        "index": pa.array(np.ones(n_nodes), pa.int8()),
        "deployed": pa.array(np.full(n_nodes, T0_US)).cast(DEPLOYMENT_LOG_SCHEMA.field("deployed").type),
        "retrieved": pa.array(np.full(n_nodes, end)).cast(DEPLOYMENT_LOG_SCHEMA.field("retrieved").type),
        "src_line": ids + 1}, schema=DEPLOYMENT_LOG_SCHEMA)
    stations = pa.table({
        "line": 1001.0 + ids // 400, "point": 2001.0 + ids % 400,
        "index": pa.array(np.ones(n_nodes), pa.int8()), "code": ["G1"] * n_nodes,
        "easting": st_e, "northing": st_n, "elevation": np.full(n_nodes, 240.0),
        "kind": ["R"] * n_nodes, "src_line": ids + 1}, schema=STATION_SCHEMA)
    return fixes, deps, stations


def _one_thread() -> None:
    kernels.set_threads(1)  # the pool already fills the cores


def _solve_group(args: tuple[str, int, pa.Table, pa.Table]) -> int:
    path, group, deps, stations = args
    fixes = pq.ParquetFile(path).read_row_group(group)
    out = solve_fixes(fixes, deps, stations, default_params(), EPSG)
    return out.positions.num_rows


def large(total: int, workers: int, per_node: int = 8640, nodes_per_group: int = 200) -> None:
    """Part 2: ``total`` fixes written to Parquet, then solved streaming by row group."""
    n_nodes = max(total // per_node, 1)
    groups = []
    with tempfile.TemporaryDirectory(prefix="nodekeep-bench-") as tmp:
        path = os.path.join(tmp, "fixes.parquet")
        t1 = time.perf_counter()
        with pq.ParquetWriter(path, FIX_SCHEMA, compression="zstd") as writer:
            for g, first in enumerate(range(0, n_nodes, nodes_per_group)):
                k = min(nodes_per_group, n_nodes - first)
                fixes, deps, stations = _partition(first, k, per_node, seed=g)
                writer.write_table(fixes, row_group_size=fixes.num_rows)
                groups.append((path, g, deps, stations))
        written = n_nodes * per_node
        print(f"\nlarge run: wrote {written:,} fixes of {n_nodes:,} nodes "
              f"({os.path.getsize(path) / 1e6:,.0f} MB Parquet) in {time.perf_counter() - t1:.1f} s")
        t1 = time.perf_counter()
        with ProcessPoolExecutor(max_workers=workers, initializer=_one_thread) as pool:
            rows = sum(pool.map(_solve_group, groups))
        took = time.perf_counter() - t1
    self_rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    child_rss = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    print(f"  solved {rows:,} positions from {written:,} fixes in {took:.1f} s with {workers} "
          f"workers: {written / took:,.0f} fixes/s, {written / took / workers:,.0f} per core")
    print(f"  peak RSS: parent {self_rss:,.0f} MB, largest worker {child_rss:,.0f} MB")


# -- part 3: the same work through the command line -------------------------------------

def _engine_seconds(root: str) -> tuple[float, int]:
    """Seconds of the engine alone on the archive's partitions (fix arrays read before the
    clock starts; the kernels on this process's threads), and the fixes solved."""
    from archive.solve import inputs as solve_inputs
    from archive.store.archive import Archive

    arc = Archive.open(root, actor="bench")
    with arc.session() as s:
        sid = arc.survey(s).id
    inp = solve_inputs.survey_inputs(arc, sid, {"stations": None, "nodes": None})
    parts = solve_inputs.partitions(arc, inp)
    loaded = [(solve_inputs.load_fix_arrays(arc, p.fix_hashes), p) for p in parts]
    n = sum(len(fx) for fx, _ in loaded)
    solve_fixes(loaded[0][0], loaded[0][1].deployments, inp.stations, default_params(),
                EPSG, used=inp.used, finish=False)  # kernels loaded before the clock
    t0 = time.perf_counter()
    for fx, p in loaded:
        solve_fixes(fx, p.deployments, inp.stations, default_params(), EPSG, used=inp.used,
                    finish=False)
    took = time.perf_counter() - t0
    arc.close()
    return took, n


def _peak_mb(pid: int) -> float:
    """The peak resident memory so far of a running process (its own image since exec,
    Linux's VmHWM), 0 when unknown."""
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return 0.0


def _command(*args: str) -> tuple[float, float, float]:
    """Run ``nodekeep ARGS`` in a fresh process: its wall seconds, CPU seconds (user +
    system) and peak RSS in MB. The peak is the command's own, polled from /proc: the
    rusage of a child counts the memory of this process at the fork (Linux keeps the
    high-water mark across exec), which here holds the engine's arrays or the build's."""
    import subprocess
    import sys

    t0 = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "archive.cli.main", *args],
                            stdout=subprocess.DEVNULL)
    peak = 0.0
    while proc.poll() is None:
        peak = max(peak, _peak_mb(proc.pid))
        time.sleep(0.02)
    took = time.perf_counter() - t0
    if proc.returncode:
        raise subprocess.CalledProcessError(proc.returncode, proc.args)
    return took, _cpu_of_children(), peak


_CHILD_CPU = [0.0]


def _cpu_of_children() -> float:
    """CPU seconds (user + system) of the children waited for since the last call."""
    r = resource.getrusage(resource.RUSAGE_CHILDREN)
    total = r.ru_utime + r.ru_stime
    took, _CHILD_CPU[0] = total - _CHILD_CPU[0], total
    return took


def cli(total: int) -> None:
    """Part 3: a generated survey of about ``total`` fixes (``bench.memory``'s archive, a
    fix table per node) solved by ``nodekeep solve`` in a fresh process, from scratch,
    beside the engine alone on the same partitions; both rates and their ratio, the
    command's start-up time and its peak memory."""
    import shutil

    from bench.memory import build

    with tempfile.TemporaryDirectory(prefix="nodekeep-bench-") as tmp:
        root = os.path.join(tmp, "arc")
        built = build(Path(root), total)
        print(f"\ncommand line: {built['fixes']:,} fixes of {built['nodes']:,} nodes, "
              f"{built['nodes']:,} fix tables")
        _cpu_of_children()  # the build's processes
        start = min(_command("solve", "--help")[0] for _ in range(3))
        eng, n = _engine_seconds(root)
        fresh = os.path.join(tmp, "fresh")
        shutil.copytree(root, fresh)
        took, cpu, peak = _command("-A", fresh, "solve", "--quiet")
    print(f"  start-up ('nodekeep solve --help'): {start:.2f} s")
    print(f"  engine alone : {n / eng:>12,.0f} fixes/s ({eng:.2f} s, arrays in memory)")
    print(f"  nodekeep solve: {n / took:>12,.0f} fixes/s ({took:.2f} s from scratch: start-up, "
          f"catalog, reading, solving, storing; {cpu:.2f} CPU seconds)")
    print(f"  ratio command/engine: {eng / took:.2f}; peak RSS of the command "
          f"{peak:,.0f} MB ({peak * 2**20 / n:,.0f} bytes a fix)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--deployments", type=int, default=400)
    ap.add_argument("--hours", type=float, default=24.0, help="hours of 30 s fixes each")
    ap.add_argument("--large", type=int, default=0, metavar="N",
                    help="also solve N simulated fixes end to end from Parquet")
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--threads", type=int, default=kernels.get_threads(),
                    help="threads of the compiled kernels in part 1")
    ap.add_argument("--skip-compare", action="store_true", help="only the large run")
    ap.add_argument("--cli", type=int, default=0, metavar="N",
                    help="also solve a generated survey of about N fixes through "
                         "'nodekeep solve' beside the engine alone")
    args = ap.parse_args()
    kernels.set_threads(args.threads)
    if not args.skip_compare:
        compare(args.deployments, args.hours)
        # the same work cut into many short clouds: where per-cloud overhead dominates
        compare(args.deployments * 12, args.hours / 12)
    if args.large:
        large(args.large, args.workers)
    if args.cli:
        cli(args.cli)


if __name__ == "__main__":
    main()
