"""The whole job on the invented Kestrel Flats 3D survey, in one call.

:func:`run_demo` generates the scenario (:mod:`archive.seeds.scenario`), creates an archive
(SQLite catalog and local objects) beside it, loads the preplot, the deployment log, the
RTK check points, the elevation model and every node log, solves, writes the QC report,
delivers SPS and SEG-P1 files, verifies the archive, and scores the result against the
scenario's truth and its planted problems. Every step goes through the same library
functions the command line uses, so the demo shows exactly what a crew would get.

The deliveries are made with flags allowed: a real delivery waits until someone has
reviewed each flag and acknowledged or fixed it; the demo delivers at once and says so in
the delivery note and the summary.
"""

from __future__ import annotations

import csv
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from archive.errors import UsageError
from archive.progress import NoProgress, Progress

ARCHIVE_DIR = "archive"
SCENARIO_DIR = "scenario"
DELIVERY_DIR = "delivery"
RECIPIENT = "Harrow Basin Energy processing centre"
DEMO_NOTE = ("demo delivery: made at once with review flags allowed (--allow-flags); a real "
             "delivery waits until every flag is acknowledged or fixed")


@dataclass
class ProblemOutcome:
    """One planted problem and whether the job caught it."""

    kind: str
    line: float
    point: float
    node: str
    expected: list[str]
    found: list[str]
    flagged: bool
    what: str = ""
    truth_distance: float | None = None  # delivered position to where the node really stood


@dataclass
class DemoSummary:
    """What the demo made, and how good it is against the check points and the truth."""

    out_dir: str
    scenario_dir: str
    archive_dir: str
    report: str
    deliveries: dict[str, str]
    survey: str
    seed: int
    size: str
    run_id: str
    n_stations: int
    n_reoccupied: int  # stations occupied more than once
    n_occupations: int  # deployments in the log (one delivered record each)
    n_logs: int
    n_fixes: int
    n_rejected_lines: int
    n_delivered: int  # delivered records (one per occupation, one per part of a moved node)
    n_flagged: int
    check_points: dict[str, Any]
    truth: dict[str, Any]
    problems: list[ProblemOutcome]
    unexpected_flags: dict[str, int]
    allowed_flags: bool
    verify_ok: bool
    verify_problems: list[str]
    seconds: dict[str, float] = field(default_factory=dict)

    @property
    def all_flagged(self) -> bool:
        """Every planted problem was caught."""
        return all(p.flagged for p in self.problems)

    def as_dict(self) -> dict[str, Any]:
        """Plain data (the ``--json`` output)."""
        d = asdict(self)
        d["all_flagged"] = self.all_flagged
        return d


def _distances(values: np.ndarray) -> dict[str, Any]:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"n": 0, "median": None, "p95": None, "max": None}
    return {"n": int(v.size), "median": float(np.median(v)), "p95": float(np.percentile(v, 95)),
            "max": float(v.max())}


def _read_csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def score(positions: Any, truth_csv: Path, problems: list[dict[str, Any]],
          rejects_by_node: dict[str, dict[str, int]],
          reoccupied: list[dict[str, Any]] | None = None
          ) -> tuple[dict[str, Any], list[ProblemOutcome], dict[str, int]]:
    """Score delivered positions against the truth and the planted problems.

    ``positions`` is a run's positions table with its occupation columns (rows with
    ``delivered`` true are scored, each against the truth of its own occupation and part:
    the scenario numbers a station's occupations in time order, as the deployment log does,
    and the parts of a moved node before and after the move).
    Returns the truth statistics (stations with a planted problem left out: their log or
    their stay is wrong on purpose; ``reoccupied`` repeats them over the occupations of
    stations laid out more than once), one outcome per planted problem, and the count of
    each flag raised on stations without a planted problem.
    """
    pos = positions.to_pandas()
    pos = pos[pos["delivered"] & (pos["kind"] == "logged")]
    occ = pos["occupation"].fillna(pos["index"]).astype(int)
    # each delivered record against the truth of its own place: the whole stay (part 0),
    # or the part before (1) or after (2) a move
    key = list(zip(pos["line"].astype(float), pos["point"].astype(float), occ,
                   pos["part"].astype(int), strict=True))
    at = dict(zip(key, range(len(pos)), strict=True))
    truth = {(float(r["line"]), float(r["point"]), int(r.get("occupation") or 1),
              int(r.get("part") or 0)): r for r in _read_csv(truth_csv)}
    planted = {(float(p["line"]), float(p["point"])) for p in problems
               if p["kind"] != "damaged-log"}
    again = {(float(r["line"]), float(r["point"])) for r in reoccupied or []}

    def dist_to_truth(k: tuple[float, float, int, int]) -> float | None:
        if k not in at or k not in truth:
            return None
        row = pos.iloc[at[k]]
        d = float(np.hypot(row["easting"] - float(truth[k]["easting"]),
                           row["northing"] - float(truth[k]["northing"])))
        return d if np.isfinite(d) else None

    clean = [k for k in at if k[:2] not in planted]
    d = np.array([dist_to_truth(k) for k in clean], dtype=float)
    stats = _distances(d)
    stats["excluded_planted"] = len(planted)
    d_again = np.array([dist_to_truth(k) for k in clean if k[:2] in again], dtype=float)
    stats["reoccupied"] = _distances(d_again) | {"stations": len(again)}

    def first(line: float, point: float) -> tuple[float, float, int, int] | None:
        keys = sorted(k for k in at if k[:2] == (line, point))
        return keys[0] if keys else None

    outcomes = []
    for p in problems:
        k = first(float(p["line"]), float(p["point"]))
        if p["kind"] == "damaged-log":
            rejects = rejects_by_node.get(p["node"], {})
            found = sorted(r for r in rejects if rejects[r] > 0)
            expected = list(p["expect_rejects"])
        else:
            found = sorted({f for f in pos.iloc[at[k]]["flags"].split(";") if f}) \
                if k is not None else ["(not delivered)"]
            expected = list(p["expect_flags"])
        outcomes.append(ProblemOutcome(
            kind=p["kind"], line=float(p["line"]), point=float(p["point"]), node=p["node"],
            expected=expected, found=found, flagged=bool(set(found) & set(expected)),
            what=p.get("what", ""), truth_distance=dist_to_truth(k) if k else None))

    unexpected: dict[str, int] = {}
    for k in clean:
        for f in pos.iloc[at[k]]["flags"].split(";"):
            if f:
                unexpected[f] = unexpected.get(f, 0) + 1
    return stats, outcomes, dict(sorted(unexpected.items()))


