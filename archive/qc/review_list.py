"""The stations a reviewer should look at, as the report lists them and draws their clouds.

A delivered occupation needs review when a flag of the solver is still open on it (no
decision in force settles it, :mod:`archive.edits.decided`) or it lies farther than the qc
tolerance from its RTK check point (reason ``beyond-check``); those beyond the tolerance come
first, largest first, then the flagged ones by station. Flags people decided are listed
apart (:func:`decided_list`), with the decision, who made it, when and why.
"""

from __future__ import annotations

from collections.abc import Callable
from html import escape
from typing import Any

import numpy as np
import pandas as pd
import pyarrow as pa

from archive.edits.decided import FlagState, split_flags
from archive.errors import NodekeepError
from archive.progress import Progress
from archive.qc import html
from archive.qc.check import QcResult
from archive.qc.clouds import Station, cloud_figure
from archive.qc.sources import RunData
from archive.qc.stats import delivered
from archive.store.outfiles import spreadsheet_text
from archive.survey.keys import station_text

MAX_TABLE_ROWS = 1000
BEYOND = "beyond-check"  # review reason added by qc: farther than the tolerance from its check point

CloudReader = Callable[[float, float, int], "pa.Table | None"]


def review_list(data: RunData, result: QcResult) -> pd.DataFrame:
    """Stations to review: beyond the tolerance first (largest first), then solver flags."""
    pos = with_occupation(delivered(data.positions).to_pandas())
    pts = result.comparison.points.select(
        [*OCC_KEY, "dist", "check_e", "check_n"]).to_pandas()
    df = pos.merge(pts, on=OCC_KEY, how="left")
    df["dist_preplot"] = df["dist_preplot"].fillna(
        np.hypot(df["easting"] - df["preplot_e"], df["northing"] - df["preplot_n"]))
    df["beyond"] = df["dist"] > result.tolerance
    df["flags"] = open_flags(df, data.decisions)
    df = df[(df["flags"] != "") | df["beyond"]].copy()
    df["reasons"] = np.where(df["beyond"], np.where(df["flags"] != "", BEYOND + ";" + df["flags"],
                                                    BEYOND), df["flags"])
    df["_d"] = df["dist"].where(df["beyond"], -1.0)
    return df.sort_values(["_d", "line", "point", "occupation"],
                          ascending=[False, True, True, True],
                          kind="stable").reset_index(drop=True)


def _states(df: pd.DataFrame, decisions: dict[Any, list[Any]]) -> list[FlagState]:
    return [split_flags((f or "").split(";"), decisions.get((float(a), float(b), int(c)), []))
            for a, b, c, f in zip(df["line"], df["point"], df["occupation"], df["flags"],
                                  strict=True)]  # one per flagged record, not per fix


def open_flags(df: pd.DataFrame, decisions: dict[Any, list[Any]]) -> list[str]:
    """The flags of each row still open (no decision in force settles them)."""
    if not decisions:
        return list(df["flags"])
    return [";".join(s.open) for s in _states(df, decisions)]


def decided_list(data: RunData) -> pd.DataFrame:
    """Flags of delivered stations that people decided: one row per station and decision
    (flags, kind, actor, UTC time, reason, edit id), by station."""
    cols = ["line", "point", "index", "occupation", "node", "flags", "decided", "decision",
            "by", "at", "reason", "edit"]
    pos = with_occupation(delivered(data.positions).select(
        [c for c in ("line", "point", "index", "occupation", "node", "flags")
         if c in data.positions.column_names]).to_pandas())
    # the flags of an occupation are those of all its parts (a moved node's later part is
    # far from plan too, its earlier part not), as the decisions name the occupation
    pos = (pos[pos["flags"] != ""].groupby(OCC_KEY, sort=False, as_index=False)
           .agg(node=("node", "first"), flags=("flags", _union)))
    rows = []
    for r, st in zip(pos.itertuples(index=False), _states(pos, data.decisions), strict=True):
        by_edit: dict[int, list[str]] = {}
        for f, d in st.decided.items():
            by_edit.setdefault(d["edit"], []).append(f)
        for d in st.decisions:
            if d["edit"] in by_edit:
                rows.append((r.line, r.point, r.index, r.occupation, r.node, r.flags,
                             ";".join(by_edit[d["edit"]]), d["kind"], d["by"], d["at"],
                             d["reason"], d["edit"]))
    return pd.DataFrame(rows, columns=cols).sort_values(
        ["line", "point", "occupation", "edit"], kind="stable").reset_index(drop=True)


def _union(flags: pd.Series) -> str:
    """The flags of several records of one occupation, each once, in order of appearance."""
    return ";".join(dict.fromkeys(f for x in flags for f in x.split(";") if f))


def decided_table(df: pd.DataFrame) -> str:
    """The decided flags as an HTML table."""
    if df.empty:
        return "<p>No flag has been decided yet.</p>"
    rows = [(station_text(r.line, r.point), r.occupation, r.node, r.decided.replace(";", ", "),
             r.decision, r.by, r.at.strftime("%Y-%m-%d %H:%M:%S"), r.reason, r.edit)
            for r in df.head(MAX_TABLE_ROWS).itertuples()]
    more = (f'<p class="note">{len(df) - MAX_TABLE_ROWS:,} more decisions are not listed; '
            "'nodekeep review list --all --json' lists every one.</p>"
            if len(df) > MAX_TABLE_ROWS else "")
    return ('<div class="scroll">' + html.table(
        ["station (line / point)", "index", "node", "flags decided", "decision", "by",
         "when (UTC)", "reason", "edit"], rows, numeric=(1, 8))
        + "</div>" + more)


