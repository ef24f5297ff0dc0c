"""The positions table a solution run produces, and the review flags it may carry.

One row per deployment part: normally one part per deployment (one *occupation* of its
station, see :mod:`archive.survey.occupations`); a node that moved during its
deployment gives one row per part, and ``delivered`` marks the rows to deliver: every part,
each under its own ``point_index`` and for its own time (``held_from``/``held_to``), or only
the last part in runs made before parts were delivered (``flags.move_deliver``). Unlogged stationary clusters get rows with ``kind = "unlogged"`` and no node
window from the log; a deployment no loaded log of its node covers yet gets one row with
``kind = "awaiting"`` (awaiting harvest: no position, no flags, never delivered). Easting/northing (and preplot_e/preplot_n) are in the survey CRS's
unit, which may be feet; sigmas, ellipse axes, r95, spread and the distances dist_preplot and
dist_nearest are always metres (grid distances converted with the CRS's unit factor).
"""

from __future__ import annotations

import pyarrow as pa

UTC_TIME = pa.timestamp("us", tz="UTC")

_POSITION_FIELDS_V1 = [
    pa.field("line", pa.float64(), nullable=False),
    pa.field("point", pa.float64(), nullable=False),
    pa.field("index", pa.int8(), nullable=False),
    pa.field("node", pa.string(), nullable=False),
    pa.field("kind", pa.string(), nullable=False),  # "logged" | "unlogged" | "awaiting"
    pa.field("part", pa.int8(), nullable=False),  # 0 whole window, 1.. parts after a move
    pa.field("delivered", pa.bool_(), nullable=False),  # this row is the one to deliver
    pa.field("t_start", UTC_TIME),  # window used (after settle margins)
    pa.field("t_end", UTC_TIME),
    pa.field("easting", pa.float64()),
    pa.field("northing", pa.float64()),
    pa.field("lat", pa.float64()),
    pa.field("lon", pa.float64()),
    pa.field("height", pa.float64()),  # delivered height (model, or GNSS fallback)
    pa.field("height_source", pa.string()),  # "model" | "gnss" | "none"
    pa.field("h_gnss", pa.float64()),  # GNSS orthometric height, in the model's datum
    pa.field("h_model", pa.float64()),  # elevation model at the position
    pa.field("dh", pa.float64()),  # h_gnss - h_model
    pa.field("sigma_e", pa.float64()),  # m, whatever the CRS unit
    pa.field("sigma_n", pa.float64()),  # m
    pa.field("corr_en", pa.float64()),
    pa.field("ell_major", pa.float64()),  # 95 % error ellipse semi-axes, m
    pa.field("ell_minor", pa.float64()),
    pa.field("ell_bearing", pa.float64()),  # bearing of the major axis, degrees from grid north
    pa.field("r95", pa.float64()),  # 95 % horizontal radius, m
    pa.field("sigma_h", pa.float64()),
    pa.field("n_total", pa.int64(), nullable=False),  # fixes in the window
    pa.field("n_used", pa.int64(), nullable=False),
    pa.field("n_rejected", pa.int64(), nullable=False),
    pa.field("n_eff", pa.float64()),  # effective number of independent fixes
    pa.field("span_s", pa.float64()),  # time span of the used fixes, s
    pa.field("spread", pa.float64()),  # robust horizontal scale of the cloud, m
    pa.field("preplot_e", pa.float64()),
    pa.field("preplot_n", pa.float64()),
    pa.field("dist_preplot", pa.float64()),  # m, whatever the CRS unit
    pa.field("nearest_line", pa.float64()),  # nearest other station (mix-up check)
    pa.field("nearest_point", pa.float64()),
    pa.field("dist_nearest", pa.float64()),  # m, whatever the CRS unit
    pa.field("estimator", pa.string(), nullable=False),
    pa.field("flags", pa.string(), nullable=False),  # ";"-joined FLAGS keys, "" if none
]

