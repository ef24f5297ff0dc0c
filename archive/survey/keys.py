"""Station keys: one way to name a station and one way to pick its rows out of a table.

A station is (line, point) of the preplot plus its point index; an occupation of it is named
by the point index it is delivered under (:mod:`archive.survey.occupations`) and its node.
Line and point numbers are written short (``1001``, ``1001.5``, never ``1.0015e+03``).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:  # the formatters are used at command start: pyarrow loads when tables do
    import pyarrow as pa


def number(value: Any) -> str:
    """A line or point number as text: whole numbers without decimals, else up to two."""
    if value is None:
        return "?"
    v = float(value)
    if v.is_integer():
        return str(int(v))
    return f"{v:.2f}".rstrip("0").rstrip(".")


def station_text(line: Any, point: Any, index: Any = None, node: Any = None) -> str:
    """``1001/5002``, with `` index 2`` and `` (node 310004)`` when given."""
    out = f"{number(line)}/{number(point)}"
    if index is not None:
        out += f" index {int(index)}"
    if node is not None:
        out += f" (node {node})"
    return out


def station_mask(table: pa.Table, line: float, point: float, index: int | None = None,
                 node: str | None = None, *, index_column: str = "index") -> pa.Array:
    """Rows of (line, point), narrowed to ``index`` (in ``index_column``; a null never
    matches) and/or ``node`` when given."""
    import pyarrow.compute as pc

    mask = pc.and_(pc.equal(table["line"], float(line)), pc.equal(table["point"], float(point)))
    if index is not None:
        mask = pc.and_(mask, pc.fill_null(pc.equal(table[index_column], int(index)), False))
    if node is not None:
        mask = pc.and_(mask, pc.equal(table["node"], str(node)))
    return mask


def rows_at(table: pa.Table, line: float, point: float, index: int | None = None,
            node: str | None = None, *, index_column: str = "index") -> pa.Table:
    """The rows :func:`station_mask` selects."""
    return table.filter(station_mask(table, line, point, index, node,
                                     index_column=index_column))
