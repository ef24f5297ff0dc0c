"""The delivery formats: name -> writer ``(final positions, DeliveryContext) -> bytes``.

Each format registers its writer (imported on first use), a one-line description and the
usual file suffix. ``nodekeep deliver --format`` offers exactly the registered names, with
these descriptions in its help; docs/maintainer-guide.md has the recipe for a new format.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import TYPE_CHECKING, Any

from archive.registry import Registry

if TYPE_CHECKING:  # the registry stays cheap to import: writers load on first use
    import pyarrow as pa

    from archive.deliver.context import DeliveryContext

    Writer = Callable[[pa.Table, DeliveryContext], bytes]
else:
    Writer = Callable[[Any, Any], bytes]

FORMATS: Registry[Writer] = Registry("delivery format")
FORMATS.register("sps", "SPS rev 2.1 receiver (R) records with H headers",
                 "archive.deliver.sps:write_sps", suffix=".sps")
FORMATS.register("segp1", "SEG-P1 80-column records with a 20-record header",
                 "archive.deliver.segp1:write_segp1", suffix=".p1")
FORMATS.register("csv", "CSV at full precision, one row per occupation",
                 "archive.deliver.csvfile:write_csv", suffix=".csv")
FORMATS.register("geojson", "GeoJSON (RFC 7946, WGS 84 lon/lat)",
                 "archive.deliver.gis:write_geojson", suffix=".geojson")
FORMATS.register("gpkg", "GeoPackage point layer in the survey CRS",
                 "archive.deliver.gis:write_gpkg", suffix=".gpkg")


def writer(fmt: str) -> Writer:
    """The writer of a format name (imported on first use); UsageError for an unknown one."""
    return FORMATS.get(fmt)
