"""Benchmark of the NMEA reader: MB/s and epochs/s against a per-line pynmea2 baseline.

    python -m bench.ingest [--mb 64] [--baseline-mb 8] [--stream-mb 256]

Generates a realistic node log (multi-GNSS: GN GGA, two GSA, RMC and three GSV per epoch, a
proprietary sentence every 10 s, 1 Hz), parses it with :func:`archive.ingest.nmea.parse_nmea`
and parses its first megabytes with a per-line reader built on pynmea2 (checksums checked,
the same fields converted), both pinned to the same single CPU and timed best of 3, and
prints both rates and their ratio. Then it writes a larger log to a temporary file and loads
it through the streaming path in a separate process (the one ``nodekeep load fixes`` uses,
on the same CPU), reporting that process's peak memory.
Targets: >= 30x the baseline and >= 50 MB/s per core.
"""

from __future__ import annotations

import argparse
import functools
import operator
import os
import resource
import subprocess
import sys
import tempfile
import time

import numpy as np

from archive.ingest.nmea_write import write_nmea

DAY_EPOCHS = 86_400


def _sentence(body: str) -> bytes:
    cs = functools.reduce(operator.xor, body.encode(), 0)
    return f"${body}*{cs:02X}".encode()


def _gsv(n: int) -> list[bytes]:
    return [_sentence(f"GPGSV,3,{k},11,03,03,111,00,04,15,270,00,06,01,010,00,13,06,292,00")
            for k in (1, 2, 3)]


def realistic_log(n: int, start: str = "2024-03-01T00:00:00", seed: int = 0) -> bytes:
    """``n`` one-second epochs of a multi-GNSS node at rest, with the usual extra sentences."""
    rng = np.random.default_rng(seed)
    t = np.datetime64(start, "us") + np.arange(n) * np.timedelta64(1, "s")
    walk = np.cumsum(rng.normal(0, 2e-7, (2, n)), axis=1)
    args = (t, 35.2171 + walk[0], -101.8313 + walk[1], 912.0 + rng.normal(0, 3, n),
            np.full(n, -24.1), np.where(rng.random(n) < 0.02, 0, 1), rng.integers(6, 24, n),
            rng.uniform(0.6, 2.5, n), rng.uniform(1.0, 4.0, n), rng.uniform(1.0, 3.0, n))
    gga = write_nmea(*args, talker="GN", rmc=False, gsa=False).split(b"\r\n")[:-1]
    gsa = write_nmea(*args, talker="GN", rmc=False, gsa=True).split(b"\r\n")[1::2]
    rmc = write_nmea(*args, talker="GN", rmc=True, gsa=False).split(b"\r\n")[1::2]
    gsv = _gsv(n)
    pubx = _sentence("PUBX,00,000000.00,3513.02600,N,10149.87800,W,912.000,G3,2.1,2.0,0.0,"
                     "0.0,0.0,,1.2,1.9,1.2,14,0,0")
    lines: list[bytes] = []
    for i in range(n):
        lines += [gga[i], gsa[i], gsa[i], rmc[i], *gsv]
        if i % 10 == 0:
            lines.append(pubx)
    return b"\r\n".join(lines) + b"\r\n"


def baseline(data: bytes) -> tuple[float, int]:
    """Per-line pynmea2 reader: (seconds, epochs)."""
    import pynmea2

    t0 = time.perf_counter()
    rows = []
    date = None
    dops = None
    for raw in data.splitlines():
        try:
            msg = pynmea2.parse(raw.decode("ascii", "replace"), check=True)
        except pynmea2.ParseError:
            continue
        kind = getattr(msg, "sentence_type", "")
        if kind == "GGA":
            rows.append([msg.timestamp, msg.latitude, msg.longitude, msg.gps_qual,
                         msg.num_sats, msg.horizontal_dil, msg.altitude, msg.geo_sep, date])
        elif kind == "RMC":
            date = msg.datestamp
        elif kind == "GSA":
            dops = (float(msg.pdop or "nan"), float(msg.vdop or "nan"))
    del dops
    return time.perf_counter() - t0, len(rows)