def _timed(seconds: dict[str, float], name: str, fn: Callable[[], Any]) -> Any:
    t0 = time.perf_counter()
    out = fn()
    seconds[name] = round(time.perf_counter() - t0, 2)
    return out


def run_demo(out_dir: str | Path, *, seed: int = 7, size: str = "demo",
             progress: Progress | None = None, interval: float | None = None) -> DemoSummary:
    """Run the whole job on a freshly generated scenario in ``out_dir`` (see module doc).

    ``out_dir`` must not already hold a demo archive. ``size`` is ``"demo"`` (a few hundred
    stations), ``"small"`` (thirty, for tests) or ``"same-day"`` (nine-hour deployments);
    ``interval`` (s) logs at another interval than the size's.
    """
    from archive.deliver.deliveries import deliver
    from archive.ingest.load import load_fix_files
    from archive.qc.check import qc_run
    from archive.qc.report import write_report
    from archive.seeds.scenario import generate
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run, solve_survey
    from archive.store.archive import Archive
    from archive.store.verify import verify_archive
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    progress = progress or NoProgress()
    out = Path(out_dir)
    if (out / ARCHIVE_DIR).exists() or (out / SCENARIO_DIR).exists():
        raise UsageError(f"{out} already holds a demo",
                         hint="choose another folder, or remove this one first")
    sec: dict[str, float] = {}
    t_start = time.perf_counter()
    sc = _timed(sec, "generate", lambda: generate(out / SCENARIO_DIR, seed=seed, size=size,
                                                  interval=interval))
    arc = Archive.init(out / ARCHIVE_DIR)
    try:
        survey = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}",
                               vertical_datum=sc.vertical_datum, client=sc.client,
                               contractor=sc.contractor, area="invented demo prospect",
                               height_mode="gga")
        sid = survey.id

        def load_inputs() -> None:
            load_input(arc, sid, "stations", sc.preplot)
            load_input(arc, sid, "deployments", sc.deployments)
            load_input(arc, sid, "control", sc.control)
            load_input(arc, sid, "dem", sc.dem, vertical_datum=sc.vertical_datum)

        _timed(sec, "load_inputs", load_inputs)
        report = _timed(sec, "load_fixes", lambda: load_fix_files(
            arc, sid, [sc.out_dir / "logs"], progress=progress))
        solved = _timed(sec, "solve", lambda: solve_survey(arc, sid, progress=progress))
        run = get_run(arc, sid, solved.run_id)
        qc = _timed(sec, "qc", lambda: qc_run(arc, sid, run.id))
        written = _timed(sec, "report", lambda: write_report(arc, sid, run.id,
                                                             out / "report.html"))
        (out / DELIVERY_DIR).mkdir(exist_ok=True)
        stem = sc.survey_name.lower().replace(" ", "_")
        delivered = {}
        for fmt, ext in (("sps", "sps"), ("segp1", "p1")):
            res = _timed(sec, f"deliver_{fmt}", lambda f=fmt, e=ext: deliver(
                arc, sid, run.id, f, out / DELIVERY_DIR / f"{stem}_receivers.{e}", RECIPIENT,
                note=DEMO_NOTE, allow_flags=True))
            delivered[fmt] = res.path
        ver = _timed(sec, "verify", lambda: verify_archive(arc, progress=progress))
        positions = run_occupations(arc, run)
    finally:
        arc.close()

    rejects = {o.node: dict(o.rejects) for o in report.files if o.node}
    truth, outcomes, unexpected = score(positions, sc.truth, sc.problems, rejects,
                                        sc.reoccupied)
    solved_h = qc.comparison.solved.horizontal
    sec["total"] = round(time.perf_counter() - t_start, 2)
    return DemoSummary(
        out_dir=str(out), scenario_dir=str(sc.out_dir), archive_dir=str(out / ARCHIVE_DIR),
        report=str(written.path), deliveries=delivered, survey=sc.survey_name, seed=seed,
        size=size, run_id=run.id, n_stations=sc.n_stations, n_logs=len(sc.logs),
        n_reoccupied=len(sc.reoccupied),
        n_occupations=sc.n_deployments,
        n_fixes=sum(o.n_fixes for o in report.files),
        n_rejected_lines=sum(o.n_rejected for o in report.files),
        n_delivered=qc.n_delivered, n_flagged=qc.n_flagged,
        check_points={"n": solved_h.n, "median": solved_h.median, "p95": solved_h.p95,
                      "max": solved_h.max, "mean": solved_h.mean},
        truth=truth, problems=outcomes, unexpected_flags=unexpected, allowed_flags=True,
        verify_ok=ver.ok, verify_problems=[str(p) for p in ver.problems], seconds=sec)

