"""Benchmark of loading NMEA logs: end to end through the command line, against the custody
floor and a pynmea2 reader measured in the same run.

    python -m bench.ingest [--mb 200] [--repeat 3] [--scan-mb 64] [--baseline-mb 8]
                           [--small 2000] [--small-kb 100] [--harvest 7500]
                           [--harvest-kb 240] [--dir DIR]

Figures printed (best of ``--repeat`` unless said otherwise):

1. start-up: wall time of ``nodekeep --help``, ``nodekeep load fixes --help`` and the
   slowest ``nodekeep COMMAND --help`` of all commands, the heavy modules imported when
   the command line starts (none expected), and a whole ``nodekeep load fixes`` of a
   one-epoch log (archive opened, compiled reader loaded, one file recorded).
2. one large log (``--mb`` of GGA+GSA+RMC at 1 Hz): the custody floor, i.e. SHA-256 of the
   file and a copy of it made durable (fsync), in this process; then ``nodekeep load fixes``
   of it in a fresh archive, as a user runs it; their rates and ratio (goal: >= 150 MB/s
   end to end on two cores).
3. reading on one core (this process pinned to one CPU): nodekeep's reader on the first
   ``--scan-mb`` of that log (goal: >= 300 MB/s), and a per-line pynmea2 reader that
   extracts the same fields (time, position, quality, satellites, DOPs, heights, date,
   RMC status) on the first ``--baseline-mb``; their ratio.
4. many small files: ``--small`` logs of ``--small-kb`` each (2,000 of 100 kB), then a
   day's harvest of a 10,000-station survey, ``--harvest`` logs of ``--harvest-kb``
   (7,500 of 240 kB, 1.8 GB): the custody floor for those files (SHA-256 and a durable copy
   of each) and ``nodekeep load fixes`` of the folder (goal: >= 0.2x the floor).

The machine's load average is printed first: other work on the machine slows every figure.
"""

from __future__ import annotations

import argparse
import hashlib
import os
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
from archive.seeds.nmea_write import write_nmea

HEAVY = ("numba", "scipy", "pandas", "pyarrow", "matplotlib", "dask", "rasterio", "pyproj",
         "sqlalchemy", "alembic", "numpy")
BLOCK = 8 << 20


def gga_gsa_rmc_log(n: int, start: str = "2024-03-01T00:00:00", seed: int = 0,
                    talker: str = "GN") -> bytes:
    """``n`` one-second epochs of GGA, GSA and RMC of a node at rest."""
    rng = np.random.default_rng(seed)
    t = np.datetime64(start, "us") + np.arange(n) * np.timedelta64(1, "s")
    walk = np.cumsum(rng.normal(0, 2e-7, (2, n)), axis=1)
    return write_nmea(t, 35.2171 + walk[0], -101.8313 + walk[1], 907.0 + rng.normal(0, 3, n),
                      np.full(n, -24.1), np.where(rng.random(n) < 0.02, 0, 1),
                      rng.integers(6, 24, n), rng.uniform(0.6, 2.5, n), rng.uniform(1.0, 4.0, n),
                      rng.uniform(1.0, 3.0, n), talker=talker)


def write_log(path: Path, megabytes: float, seed: int = 0, start: str = "2024-03-01") -> int:
    """Write about ``megabytes`` of log (whole days of 1 Hz epochs, cut at an epoch)."""
    per_epoch = len(gga_gsa_rmc_log(100)) / 100
    epochs = max(1, int(megabytes * 1e6 / per_epoch))
    size = 0
    day0 = np.datetime64(start, "D")
    with open(path, "wb") as fh:
        done = 0
        d = 0
        while done < epochs:
            n = min(86_400, epochs - done)
            chunk = gga_gsa_rmc_log(n, str(day0 + np.timedelta64(d, "D")) + "T00:00:00",
                                    seed=seed * 1000 + d)
            fh.write(chunk)
            size += len(chunk)
            done += n
            d += 1
    return size


def _sentence(body: str) -> bytes:
    """One sentence with its checksum and line end."""
    cs = 0
    for c in body.encode():
        cs ^= c
    return f"${body}*{cs:02X}\r\n".encode()


