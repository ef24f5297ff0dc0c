"""Node logs for the fault-injection tests, written by the project's NMEA writer.

Positions near the invented Kestrel Flats 3D prospect (UTM zone 14N), one fix a second, with
a few damaged lines (a bad checksum, a truncated sentence, binary junk) so every load has
rejects to account for.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
from archive.seeds.nmea_write import write_nmea

START = np.datetime64("2024-03-04T06:00:00", "us")
DAMAGE = (b"$GPGGA,060000.00,3530.00000,N,09930.00000,W,1,08,0.9,545.4,M,-26.0,M,,*00\r\n",
          b"$GPGGA,060001.00,3530.0\r\n",
          b"\x00\xff\xfe\x13junk after a power loss\r\n")


def node_log(seed: int, epochs: int) -> bytes:
    """NMEA text of one node sitting still for ``epochs`` seconds, plus three damaged lines."""
    rng = np.random.default_rng(seed)
    t = START + np.arange(epochs).astype("timedelta64[s]").astype("timedelta64[us]")
    lat = 35.5 + 0.001 * seed + rng.normal(0, 2e-5, epochs)
    lon = -99.5 + 0.001 * seed + rng.normal(0, 2e-5, epochs)
    body = write_nmea(t, lat, lon, 545.0 + rng.normal(0, 3, epochs), np.full(epochs, -26.0),
                      np.ones(epochs, dtype=np.int64), np.full(epochs, 8),
                      rng.uniform(0.7, 1.5, epochs))
    cut = len(body) // 2
    cut = body.index(b"\n", cut) + 1
    return body[:cut] + b"".join(DAMAGE) + body[cut:]


def write_logs(folder: Path, count: int, epochs: int, *, first: int = 1001) -> list[Path]:
    """``count`` logs named ``N<serial>.nmea`` in ``folder``."""
    folder.mkdir(parents=True, exist_ok=True)
    paths = []
    for k in range(count):
        p = folder / f"N{first + k}.nmea"
        p.write_bytes(node_log(first + k, epochs))
        paths.append(p)
    return paths
