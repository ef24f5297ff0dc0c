"""The evening review: which stations of a run wait for a person, and why.

A station here is one occupation (a node's deployment at a preplot station, delivered under
its own point index; both parts of a node that moved are one station), as
:func:`archive.solve.flags.count_flags` counts them. A flagged station waits for review
while one of its flags is open (:mod:`archive.edits.decided`): not accepted, not settled
by a set position, the station not rejected. Each entry carries the figures behind its
flags, what is decided already, and the most recent decision ever made on it (in force or
not, an undo too), so a reviewer sees what was said last time.

:func:`review_counts` gives the counts every command prints (solve, qc, a status view):
flagged stations, open and decided, per flag, all in stations.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc

from archive.edits.decided import (
    FlagState,
    Key,
    in_force_by_occupation,
    latest_decisions,
    split_flags,
)
from archive.solve.flags import count_flags, station_flags
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run
from archive.solve.schema import FLAGS
from archive.store.archive import Archive
from archive.store.models import Survey
from archive.survey.crs import survey_crs

if TYPE_CHECKING:
    import pandas as pd


@dataclass
class Station:
    """One flagged station of a run, with its flags open and decided."""

    line: float
    point: float
    index: int  # the occupation's delivered point index (what edits name)
    node: str
    flags: list[str]
    state: FlagState
    deployed: Any  # the occupation's logged window (datetime, UTC; None when unknown)
    retrieved: Any
    figures: dict[str, dict[str, Any]]  # flag -> the figures behind it
    last: dict[str, Any] | None  # the most recent decision on this station, in force or not

    @property
    def key(self) -> Key:
        """(line, point, index) as edits name the station."""
        return (self.line, self.point, self.index)

    @property
    def waiting(self) -> bool:
        """Whether a flag is still open."""
        return bool(self.state.open)

    def as_dict(self) -> dict[str, Any]:
        """Plain data (the ``--json`` form)."""
        return {"line": self.line, "point": self.point, "index": self.index,
                "node": self.node, "flags": self.flags, "open": self.state.open,
                "decided": self.state.decided, "rejected": self.state.rejected,
                "figures": self.figures, "last_decision": self.last}


@dataclass
class Review:
    """The flagged stations of a run and how many of them wait."""

    run_id: str
    survey_id: int
    stations: list[Station]
    counts: dict[str, Any] = field(default_factory=dict)

    def waiting(self, flag: str | None = None) -> list[Station]:
        """Stations with an open flag (``flag``: only those whose open flags include it)."""
        return [s for s in self.stations if s.waiting and (flag is None or flag in s.state.open)]

    def decided(self) -> list[Station]:
        """Flagged stations with no open flag left."""
        return [s for s in self.stations if not s.waiting]

    def find(self, key: Key) -> Station | None:
        """The flagged station an edit key names, or None."""
        for s in self.stations:
            if s.key == key:
                return s
        return None


def _num(v: Any, digits: int = 3) -> float | None:
    if v is None:
        return None
    f = float(v)
    return None if not np.isfinite(f) else round(f, digits)


def _figures(rows: pd.DataFrame, flags: list[str], unit_factor: float) -> dict[str, Any]:
    """The figures behind each flag of one station's delivered rows (metres, hours)."""
    first = rows.iloc[0]
    n_used, n_total = int(rows["n_used"].sum()), int(rows["n_total"].sum())
    window = float((rows["t_end"] - rows["t_start"]).dt.total_seconds().fillna(0).sum())
    out: dict[str, dict[str, Any]] = {}
    for f in flags:
        if f == "few-fixes":
            out[f] = {"fixes_used": n_used, "fixes_logged": n_total,
                      "window_h": _num(window / 3600)}
        elif f == "short-span":
            span = float(rows["span_s"].fillna(0).sum())
            out[f] = {"span_h": _num(span / 3600), "window_h": _num(window / 3600)}
        elif f == "wide-spread":
            out[f] = {"spread_m": _num(rows["spread"].max())}
        elif f == "moved":
            parts = rows.sort_values("part")
            e, n = parts["easting"].to_numpy(float), parts["northing"].to_numpy(float)
            dist = float(np.hypot(e[-1] - e[0], n[-1] - n[0])) * unit_factor if len(e) > 1 else None
            out[f] = {"move_m": _num(dist), "parts": len(parts)}
        elif f == "far-from-plan":
            out[f] = {"to_preplot_m": _num(rows["dist_preplot"].max())}
        elif f == "nearer-other":
            out[f] = {"to_preplot_m": _num(first["dist_preplot"]),
                      "nearest_line": _num(first["nearest_line"]),
                      "nearest_point": _num(first["nearest_point"]),
                      "to_nearest_m": _num(first["dist_nearest"])}
        elif f == "height-mismatch":
            out[f] = {"dh_m": _num(first["dh"]), "h_gnss": _num(first["h_gnss"]),
                      "h_model": _num(first["h_model"])}
        elif f == "off-model":
            out[f] = {"easting": _num(first["easting"]), "northing": _num(first["northing"])}
        elif f == "unoccupied":
            out[f] = {"fixes_logged": n_total, "fixes_used": n_used}
        elif f == "quality-unknown":
            nq = int(rows["n_no_quality"].sum()) if "n_no_quality" in rows else 0
            out[f] = {"without_quality": nq,
                      "share": _num(nq / n_used if n_used else None)}
    return out


def _when(v: Any) -> Any:
    import pandas as pd

    return None if v is None or pd.isna(v) else v.to_pydatetime()


