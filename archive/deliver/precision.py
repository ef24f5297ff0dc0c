"""The coordinates as a delivered file holds them: each format's precision.

SPS rev 2.1 writes easting, northing and elevation to 0.1 (F9.1, F10.1, F6.1); SEG-P1 to
0.1 where the file's values fit its 8- and 5-column fields, else whole units
(:func:`archive.deliver.segp1.decimals`); CSV, GeoJSON and GeoPackage hold every value at
full precision. ``where`` shows the value the recipient's file holds beside the full one.
"""

from __future__ import annotations

from typing import Any

import pyarrow as pa

SPS_DECIMALS = {"easting": 1, "northing": 1, "height": 1}


def file_decimals(fmt: str, table: pa.Table) -> dict[str, int] | None:
    """Decimals of easting, northing and height in a file of ``fmt`` written from ``table``
    (the delivery's final positions); None for a format at full precision."""
    if fmt == "sps":
        return dict(SPS_DECIMALS)
    if fmt == "segp1":
        from archive.deliver.segp1 import decimals

        return decimals(table)
    return None


def as_delivered(record: dict[str, Any], places: dict[str, int] | None) -> dict[str, Any]:
    """Easting, northing and height of a record as the file holds them (printf rounding,
    as the writers format them) and the decimals; the values themselves at full precision."""
    out: dict[str, Any] = {"decimals": places}
    for name in ("easting", "northing", "height"):
        v = record.get(name)
        if v is None or places is None:
            out[name] = v
        else:
            out[name] = float(f"{float(v):.{places[name]}f}")
    return out
