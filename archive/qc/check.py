"""``qc_run``: a run's positions against the RTK check points and the preplot."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from archive.errors import UsageError
from archive.qc.notes import DEFAULT_TOLERANCE, notes_for_output
from archive.qc.sources import InputInfo, RunData, load_run_data
from archive.qc.stats import Comparison, compare, delivered
from archive.solve.flags import FlagCounts, count_flags
from archive.store.archive import Archive
from archive.survey.schema import CONTROL_SCHEMA


@dataclass
class QcResult:
    """Differences of a run's delivered positions (and of the preplot) to the check points."""

    survey: dict[str, Any]
    run: dict[str, Any]
    control: InputInfo
    tolerance: float
    n_delivered: int
    n_flagged: int
    n_check_points: int
    comparison: Comparison
    notes: list[str] = field(default_factory=list)
    flag_counts: FlagCounts | None = None  # flags counted per station, as solve counts them

    @property
    def n_checked(self) -> int:
        """Stations with both a delivered position and a check point."""
        return self.comparison.points.num_rows

    def as_dict(self) -> dict[str, Any]:
        """Plain data (the ``--json`` output)."""
        c = self.comparison
        return {
            "survey": self.survey["name"], "crs": self.survey["crs"], "run": self.run["id"],
            "code_version": self.run["code_version"], "control": self.control.as_dict(),
            "tolerance_m": self.tolerance, "n_delivered": self.n_delivered,
            "n_flagged": self.n_flagged,
            "flag_counts": self.flag_counts.as_dict() if self.flag_counts else None,
            "n_check_points": self.n_check_points,
            "n_checked": self.n_checked, "sign": "position minus check point",
            "percentile": "numpy linear (Hyndman & Fan definition 7)",
            "solved": c.solved.as_dict(), "preplot": c.preplot.as_dict(),
            "within_own_r95": c.within_own_r95,
            "beyond_tolerance": _rows(c.beyond), "points": _rows(c.points),
            "notes": self.notes,
        }


def _rows(table: pa.Table) -> list[dict[str, Any]]:
    cols = ["line", "point", "index", "occupation", "node", "de", "dn", "dh", "dist", "pre_de", "pre_dn",
            "pre_dist", "flags"]
    out = table.select(cols).to_pylist()
    for row in out:
        for k, v in row.items():
            if isinstance(v, float) and v != v:  # NaN -> null in JSON
                row[k] = None
    return out


def qc_of(data: RunData, tolerance: float = DEFAULT_TOLERANCE) -> QcResult:
    """The qc figures of already loaded run data (see :func:`qc_run`)."""
    if not tolerance > 0:
        raise UsageError(f"the tolerance must be a positive number of metres, not {tolerance}")
    control = data.control if data.control is not None else CONTROL_SCHEMA.empty_table()
    comparison = compare(data.positions, control, data.stations, tolerance=tolerance)
    dl = delivered(data.positions)
    counts = count_flags(data.positions)
    notes = notes_for_output()
    if data.control is None:
        notes.insert(0, "No check points are loaded for this survey: load them with "
                        "'nodekeep load control FILE' to compare positions with them.")
    elif comparison.points.num_rows == 0:
        notes.insert(0, "None of the check points matches a delivered station "
                        "(line, point, index).")
    return QcResult(
        survey=data.survey, run=data.run, control=data.inputs.get("control", InputInfo("control")),
        tolerance=float(tolerance), n_delivered=dl.num_rows, n_flagged=counts.n_flagged,
        n_check_points=control.num_rows, comparison=comparison, notes=notes,
        flag_counts=counts,
    )


def qc_run(arc: Archive, survey_id: int, run_ref: str | None = None,
           tolerance: float = DEFAULT_TOLERANCE) -> QcResult:
    """Compare a run's delivered positions and the preplot with the RTK check points.

    ``run_ref`` is a run id or unique prefix (default: the survey's newest run);
    ``tolerance`` (metres) lists the stations farther than that from their check point.
    Read-only: nothing is written to the archive.
    """
    if not tolerance > 0:
        raise UsageError(f"the tolerance must be a positive number of metres, not {tolerance}")
    return qc_of(load_run_data(arc, survey_id, run_ref), tolerance)


def summary_rows(d: dict[str, Any]) -> list[tuple[str, float | None, float | None, str]]:
    """Rows of the side-by-side summary of a ``QcResult.as_dict()``: (label, solved,
    preplot, unit) with unit "m" or "fraction"; shared by the command and the report."""
    s, p = d["solved"], d["preplot"]
    rows: list[tuple[str, float | None, float | None, str]] = []
    for key, label in [("mean", "mean"), ("median", "median"), ("rms", "RMS"),
                       ("p95", "95th percentile"), ("max", "maximum")]:
        rows.append((f"horizontal distance, {label}", s["horizontal"][key], p["horizontal"][key],
                     "m"))
    for axis in ("east", "north"):
        rows.append((f"{axis} bias (mean)", s[axis]["bias"], p[axis]["bias"], "m"))
        rows.append((f"{axis} spread (sd)", s[axis]["spread"], p[axis]["spread"], "m"))
    rows.append(("vertical bias (mean dH)", s["vertical"]["bias"], p["vertical"]["bias"], "m"))
    rows.append(("vertical spread (sd of dH)", s["vertical"]["spread"], p["vertical"]["spread"],
                 "m"))
    for key, label in [("median", "median"), ("rms", "RMS"), ("p95", "95th percentile"),
                       ("max", "maximum")]:
        rows.append((f"|dH|, {label}", s["vertical_abs"][key], p["vertical_abs"][key], "m"))
    for key, label in [("cep", "CEP (50 %)"), ("r95", "R95 (95 %)"), ("drms", "DRMS"),
                       ("two_drms", "2DRMS")]:
        rows.append((label, (s["accuracy"] or {}).get(key), (p["accuracy"] or {}).get(key), "m"))
    rows.append((f"within {d['tolerance_m']:g} m", s["within_tolerance"], p["within_tolerance"],
                 "fraction"))
    return rows