def figures_text(station: Station, flags: list[str] | None = None) -> str:
    """The figures behind the flags as one short line (for tables)."""
    parts = []
    for f in flags if flags is not None else station.flags:
        g = station.figures.get(f) or {}
        if f == "few-fixes":
            parts.append(f"{g.get('fixes_used', 0)} fixes used over {g.get('window_h') or 0:.1f} h")
        elif f == "short-span" and g.get("span_h") is not None:
            parts.append(f"span {g['span_h']:.1f} h of {g.get('window_h') or 0:.1f} h")
        elif f == "wide-spread" and g.get("spread_m") is not None:
            parts.append(f"spread {g['spread_m']:.2f} m")
        elif f == "moved" and g.get("move_m") is not None:
            parts.append(f"moved {g['move_m']:.1f} m")
        elif f == "far-from-plan" and g.get("to_preplot_m") is not None:
            parts.append(f"{g['to_preplot_m']:.1f} m from preplot")
        elif f == "nearer-other" and g.get("to_nearest_m") is not None:
            parts.append(f"{g['to_nearest_m']:.1f} m from {g['nearest_line']:g}/"
                         f"{g['nearest_point']:g}")
        elif f == "height-mismatch" and g.get("dh_m") is not None:
            parts.append(f"dh {g['dh_m']:+.1f} m")
        elif f == "unoccupied":
            parts.append(f"{g.get('fixes_used', 0)} fixes used")
        elif f == "quality-unknown" and g.get("share") is not None:
            parts.append(f"{100 * g['share']:.0f} % without quality")
    return "; ".join(parts)


def load_review(arc: Archive, survey_id: int, run_ref: str | None = None, *,
                positions: pa.Table | None = None, figures: bool = True) -> Review:
    """The flagged stations of a run (the newest by default) with their open and decided
    flags, the figures behind them (left empty without ``figures``: deciding needs none)
    and the last decision on each (see module doc)."""
    run = get_run(arc, survey_id, run_ref)
    table = positions if positions is not None else run_occupations(arc, run)
    with arc.session() as s:
        in_force = in_force_by_occupation(s, survey_id)
        last = latest_decisions(s, survey_id)
        epsg = s.get(Survey, survey_id).crs_epsg
    unit = survey_crs(epsg).unit_factor
    st = station_flags(table)
    flagged = st.filter(pc.not_equal(st["flags"], "")).to_pandas()
    # the delivered rows of the flagged stations (every part of a moved node)
    rows = table.filter(pc.fill_null(table["delivered"], False))
    if not figures:  # the windows need these columns only
        rows = rows.select([c for c in ("line", "point", "index", "occupation", "kind",
                                        "deployed", "retrieved") if c in rows.column_names])
    rows = rows.to_pandas()
    rows["occupation"] = rows["occupation"].fillna(rows["index"]).astype("int64")
    rows = rows[rows["kind"] == "logged"].merge(
        flagged[["line", "point", "occupation"]], on=["line", "point", "occupation"])
    by = ["line", "point", "occupation"]
    window = rows.groupby(by, sort=False).agg(deployed=("deployed", "min"),
                                              retrieved=("retrieved", "max"))
    groups = ({k: g for k, g in rows.groupby(by, sort=False)} if figures else {})
    windows = window.to_dict("index")  # one look-up table, not a MultiIndex search a station
    stations = []
    for r in flagged.itertuples(index=False):  # one per flagged station, not per fix
        key = (float(r.line), float(r.point), int(r.occupation))
        flags = r.flags.split(";")
        stations.append(Station(
            line=key[0], point=key[1], index=key[2], node=str(r.node), flags=flags,
            state=split_flags(flags, in_force.get(key, [])),
            deployed=_when(windows[key]["deployed"]),
            retrieved=_when(windows[key]["retrieved"]),
            figures=_figures(groups[key], flags, unit) if figures else {},
            last=last.get(key)))
    review = Review(run.id, survey_id, stations)
    review.counts = _counts(run.id, table, st, [s.state for s in stations])
    return review


def _counts(run_id: str, table: pa.Table, st: pa.Table, states: list[FlagState]
            ) -> dict[str, Any]:
    """The counts of :func:`review_counts` from the station flags and the states of the
    flagged stations."""
    c = count_flags(table, st)
    open_per: dict[str, int] = {}
    for state in states:
        for f in state.open:
            open_per[f] = open_per.get(f, 0) + 1
    n_waiting = sum(1 for state in states if state.open)
    return c.as_dict() | {"run": run_id, "n_waiting": n_waiting,
                          "n_decided": c.n_flagged - n_waiting,
                          "open_per_flag": {k: open_per[k] for k in FLAGS if k in open_per}}


def review_counts(arc: Archive, survey_id: int, run_ref: str | None = None, *,
                  positions: pa.Table | None = None) -> dict[str, Any]:
    """Flagged stations of a run counted the one way (stations, i.e. occupations):
    ``n_stations``, ``n_flagged``, ``per_flag``, ``n_unlogged`` (clusters, not stations),
    ``n_waiting`` (an open flag left), ``n_decided`` and ``open_per_flag``; the same as
    :func:`load_review`'s counts, without the windows and figures behind them.
    ``positions``: the run's :func:`~archive.solve.occupancy.run_occupations`, when the
    caller has read them already (they must be that run's: they are not checked again)."""
    run = get_run(arc, survey_id, run_ref)
    table = positions if positions is not None else run_occupations(arc, run)
    with arc.session() as s:
        in_force = in_force_by_occupation(s, survey_id)
    st = station_flags(table)
    flagged = st.filter(pc.not_equal(st["flags"], ""))
    states = [split_flags(f.split(";"), in_force.get((float(a), float(b), int(o)), []))
              for a, b, o, f in zip(flagged["line"].to_pylist(), flagged["point"].to_pylist(),
                                    flagged["occupation"].to_pylist(),
                                    flagged["flags"].to_pylist(), strict=True)]
    return _counts(run.id, table, st, states)
