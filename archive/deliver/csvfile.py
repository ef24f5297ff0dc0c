"""CSV of final positions at full precision, for everyone who is not a seismic processor.

Numbers are written in their shortest round-trip form (no rounding), unquoted; every text
column is in double quotes (Arrow's CSV writer quotes all strings, so an empty ``flags`` is
``""``); ``flags`` is a ``;``-separated list (empty when none); times are ISO 8601 UTC with
microseconds and a ``Z`` (``2024-03-14T05:06:07.000000Z``). One row per occupation: ``index`` is
the point index it is delivered under, ``station_index`` the preplot station's,
``deployed``/``retrieved`` its logged window (``retrieved`` empty while the node is still
out), ``t_start``/``t_end`` the fixes used; ``merged`` lists the indices merged into the row
(``deliver --merge-occupations``). The file is UTF-8. The ``crs`` and
``vertical_datum`` columns give the survey's EPSG code and the datum of each row's height on
every row so the file cannot be separated from what its numbers mean: the delivery's
(elevation model's) datum, or for a GNSS height (a station off the model) the datum the
survey's height mode gives it. Text cells that a spreadsheet would
run as a formula (beginning with ``=``, ``+``, ``-``, ``@``, tab or carriage return, and not
a plain number) get a leading apostrophe, as OWASP recommends against CSV injection
(:func:`archive.store.outfiles.spreadsheet_column`); numbers, negative ones included, are
written as numbers. ``anchor_event`` and
``anchor_after`` repeat the delivery's ledger anchor the same way
(:class:`archive.store.ledger.Anchor`). Last come the review decisions of each record
(:data:`archive.deliver.decisions.DECISION_COLUMNS`: flags people accepted, what was decided,
the edit ids, by whom, when and why), when the table carries them.
"""

from __future__ import annotations

import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.csv as pacsv

from archive.deliver.context import DeliveryContext, check_unique_keys, height_datums
from archive.deliver.decisions import DECISION_COLUMNS
from archive.store.outfiles import spreadsheet_column

CSV_COLUMNS = (
    "line", "point", "index", "station_index", "node", "deployed", "retrieved",
    "easting", "northing", "height", "height_source",
    "sigma_e", "sigma_n", "r95", "n_used", "n_rejected", "flags", "source", "merged",
    "lat", "lon", "t_start", "t_end",
)


def csv_table(table: pa.Table, ctx: DeliveryContext, *, anchor: bool = True) -> pa.Table:
    """The columns written to CSV, in order (times as ISO 8601 text, text cells kept from
    being run as formulas); with ``anchor`` and a context that has one, the ledger anchor's
    two columns last."""
    cols, names = [], []
    for name in CSV_COLUMNS:
        if name not in table.column_names:
            continue
        col = table.column(name)
        if pa.types.is_timestamp(col.type):
            col = pc.binary_join_element_wise(
                pc.strftime(col, format="%Y-%m-%dT%H:%M:%S"), pa.scalar("Z"), "")
        cols.append(spreadsheet_column(col))
        names.append(name)
    n = table.num_rows
    cols += [pa.array([f"EPSG:{ctx.crs_epsg}"] * n),
             spreadsheet_column(pa.array(height_datums(table, ctx).tolist() if n else [],
                                         pa.string()))]
    names += ["crs", "vertical_datum"]
    if anchor and ctx.anchor is not None:
        cols += [pa.array([ctx.anchor.event] * n, pa.int64()), pa.array([ctx.anchor.after] * n)]
        names += ["anchor_event", "anchor_after"]
    for name in DECISION_COLUMNS:  # added after the columns readers already know
        if name in table.column_names:
            cols.append(spreadsheet_column(table.column(name)))
            names.append(name)
    return pa.table(cols, names=names)


def write_csv(table: pa.Table, ctx: DeliveryContext) -> bytes:
    """CSV bytes (UTF-8, header row, LF line ends, every text value quoted)."""
    check_unique_keys(table, "CSV")
    sink = pa.BufferOutputStream()
    opts = pacsv.WriteOptions(include_header=True, quoting_style="needed")
    pacsv.write_csv(csv_table(table, ctx), sink, write_options=opts)
    return sink.getvalue().to_pybytes()
