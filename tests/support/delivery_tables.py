"""Shared builders for delivery tests: final-position-like tables and independent readers.

The readers here slice fixed columns by the published layouts (SEG SPS format rev 2.1 (2006),
point record layout; SEG-P1 data record of SEG, "Standard exchange formats for positional
data", Geophysics 1983, columns as read by GDAL's SEG-P1 driver) and share no code with the
writers under test.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta

import numpy as np
import pyarrow as pa

from archive.deliver.context import DeliveryContext

EPSG = 32614  # WGS 84 / UTM zone 14N (the test survey's CRS)


def final_table(n: int = 12, *, seed: int = 7, east0: float = 612_345.0,
                north0: float = 3_512_345.0) -> pa.Table:
    """A final-positions-like table of ``n`` receivers on two lines (invented survey)."""
    rng = np.random.default_rng(seed)
    half = (n + 1) // 2
    line = np.r_[np.full(half, 1001.0), np.full(n - half, 1002.0)]
    point = np.r_[2001.0 + np.arange(half), 2001.0 + np.arange(n - half)]
    east = east0 + 25.0 * (point - 2001) + rng.uniform(-2, 2, n)
    north = north0 + 200.0 * (line - 1001) + rng.uniform(-2, 2, n)
    height = 400.0 + rng.uniform(-30, 30, n)
    t_end = [datetime(2024, 3, 14, 5, 6, 7, tzinfo=UTC).replace(second=s % 60, minute=s // 60)
             for s in range(n)]
    return pa.table({
        "line": pa.array(line), "point": pa.array(point),
        "index": pa.array(np.ones(n, dtype=np.int8)),
        "node": pa.array([f"N{5000 + i}" for i in range(n)]),
        "easting": pa.array(east), "northing": pa.array(north), "height": pa.array(height),
        "height_source": pa.array(["model"] * n),
        "sigma_e": pa.array(rng.uniform(0.2, 0.9, n)),
        "sigma_n": pa.array(rng.uniform(0.2, 0.9, n)),
        "r95": pa.array(rng.uniform(0.5, 2.0, n)),
        "n_used": pa.array(rng.integers(100, 5000, n)),
        "n_rejected": pa.array(rng.integers(0, 50, n)),
        "flags": pa.array([""] * n), "source": pa.array(["solver"] * n),
        "t_end": pa.array(t_end, pa.timestamp("us", tz="UTC")),
        # each receiver laid out three days before its last fix (one occupation each)
        "deployed": pa.array([t - timedelta(days=3) for t in t_end],
                             pa.timestamp("us", tz="UTC")),
        "retrieved": pa.array([t + timedelta(minutes=30) for t in t_end],
                              pa.timestamp("us", tz="UTC")),
        "station_index": pa.array(np.ones(n, dtype=np.int8)),
    })


def context(**kw) -> DeliveryContext:
    """A delivery context of the invented Kestrel Flats 3D survey."""
    base = dict(survey="Kestrel Flats 3D", crs_epsg=EPSG, client="Harrow Basin Energy",
                contractor="Bluestem Geophysical crew 7", vertical_datum="NAVD88 (model)",
                run_id="a" * 64, edit_set_hash="b" * 64, edit_ids=(3, 5), code_version="0.1.0",
                produced_at=datetime(2024, 4, 1, 12, 0, tzinfo=UTC))
    base.update(kw)
    return DeliveryContext(**base)


def cols(rec: str, first: int, last: int) -> str:
    """Characters of 1-based inclusive columns ``first``..``last``."""
    return rec[first - 1:last]


def read_sps_r(text: str) -> list[dict]:
    """Independent SPS rev 2.1 R-record reader (SEG SPS rev 2.1 (2006) point record layout)."""
    out = []
    for rec in text.splitlines():
        if not rec.startswith("R"):
            continue
        assert len(rec) == 80, rec

        def num(a: int, b: int, rec: str = rec) -> float | None:
            s = cols(rec, a, b).strip()
            return float(s) if s else None

        out.append({
            "line": float(cols(rec, 2, 11)), "point": float(cols(rec, 12, 21)),
            "blank": cols(rec, 22, 23), "index": int(cols(rec, 24, 24)),
            "code": cols(rec, 25, 26), "static": num(27, 30), "depth": num(31, 34),
            "datum": num(35, 38), "uphole": num(39, 40), "water": num(41, 46),
            "easting": float(cols(rec, 47, 55)), "northing": float(cols(rec, 56, 65)),
            "elevation": num(66, 71), "doy": num(72, 74), "time": cols(rec, 75, 80),
        })
    return out


def read_segp1(text: str) -> tuple[list[str], list[dict]]:
    """Independent SEG-P1 reader (SEG 1983 layout, as read by GDAL): headers, data rows."""
    headers, rows = [], []
    for rec in text.splitlines():
        if rec.startswith("H"):
            headers.append(rec)
            continue
        assert len(rec) == 80, rec
        lat, lon = cols(rec, 27, 35), cols(rec, 36, 45)
        lat_deg = int(lat[0:2]) + int(lat[2:4]) / 60 + int(lat[4:8]) / 100 / 3600
        lon_deg = int(lon[0:3]) + int(lon[3:5]) / 60 + int(lon[5:9]) / 100 / 3600
        rows.append({
            "id": cols(rec, 1, 1), "line": cols(rec, 2, 17), "point": int(cols(rec, 18, 25)),
            "reshoot": cols(rec, 26, 26),
            "lat": lat_deg * (1 if lat[8] == "N" else -1),
            "lon": lon_deg * (1 if lon[9] == "E" else -1),
            "easting": float(cols(rec, 46, 53)), "northing": float(cols(rec, 54, 61)),
            "elevation": float(cols(rec, 62, 66)), "year": int(cols(rec, 67, 68)),
            "doy": int(cols(rec, 69, 71)), "time": cols(rec, 72, 77), "spare": cols(rec, 78, 80),
        })
    return headers, rows