# -- the reference readers ---------------------------------------------------------------

def custody_floor(paths: list[Path], dest: Path) -> float:
    """Seconds to SHA-256 each file and leave a durable copy of it in ``dest``."""
    dest.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    for p in paths:
        digest = hashlib.sha256()
        with open(p, "rb") as src, open(dest / p.name, "wb") as out:
            while block := src.read(BLOCK):
                digest.update(block)
                out.write(block)
            out.flush()
            os.fsync(out.fileno())
        digest.hexdigest()
    fd = os.open(dest, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)
    return time.perf_counter() - t0


def pynmea2_reader(data: bytes) -> tuple[float, int]:
    """A per-line reader built on pynmea2 giving the fields nodekeep keeps per epoch:
    (seconds, epochs). Checksums are checked; GGA, GSA and RMC of one time make one row."""
    import pynmea2

    t0 = time.perf_counter()
    keys = ("time", "lat", "lon", "quality", "sats", "hdop", "alt", "sep", "pdop", "vdop",
            "fix", "date", "status")
    rows: list[list] = []
    current: dict = {}
    date = None
    for raw in data.splitlines():
        try:
            msg = pynmea2.parse(raw.decode("ascii", "replace"), check=True)
        except pynmea2.ParseError:
            continue
        kind = getattr(msg, "sentence_type", "")
        if kind == "GGA":
            if current:
                rows.append([current.get(k) for k in keys])
            current = {"time": msg.timestamp, "lat": msg.latitude, "lon": msg.longitude,
                       "quality": msg.gps_qual, "sats": msg.num_sats,
                       "hdop": msg.horizontal_dil, "alt": msg.altitude, "sep": msg.geo_sep,
                       "date": date}
        elif kind == "GSA":
            current.update(pdop=float(msg.pdop or "nan"), vdop=float(msg.vdop or "nan"),
                           fix=msg.mode_fix_type)
        elif kind == "RMC":
            date = msg.datestamp
            current.update(date=date, status=msg.status, lat=current.get("lat", msg.latitude),
                           lon=current.get("lon", msg.longitude))
    if current:
        rows.append([current.get(k) for k in keys])
    return time.perf_counter() - t0, len(rows)


# -- the command line ---------------------------------------------------------------------

def _nodekeep() -> list[str]:
    exe = Path(sys.executable).with_name("nodekeep")
    return [str(exe)] if exe.exists() else [sys.executable, "-m", "archive"]


def _run(args: list[str], *, check: bool = True) -> tuple[float, float, str]:
    """(wall seconds, CPU seconds of the child, stdout) of one command."""
    before = os.times()
    t0 = time.perf_counter()
    out = subprocess.run(args, capture_output=True, text=True)
    wall = time.perf_counter() - t0
    after = os.times()
    if check and out.returncode != 0:
        raise SystemExit(f"{' '.join(args)} failed ({out.returncode}):\n{out.stderr}")
    cpu = (after.children_user - before.children_user) + \
        (after.children_system - before.children_system)
    return wall, cpu, out.stdout


def fresh_archive(root: Path) -> Path:
    """A new archive with the invented survey, ready to load into."""
    if root.exists():
        shutil.rmtree(root)
    nk = _nodekeep()
    _run([*nk, "init", str(root)])
    _run([*nk, "-A", str(root), "survey", "create", "Kestrel Flats 3D", "--crs", "EPSG:32614",
          "--client", "Harrow Basin Energy", "--contractor", "Bluestem Geophysical Crew 7"])
    return root


def commands() -> list[list[str]]:
    """Every command path of the command line (groups' subcommands included)."""
    import click

    from archive.cli.main import cli

    out: list[list[str]] = []

    def walk(group: click.Group, prefix: list[str]) -> None:
        ctx = click.Context(group)
        for name in group.list_commands(ctx):
            cmd = group.get_command(ctx, name)
            out.append([*prefix, name])
            if isinstance(cmd, click.Group):
                walk(cmd, [*prefix, name])

    walk(cli, [])
    return out