OCC_KEY = ["line", "point", "index", "occupation"]
"""A delivered record: the preplot station (line, point, index) and the occupation's index."""


def with_occupation(df: pd.DataFrame) -> pd.DataFrame:
    """``occupation`` filled with the station index where a table has none (older runs)."""
    if "occupation" not in df.columns:
        df["occupation"] = df["index"]
    df["occupation"] = df["occupation"].fillna(df["index"]).astype("int64")
    return df


def _record_index(r: Any) -> int:
    """The point index a row is delivered under: its own for a moved node's later part, the
    occupation's otherwise (runs made before parts had indices)."""
    k = getattr(r, "point_index", None)
    return int(k) if k is not None and not pd.isna(k) and int(k) > 0 else int(r.occupation)


def records_with_edits(data: RunData) -> tuple[int, int]:
    """(records a delivery of the run carries with the edits in force, occupations a
    ``reject-station`` keeps out): the run's delivered records less those of rejected
    occupations, a moved node whose position a person set counting once (``set-position``
    makes the occupation one record again)."""
    pos = with_occupation(delivered(data.positions).select(
        [c for c in ("line", "point", "index", "occupation")
         if c in data.positions.column_names]).to_pandas())
    per = pos.groupby(["line", "point", "occupation"]).size()
    n, rejected = len(pos), 0
    for (line, point, occ), k in per.items():
        kinds = {e.kind for e in data.decisions.get((float(line), float(point), int(occ)), [])}
        if "reject-station" in kinds:
            n, rejected = n - int(k), rejected + 1
        elif "set-position" in kinds:
            n -= int(k) - 1
    have = {(float(a), float(b), int(c)) for a, b, c in per.index}
    for key, edits in data.decisions.items():  # a position set where the run has none
        kinds = {e.kind for e in edits}
        if key not in have and "set-position" in kinds and "reject-station" not in kinds:
            n += 1
    return n, rejected


def occupation_count(df: pd.DataFrame) -> int:
    """How many occupations the rows of ``df`` (delivered records) belong to."""
    return len(df[OCC_KEY].drop_duplicates()) if len(df) else 0


def review_table(df: pd.DataFrame, with_clouds: set[int]) -> str:
    """The review list as an HTML table (stations drawn with a cloud link to it)."""
    if df.empty:
        return "<p>No station needs review.</p>"
    rows = []
    for i, r in enumerate(df.head(MAX_TABLE_ROWS).itertuples()):
        name = station_text(r.line, r.point)
        link = f'<a href="#cloud-{i}">{escape(name)}</a>' if i in with_clouds else escape(name)
        rows.append((link, _record_index(r), escape(spreadsheet_text(str(r.node))),
                     escape(r.reasons.replace(";", ", ")),
                     html.num(r.dist, "{:.2f}"), html.num(r.dist_preplot, "{:.2f}"),
                     html.num(r.r95, "{:.2f}"), f"{r.n_used:,}", f"{r.n_rejected:,}",
                     html.num(getattr(r, "n_no_quality", None), "{:,.0f}")))
    more = (f'<p class="note">{len(df) - MAX_TABLE_ROWS:,} more stations are not listed; '
            "'nodekeep qc --json' lists every one.</p>" if len(df) > MAX_TABLE_ROWS else "")
    return ('<div class="scroll">' + html.table(
        ["station (line / point)", "index", "node", "reasons", "to check point (m)",
         "to preplot (m)", "own R95 (m)", "fixes used", "rejected", "without quality"], rows,
        numeric=(1, 4, 5, 6, 7, 8, 9), raw=(0, 2, 3)) + "</div>" + more)


def _station(r: Any) -> Station:
    return Station(line=r.line, point=r.point, index=int(r.occupation), easting=r.easting,
                   northing=r.northing, ell_major=r.ell_major, ell_minor=r.ell_minor,
                   ell_bearing=r.ell_bearing, preplot_e=r.preplot_e, preplot_n=r.preplot_n,
                   check_e=r.check_e, check_n=r.check_n, flags=r.reasons)


def cloud_section(df: pd.DataFrame, read_cloud: CloudReader | None, max_clouds: int,
                  progress: Progress) -> tuple[str, int]:
    """Cloud plots of the first ``max_clouds`` stations to review; (HTML, plots drawn)."""
    parts = []
    for i, r in enumerate(df.head(max_clouds).itertuples()):
        cloud, problem = None, ""
        if read_cloud is not None:
            try:
                cloud = read_cloud(float(r.line), float(r.point), int(r.occupation))
            except NodekeepError as exc:
                problem = f"fixes unavailable: {exc}"
        uri, caption = cloud_figure(_station(r), cloud)
        caption = f"{r.reasons.replace(';', ', ')}. {caption}" + (f"; {problem}" if problem else "")
        parts.append(html.figure(uri, caption, "cloud", f"fix cloud of station {station_text(r.line, r.point, r.occupation)}")
                     .replace('id="fig-cloud"', f'id="cloud-{i}"'))
        progress.advance(1, station_text(r.line, r.point))
    note = ""
    if len(df) > max_clouds:
        note = (f'<p class="note">Fix clouds are drawn for the first {max_clouds} of '
                f"{len(df):,} stations needing review (those beyond the tolerance first); the "
                "table above lists them all.</p>")
    return note + '<div class="clouds">' + "".join(parts) + "</div>", len(parts)


