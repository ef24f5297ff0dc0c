"""Tables of the survey inputs: stations (preplot), deployments, check points.

Line and point are float64 (SPS rev 2.1 writes both as F10.2); ``index`` is the SPS point
index (1-9, default 1) of the preplot station. A deployment record is one *occupation* of
its station; its ``occupation`` column is the point index it is delivered under
(:mod:`archive.survey.occupations`). Coordinates are in the survey's projected CRS, in metres.
``src_line`` is the 1-based line of the record in the file it was loaded from.
"""

from __future__ import annotations

import pyarrow as pa

UTC_TIME = pa.timestamp("us", tz="UTC")

STATION_SCHEMA = pa.schema(
    [
        pa.field("line", pa.float64(), nullable=False),
        pa.field("point", pa.float64(), nullable=False),
        pa.field("index", pa.int8(), nullable=False),
        pa.field("code", pa.string()),
        pa.field("easting", pa.float64(), nullable=False),
        pa.field("northing", pa.float64(), nullable=False),
        pa.field("elevation", pa.float64()),
        pa.field("kind", pa.string(), nullable=False),  # "R" receiver, "S" source
        pa.field("src_line", pa.int64(), nullable=False),
    ],
    metadata={"nodekeep.table": "stations", "nodekeep.schema_version": "1"},
)

_DEPLOYMENT_LOG_FIELDS = [
    pa.field("node", pa.string(), nullable=False),
    pa.field("line", pa.float64(), nullable=False),
    pa.field("point", pa.float64(), nullable=False),
    pa.field("index", pa.int8(), nullable=False),  # the station's (preplot) point index
    pa.field("deployed", UTC_TIME, nullable=False),
    pa.field("retrieved", UTC_TIME),  # null: still in the ground
    pa.field("src_line", pa.int64(), nullable=False),
]

DEPLOYMENT_LOG_SCHEMA = pa.schema(
    _DEPLOYMENT_LOG_FIELDS,
    metadata={"nodekeep.table": "deployments", "nodekeep.schema_version": "1"},
)
"""The deployment log as read (and as stored before occupations were numbered)."""

DEPLOYMENT_SCHEMA = pa.schema(
    [*_DEPLOYMENT_LOG_FIELDS,
     # the occupation's delivered point index, numbered when the version was loaded
     # (archive.survey.occupations): unique per (line, point), stable across versions
     pa.field("occupation", pa.int8(), nullable=False)],
    metadata={"nodekeep.table": "deployments", "nodekeep.schema_version": "2"},
)

CONTROL_SCHEMA = pa.schema(
    [
        pa.field("line", pa.float64(), nullable=False),
        pa.field("point", pa.float64(), nullable=False),
        pa.field("index", pa.int8(), nullable=False),
        pa.field("easting", pa.float64(), nullable=False),
        pa.field("northing", pa.float64(), nullable=False),
        pa.field("height", pa.float64()),
        pa.field("surveyed", UTC_TIME),
        pa.field("method", pa.string()),
        pa.field("sigma_e", pa.float64()),
        pa.field("sigma_n", pa.float64()),
        pa.field("sigma_h", pa.float64()),
        pa.field("src_line", pa.int64(), nullable=False),
    ],
    metadata={"nodekeep.table": "control", "nodekeep.schema_version": "1"},
)
