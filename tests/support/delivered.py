"""A solved and delivered invented survey, as a crew leaves it: the scenario's inputs and
logs loaded, an exclude span applied by the solve, a height set twice by hand (the second
superseding the first), and an SPS and a CSV delivery of the run."""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

from archive.deliver.deliveries import DeliveryResult, deliver
from archive.edits.decisions import exclude_span, set_height
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run, solve_survey
from tests.support.scenarios import scenario_archive


@dataclass
class Delivered:
    """Where the archive is and what was delivered from it."""

    root: Path
    survey_id: int
    run_id: str
    station: tuple[float, float, int]  # line, point, point index of the edited occupation
    sps: DeliveryResult
    csv: DeliveryResult


def delivered_survey(base: Path) -> Delivered:
    """Build it under ``base`` (about five seconds on two cores); the archive is closed."""
    arc, sid, _, _sc = scenario_archive(base, seed=11, size="small", dem=True, solve=False)
    try:
        first = solve_survey(arc, sid).run_id
        rows = run_occupations(arc, get_run(arc, sid, first))
        row = next(r for r in rows.to_pylist() if r["kind"] == "logged" and r["delivered"])
        line, point, index = row["line"], row["point"], int(row["occupation"])
        exclude_span(arc, sid, line, point, index, node=row["node"], start=row["t_start"],
                     end=row["t_start"].replace(microsecond=0) + (row["t_end"] - row["t_start"]) / 8,
                     reason="node handled at the camp before it was laid out")
        run_id = solve_survey(arc, sid, label="with the span excluded").run_id
        set_height(arc, sid, line, point, index, height=401.25, reason="levelled by the crew")
        set_height(arc, sid, line, point, index, height=401.5, reason="levelled again")
        out = base / "delivered"
        out.mkdir()
        sps = deliver(arc, sid, run_id, "sps", out / "kestrel_receivers.sps",
                      "Harrow Basin Energy processing centre", allow_flags=True)
        csv = deliver(arc, sid, run_id, "csv", out / "kestrel_receivers.csv",
                      "Harrow Basin Energy GIS", allow_flags=True)
    finally:
        arc.close()
    return Delivered(base / "archive", sid, run_id, (line, point, index), sps, csv)
