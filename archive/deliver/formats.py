"""The delivery formats: name -> writer ``(final positions, DeliveryContext) -> bytes``."""

from __future__ import annotations

from collections.abc import Callable

import pyarrow as pa

from archive.deliver.context import DeliveryContext
from archive.errors import UsageError

Writer = Callable[[pa.Table, DeliveryContext], bytes]

FORMATS = ("sps", "segp1", "csv", "geojson", "gpkg")
DESCRIPTIONS = {
    "sps": "SPS rev 2.1 receiver (R) records with H headers",
    "segp1": "SEG-P1 80-column records with a 20-record header",
    "csv": "CSV at full precision",
    "geojson": "GeoJSON (RFC 7946, WGS 84 lon/lat)",
    "gpkg": "GeoPackage point layer in the survey CRS",
}


def writer(fmt: str) -> Writer:
    """The writer of a format name (imported on demand)."""
    if fmt == "sps":
        from archive.deliver.sps import write_sps
        return write_sps
    if fmt == "segp1":
        from archive.deliver.segp1 import write_segp1
        return write_segp1
    if fmt == "csv":
        from archive.deliver.csvfile import write_csv
        return write_csv
    if fmt == "geojson":
        from archive.deliver.gis import write_geojson
        return write_geojson
    if fmt == "gpkg":
        from archive.deliver.gis import write_gpkg
        return write_gpkg
    raise UsageError(f"unknown delivery format {fmt!r}", hint=f"use one of {', '.join(FORMATS)}")