def startup(work: Path, repeat: int) -> None:
    nk = _nodekeep()
    best = {k: min(_run([*nk, *k.split(), "--help"])[0] for _ in range(max(repeat, 3)))
            for k in ("", "load fixes")}
    print(f"  nodekeep --help             {best['']:6.3f} s")
    print(f"  nodekeep load fixes --help  {best['load fixes']:6.3f} s")
    slowest = max((min(_run([*nk, *c, "--help"])[0] for _ in range(2)), " ".join(c))
                   for c in commands())
    print(f"  slowest COMMAND --help      {slowest[0]:6.3f} s  ({slowest[1]}; goal <= 0.3 s)")
    code = ("import sys; import archive.cli.main; "
            f"print(','.join(m for m in {HEAVY!r} if m in sys.modules))")
    heavy = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                           check=True).stdout.strip()
    print(f"  heavy modules at start-up   {heavy or 'none'}")
    one = work / "one"
    one.mkdir(parents=True, exist_ok=True)
    (one / "KF-0001.nmea").write_bytes(gga_gsa_rmc_log(1))
    times = []
    for _ in range(max(repeat, 3)):
        arc = fresh_archive(work / "arc-one")
        times.append(_run([*nk, "-A", str(arc), "load", "fixes", str(one), "-q"])[0])
    print(f"  nodekeep load fixes (1 epoch, whole command)  {min(times):6.3f} s")


def one_large_log(work: Path, mb: float, repeat: int) -> Path:
    path = work / "big" / "KF-0001.nmea"
    path.parent.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    size = write_log(path, mb)
    print(f"  log: {size / 1e6:.1f} MB of GGA+GSA+RMC at 1 Hz "
          f"(written in {time.perf_counter() - t0:.1f} s)")
    floor = min(custody_floor([path], work / f"floor-{k}") for k in range(repeat))
    for k in range(repeat):
        shutil.rmtree(work / f"floor-{k}", ignore_errors=True)
    nk = _nodekeep()
    runs = []
    for _ in range(repeat):
        arc = fresh_archive(work / "arc-big")
        runs.append(_run([*nk, "-A", str(arc), "load", "fixes", str(path), "-q"])[:2])
    wall, cpu = min(runs)
    e2e, fl = size / 1e6 / wall, size / 1e6 / floor
    print(f"  custody floor (SHA-256 + durable copy)  {fl:7.1f} MB/s  ({floor:.2f} s)")
    print(f"  nodekeep load fixes, end to end         {e2e:7.1f} MB/s  ({wall:.2f} s wall, "
          f"{cpu:.2f} s CPU; goal >= 150 MB/s)")
    print(f"  end to end / floor                      {e2e / fl:7.2f} x")
    shutil.rmtree(work / "arc-big", ignore_errors=True)
    return path


def one_core(path: Path, scan_mb: float, baseline_mb: float, repeat: int) -> None:
    from archive.ingest.nmea import parse_nmea

    data = path.read_bytes()
    cut = data.rfind(b"\r\n", 0, int(scan_mb * 1e6)) + 2
    scan = data[:cut]
    pinned = "not pinned (no CPU affinity here)"
    old = None
    if hasattr(os, "sched_setaffinity"):
        old = os.sched_getaffinity(0)
        os.sched_setaffinity(0, {min(old)})
        pinned = f"pinned to CPU {min(old)}"
    try:
        parse_nmea(scan[:100_000], node="warm", raw_hash="0" * 64)  # compiled reader loaded
        best = float("inf")
        for _ in range(repeat):
            t0 = time.perf_counter()
            r = parse_nmea(scan, node="KF-0001", raw_hash="0" * 64)
            best = min(best, time.perf_counter() - t0)
        ours = len(scan) / 1e6 / best
        print(f"  nodekeep reader   {ours:7.1f} MB/s  {r.n_fixes / best:12,.0f} epochs/s  "
              f"({len(scan) / 1e6:.0f} MB, {pinned}; goal >= 300 MB/s)")
        bcut = data.rfind(b"\r\n", 0, int(baseline_mb * 1e6)) + 2
        bsec, bep = min(pynmea2_reader(data[:bcut]) for _ in range(repeat))
        theirs = bcut / 1e6 / bsec
        print(f"  pynmea2 reader    {theirs:7.1f} MB/s  {bep / bsec:12,.0f} epochs/s  "
              f"({bcut / 1e6:.0f} MB, same fields)")
        print(f"  nodekeep / pynmea2  {ours / theirs:7.1f} x")
    finally:
        if old is not None:
            os.sched_setaffinity(0, old)


