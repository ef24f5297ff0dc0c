"""The point index of each part of a moved node (``flags.move_deliver = "each"``).

A node moved during its stay stood at two places; each part is delivered as its own
receiver position, for its own time, so shots before the move use the earlier place. The
earlier part keeps the occupation's point index. The later part takes a point index of its
own, above every index the deployment log and the preplot use at that line and point, as a
later occupation would (:mod:`archive.survey.occupations`, rule 3):

    index of the later part of occupation k = M + r

where M is the highest point index used at that line and point (by the log's occupations,
those retired from earlier versions of the log, and the preplot's stations) and r the rank
of k among the log's occupation indices there (1 for the lowest). So the index depends only
on the deployment log and the preplot: the same in every run that reads them whatever moves
other occupations show, unique at the line and point, and never one an occupation or a
retired occupation holds. A later part once delivered keeps the index it was delivered
under: the deployment log's and the preplot's versions keep those indices (``later_parts``,
read from the deliveries when each is loaded; the one loaded later says), a new occupation
is numbered above them, and M counts them, so other parts never take them either.
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from archive.survey.occupations import occupation_array

USED_SCHEMA = pa.schema([pa.field("line", pa.float64()), pa.field("point", pa.float64()),
                         pa.field("index", pa.int64()), pa.field("occupied", pa.bool_()),
                         pa.field("part_of", pa.int64())])
"""Point indices in use at each line and point; ``part_of`` is the occupation whose later
part keeps that index (delivered under it before), -1 for every other index."""


def used_indices(deployments: pa.Table, stations: pa.Table | None = None,
                 retired: Iterable[dict[str, Any]] = (),
                 later_parts: Iterable[dict[str, Any]] = ()) -> pa.Table:
    """Every point index used at each line and point: the occupations of the (whole)
    deployment log (``occupied``), those retired from earlier versions, the preplot's, and
    those moved nodes' later parts were delivered under (``later_parts``: line, point,
    occupation, index, as the deployment log's version keeps them)."""
    line = [deployments["line"].to_numpy().astype(np.float64)]
    point = [deployments["point"].to_numpy().astype(np.float64)]
    index = [occupation_array(deployments)]
    occupied = [np.ones(deployments.num_rows, dtype=bool)]
    part_of = [np.full(deployments.num_rows, -1, dtype=np.int64)]

    def add(rows: list[dict[str, Any]], owner: str | None = None) -> None:
        """Entries given as dicts (line, point, index; ``owner`` names the occupation
        whose later part keeps the index), none of them an occupation of the log."""
        line.append(np.array([float(r["line"]) for r in rows]))
        point.append(np.array([float(r["point"]) for r in rows]))
        index.append(np.array([int(r["index"]) for r in rows], dtype=np.int64))
        occupied.append(np.zeros(len(rows), dtype=bool))
        part_of.append(np.array([int(r[owner]) if owner else -1 for r in rows],
                                dtype=np.int64))

    if gone := list(retired):
        add(gone)
    if stations is not None and stations.num_rows:
        add(stations.select(["line", "point", "index"]).to_pylist())
    if kept := list(later_parts):
        add(kept, "occupation")
    return pa.table([pa.array(np.concatenate(x))
                     for x in (line, point, index, occupied, part_of)], schema=USED_SCHEMA)


def later_part_index(line: np.ndarray, point: np.ndarray, occupation: np.ndarray,
                     used: pa.Table) -> np.ndarray:
    """M + r (module doc) for occupations ``occupation`` at (``line``, ``point``); 0 where
    the occupation is not in ``used``."""
    n = len(line)
    if n == 0:
        return np.zeros(0, dtype=np.int64)
    u = pd.DataFrame({"line": used["line"].to_numpy(), "point": used["point"].to_numpy(),
                      "index": used["index"].to_numpy(), "occupied": used["occupied"].to_numpy()})
    top = u.groupby(["line", "point"], sort=False)["index"].max().rename("top")
    occ = u[u["occupied"]].drop_duplicates(["line", "point", "index"]).copy()
    occ["rank"] = occ.groupby(["line", "point"])["index"].rank(method="first").astype(np.int64)
    q = pd.DataFrame({"line": np.asarray(line, dtype=np.float64),
                      "point": np.asarray(point, dtype=np.float64),
                      "index": np.asarray(occupation, dtype=np.int64)})
    m = q.merge(occ[["line", "point", "index", "rank"]], on=["line", "point", "index"],
                how="left").merge(top.reset_index(), on=["line", "point"], how="left")
    out = (m["top"] + m["rank"]).to_numpy()
    out = np.where(np.isfinite(out), out, 0).astype(np.int64)
    if "part_of" in used.column_names:  # a later part delivered before keeps its index
        kept = u.assign(part_of=used["part_of"].to_numpy())
        held = occ.set_index(["line", "point", "index"]).index
        kept = kept[(kept["part_of"] >= 0)
                    & ~kept.set_index(["line", "point", "index"]).index.isin(held)]
        # (an index an occupation of the log holds is never a later part's, whatever an
        # archive delivered before indices were kept)
        kept = kept.drop_duplicates(["line", "point", "part_of"], keep="last")
        if len(kept):
            k = q.merge(kept.rename(columns={"index": "kept", "part_of": "index"})[
                ["line", "point", "index", "kept"]], on=["line", "point", "index"],
                how="left")["kept"].to_numpy()
            out = np.where(np.isfinite(k), np.nan_to_num(k), out).astype(np.int64)
    return out