_CHILD = """
import json, sys, time
from archive.ingest.parse_file import parse_file
t0 = time.perf_counter()
r = parse_file({"objects_url": sys.argv[2], "path": sys.argv[1], "format": "nmea",
                "node": "KF-BENCH", "raw_hash": "0" * 64})
el = time.perf_counter() - t0
hwm = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(json.dumps({"ok": r["ok"], "n_fixes": r.get("n_fixes"), "seconds": el,
                  "maxrss_kb": int(hwm)}))
"""


def _one_core() -> str:
    """Pin this process (and the streamed child) to one CPU so that both readers, and any
    threads of numba or pyarrow, run on a single core. Returns what was done."""
    if not hasattr(os, "sched_setaffinity"):
        return "not pinned (no CPU affinity on this system)"
    cpu = min(os.sched_getaffinity(0))
    os.sched_setaffinity(0, {cpu})
    return f"pinned to CPU {cpu}"


def main(argv: list[str] | None = None) -> None:
    ap = argparse.ArgumentParser(prog="python -m bench.ingest", description=__doc__.split("\n")[0])
    ap.add_argument("--mb", type=float, default=64, help="size of the in-memory log (MB)")
    ap.add_argument("--baseline-mb", type=float, default=8, help="bytes given to the baseline")
    ap.add_argument("--stream-mb", type=float, default=256, help="size of the streamed log")
    a = ap.parse_args(argv)
    cpu = _one_core()
    from archive.ingest.nmea import parse_nmea

    per_epoch = len(realistic_log(10))
    n = max(10, int(a.mb * 1e6 / (per_epoch / 10)))
    t0 = time.perf_counter()
    data = realistic_log(n)
    print(f"generated {len(data) / 1e6:.1f} MB, {n} epochs in {time.perf_counter() - t0:.1f} s; "
          f"{cpu}")
    parse_nmea(data[:100_000], node="warm", raw_hash="0" * 64)  # load the compiled scanner
    best = float("inf")
    for _ in range(3):
        t0 = time.perf_counter()
        r = parse_nmea(data, node="KF-BENCH", raw_hash="0" * 64)
        best = min(best, time.perf_counter() - t0)
    assert r.fixes.num_rows == n, (r.fixes.num_rows, n)
    mbs = len(data) / 1e6 / best
    print(f"nodekeep  : {mbs:8.1f} MB/s  {n / best:12,.0f} epochs/s  (one core, best of 3)")
    nb = int(a.baseline_mb * 1e6)
    cut = data.rfind(b"\r\n", 0, nb) + 2
    bsec, bep = min(baseline(data[:cut]) for _ in range(3))
    bmbs = cut / 1e6 / bsec
    print(f"pynmea2   : {bmbs:8.1f} MB/s  {bep / bsec:12,.0f} epochs/s  (one core, best of 3)")
    print(f"ratio     : {mbs / bmbs:8.1f} x  (target >= 30 x; speed target >= 50 MB/s per core)")
    if a.stream_mb <= 0:
        return
    with tempfile.TemporaryDirectory(prefix="nodekeep-bench-") as tmp:
        path = os.path.join(tmp, "KF-BENCH.nmea")
        days = max(1, int(np.ceil(a.stream_mb * 1e6 / (per_epoch / 10 * DAY_EPOCHS))))
        size = 0
        with open(path, "wb") as fh:
            for d in range(days):
                start = str(np.datetime64("2024-03-01") + np.timedelta64(d, "D")) + "T00:00:00"
                chunk = realistic_log(DAY_EPOCHS, start=start, seed=d)
                fh.write(chunk)
                size += len(chunk)
        out = subprocess.run([sys.executable, "-c", _CHILD, path, os.path.join(tmp, "objects")],
                             capture_output=True, text=True, check=True)
        import json

        res = json.loads(out.stdout.strip().splitlines()[-1])
        print(f"streamed  : {size / 1e6:.0f} MB file, {res['n_fixes']:,} fixes, "
              f"{size / 1e6 / res['seconds']:.1f} MB/s including Parquet writing, "
              f"peak memory {res['maxrss_kb'] / 1024:.0f} MB "
              f"(in-memory run of this process: {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB)")


if __name__ == "__main__":
    main()