POSITION_SCHEMA_V1 = pa.schema(
    _POSITION_FIELDS_V1,
    metadata={"nodekeep.table": "positions", "nodekeep.schema_version": "1"},
)
"""The positions table of runs whose manifest has ``format`` 1 (before occupations)."""

_POSITION_FIELDS_V2 = [
    *_POSITION_FIELDS_V1,
    # the occupation (deployment record) the row belongs to: its delivered point index and
    # its logged window; null for unlogged clusters. A station occupied twice has two
    # occupations, each delivered under its own index.
    pa.field("occupation", pa.int8()),
    pa.field("deployed", UTC_TIME),
    pa.field("retrieved", UTC_TIME),  # null: still in the ground (or unlogged)
    # the settled window held no usable fix, so the fixes of the settle margins were used
    pa.field("from_margins", pa.bool_(), nullable=False),
]

POSITION_SCHEMA_V2 = pa.schema(
    _POSITION_FIELDS_V2,
    metadata={"nodekeep.table": "positions", "nodekeep.schema_version": "2"},
)
"""The positions table of runs whose manifest has ``format`` 2 (occupations, before each
part of a moved node was delivered on its own)."""

POSITION_SCHEMA = pa.schema(
    [*_POSITION_FIELDS_V2,
     # the point index the row is delivered under (null when it is not delivered): the
     # occupation's, or for the later part of a moved node a point index of its own
     # (archive.solve.parts)
     pa.field("point_index", pa.int8()),
     # the time the delivered position holds, [held_from, held_to): the occupation's logged
     # window, cut at the move for each part of a moved node (null: not delivered / open)
     pa.field("held_from", UTC_TIME),
     pa.field("held_to", UTC_TIME),
     # effective degrees of freedom of the uncertainty (Welch–Satterthwaite); the 95 %
     # ellipse and r95 use the matching quantile. Null when the normal quantile is used.
     pa.field("dof", pa.float64()),
     # used fixes without quality information (RMC/GLL only); absent from tables of runs
     # made before it existed (see ADDED_COLUMNS)
     pa.field("n_no_quality", pa.int64(), nullable=False)],
    metadata={"nodekeep.table": "positions", "nodekeep.schema_version": "3"},
)

# Columns added to the table after runs were first recorded, with the parameter whose
# presence in a run's resolved parameters says the run knew of them ([section, key]).
# A run whose manifest predates one leaves it out, so that 'reproduce' gives its table
# bit for bit.
ADDED_COLUMNS = {"n_no_quality": ("screen", "no_quality")}


def conform_positions(table: pa.Table, params: dict) -> pa.Table:
    """``table`` (of POSITION_SCHEMA) as a run with these resolved parameters writes it:
    without the :data:`ADDED_COLUMNS` its parameters predate."""
    drop = [c for c, (sec, key) in ADDED_COLUMNS.items()
            if key not in params.get(sec, {}) and c in table.column_names]
    return table.drop_columns(drop) if drop else table


# Review flags: key -> what a reviewer should understand.
FLAGS = {
    "few-fixes": "fewer usable fixes than the minimum",
    "short-span": "used fixes span less time than the minimum",
    "wide-spread": "the cloud is wider than expected for its HDOPs",
    "moved": "the node changed place during the deployment",
    "far-from-plan": "the position is farther from its preplot station than the tolerance",
    "nearer-other": "the position is nearer another station than its own (serial/station mix-up?)",
    "height-mismatch": "GNSS height and elevation model disagree beyond the tolerance",
    "off-model": "the position is outside the elevation model or on nodata",
    "unlogged": "stationary cluster with no logged deployment",
    "unoccupied": "a deployed station with no usable fixes",
    "quality-unknown": "most used fixes carry no quality information (RMC/GLL only): "
                       "weighted by the cloud's own spread",
}


SORT_KEYS = [("kind", "ascending"), ("line", "ascending"), ("point", "ascending"),
             ("index", "ascending"), ("node", "ascending"), ("t_start", "ascending"),
             ("part", "ascending")]
"""The order of a run's positions rows."""