def many_files(work: Path, label: str, count: int, kb: float) -> None:
    folder = work / label
    folder.mkdir(parents=True, exist_ok=True)
    per_epoch = len(gga_gsa_rmc_log(100)) / 100
    n = max(1, int(kb * 1000 / per_epoch))
    t0 = time.perf_counter()
    base = gga_gsa_rmc_log(n * 4, seed=7)
    lines = base.split(b"\r\n")
    size = 0
    paths = []
    for k in range(count):
        # each log different (its own bytes): a window of the base log, shifted per file
        off = (k * 3) % (len(lines) - 3 * n - 1)
        off -= off % 3
        body = b"\r\n".join(lines[off:off + 3 * n]) + b"\r\n"
        p = folder / f"KF-{k:05d}.nmea"
        p.write_bytes(body + _sentence(f"PBNCH,{k}"))
        paths.append(p)
        size += len(body)
    print(f"  {label}: {count} logs of {size / count / 1e3:.0f} kB, {size / 1e6:.0f} MB "
          f"(written in {time.perf_counter() - t0:.1f} s)")
    floor = custody_floor(paths, work / f"{label}-floor")
    shutil.rmtree(work / f"{label}-floor", ignore_errors=True)
    arc = fresh_archive(work / f"arc-{label}")
    wall, cpu, _ = _run([*_nodekeep(), "-A", str(arc), "load", "fixes", str(folder), "-q"])
    fl, e2e = size / 1e6 / floor, size / 1e6 / wall
    print(f"    custody floor        {fl:7.1f} MB/s  {count / floor:8.0f} files/s")
    print(f"    nodekeep load fixes  {e2e:7.1f} MB/s  {count / wall:8.0f} files/s  "
          f"({wall:.1f} s wall, {cpu:.1f} s CPU)")
    print(f"    end to end / floor   {e2e / fl:7.2f} x  (goal >= 0.2 x)")
    shutil.rmtree(work / f"arc-{label}", ignore_errors=True)
    shutil.rmtree(folder, ignore_errors=True)


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(prog="python -m bench.ingest",
                                 description=__doc__.split("\n")[0])
    ap.add_argument("--mb", type=float, default=200, help="size of the large log (MB)")
    ap.add_argument("--repeat", type=int, default=3, help="runs per figure (best kept)")
    ap.add_argument("--scan-mb", type=float, default=64, help="bytes read on one core (MB)")
    ap.add_argument("--baseline-mb", type=float, default=8, help="bytes given to pynmea2 (MB)")
    ap.add_argument("--small", type=int, default=2000, help="number of small logs")
    ap.add_argument("--small-kb", type=float, default=100, help="size of each small log")
    ap.add_argument("--harvest", type=int, default=7500, help="number of logs of a harvest")
    ap.add_argument("--harvest-kb", type=float, default=240, help="size of each harvest log")
    ap.add_argument("--dir", default=None, help="work folder (default: a temporary one)")
    a = ap.parse_args(argv)
    load = os.getloadavg() if hasattr(os, "getloadavg") else (float("nan"),) * 3
    print(f"machine: {os.cpu_count()} CPUs, load average {load[0]:.2f} {load[1]:.2f} "
          f"{load[2]:.2f}")
    work = Path(a.dir or tempfile.mkdtemp(prefix="nodekeep-bench-"))
    work.mkdir(parents=True, exist_ok=True)
    try:
        print("start-up")
        startup(work, a.repeat)
        print("one large log")
        path = one_large_log(work, a.mb, a.repeat)
        print("one core")
        one_core(path, a.scan_mb, a.baseline_mb, a.repeat)
        shutil.rmtree(path.parent, ignore_errors=True)
        print("many small files")
        if a.small:
            many_files(work, "small", a.small, a.small_kb)
        if a.harvest:
            many_files(work, "harvest", a.harvest, a.harvest_kb)
    finally:
        if not a.dir:
            shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
