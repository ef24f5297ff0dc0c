"""Solution runs: a manifest of exactly what was solved, named by its hash, and its positions.

The manifest holds the survey CRS and height convention, the hashes of every input object
(the fix tables of the raw files used, the stations and deployments tables, the elevation
model), the exclude-span edits in force (ids and payloads), the fully resolved parameters,
the station/node selection and the code version. The run id is the SHA-256 of its canonical
JSON (:func:`archive.store.hashing.canonical_hash`): the same manifest is the same run, so
solving again is a look-up. The positions table is stored as Parquet and its content digest
in the run row; :func:`recompute` solves again from the manifest alone and proves the
result bit-identical (``nodekeep reproduce``).
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive import __version__
from archive.errors import IntegrityError, UsageError
from archive.progress import NoProgress, Progress
from archive.solve.flags import count_flags
from archive.solve.schema import SORT_KEYS as RUN_ORDER
from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json, sha256_bytes, table_digest
from archive.store.models import Run, utcnow

if TYPE_CHECKING:
    from archive.solve.inputs import SolveInputs

# The solver itself (archive.solve.inputs, .solving and the engine under them: numba, scipy,
# pandas) is imported by the functions that solve, so that commands which only read runs
# start in a fraction of a second.

MANIFEST_FORMAT = 3
"""Format 3: positions carry each row's delivered point index, the time it holds and the
degrees of freedom of its uncertainty (``POSITION_SCHEMA``). Format 2 runs (occupations, the
last part of a moved node delivered) are recomputed in ``POSITION_SCHEMA_V2``, format 1 runs
(solved before occupations were numbered) in ``POSITION_SCHEMA_V1``."""

SORT_KEYS = RUN_ORDER  # the run's row order


@dataclass
class RunResult:
    """What :func:`solve_survey` did: the run id, whether it is new, and counts."""

    run_id: str
    created: bool
    n_positions: int
    n_flagged: int
    flag_counts: dict[str, int]
    summary: dict[str, Any] = field(default_factory=dict)

    def as_dict(self) -> dict[str, Any]:
        """Plain data for JSON output."""
        return {"run_id": self.run_id, "created": self.created, "n_positions": self.n_positions,
                "n_flagged": self.n_flagged, "flag_counts": self.flag_counts,
                "summary": self.summary}


def _selection(stations: Sequence[tuple[float, float]] | None,
               nodes: Sequence[str] | None) -> dict[str, Any]:
    return {"stations": sorted([float(line), float(point)] for line, point in stations)
            if stations else None,
            "nodes": sorted({str(n) for n in nodes}) if nodes else None}


def build_manifest(inp: SolveInputs, params: dict[str, Any], selection: dict[str, Any]
                   ) -> dict[str, Any]:
    """The run manifest (see module doc) of these inputs, parameters and selection."""
    return {
        "format": MANIFEST_FORMAT,
        "survey": inp.survey,
        "inputs": {"fixes": sorted(inp.fix_hashes), "stations": inp.stations_hash,
                   "deployments": inp.deployments_hash, "dem": inp.dem_hash},
        "input_versions": inp.versions,
        "edits": inp.edits,
        "params": params,
        "selection": selection,
        "code_version": __version__,
    }


def _counts(table: pa.Table) -> tuple[int, dict[str, int], dict[str, Any]]:
    """Flagged stations, stations per flag and the summary's counts (:func:`count_flags`)."""
    c = count_flags(table)
    return c.n_flagged, c.per_flag, {"n_stations": c.n_stations, "n_unlogged": c.n_unlogged,
                                     "flag_unit": "stations"}


def solve_survey(arc: Archive, survey_id: int, params: dict[str, Any] | None = None, *,
                 label: str = "", stations: Sequence[tuple[float, float]] | None = None,
                 nodes: Sequence[str] | None = None, progress: Progress | None = None,
                 scheduler: str | None = None, workers: int | None = None,
                 incremental: bool = True) -> RunResult:
    """Solve the survey's deployments (or a selection) and record the run; see module doc.

    A solve of the whole survey reuses, node by node, the rows of earlier runs whose inputs
    for that node are unchanged (:mod:`archive.solve.reuse`; ``incremental=False`` solves
    every node); the run is the same bit for bit either way. ``scheduler`` (a Dask address, ``tcp://HOST:PORT``) or ``workers`` (a local Dask
    cluster of that many processes) fan the node partitions out; the positions, and so the
    run, are the same bit for bit.
    """
    from archive.solve.inputs import survey_inputs
    from archive.solve.params import resolve_params
    from archive.solve.solving import solve_inputs

    progress = progress or NoProgress()
    resolved = resolve_params(params or {})
    selection = _selection(stations, nodes)
    inp = survey_inputs(arc, survey_id, selection)
    manifest = build_manifest(inp, resolved, selection)
    run_id = canonical_hash(manifest)
    with arc.session() as s:
        existing = s.get(Run, run_id)
    if existing is not None:
        from archive.solve.occupancy import run_occupations

        # counted again from the table: runs recorded before flags were counted per
        # station stored counts of rows
        n_flagged, flag_counts, counted = _counts(run_occupations(arc, existing))
        summary = json.loads(existing.summary or "{}") | counted | {
            "n_flagged": n_flagged, "flag_counts": flag_counts}
        return RunResult(run_id, False, existing.n_positions, n_flagged, flag_counts, summary)
    reuse = None
    if incremental and selection == _selection(None, None):
        from archive.solve.reuse import find_reuse, result_keys

        reuse = find_reuse(arc, survey_id, result_keys(inp, manifest))
    table, stats, unfinished = solve_inputs(
        arc, manifest, inp, progress, scheduler=scheduler, workers=workers,
        skip=reuse.nodes if reuse else None, reused=reuse.rows if reuse else None)
    n_flagged, flag_counts, counted = _counts(table)
    delivered = table.filter(table["delivered"])
    summary = {"n_positions": table.num_rows, "n_delivered": delivered.num_rows,
               "n_flagged": n_flagged, "flag_counts": flag_counts, **counted,
               "n_awaiting": int(pc.sum(pc.equal(table["kind"], "awaiting")).as_py() or 0),
               "estimator": resolved["estimate"]["estimator"],
               "uncertainty": resolved["uncertainty"]["method"],
               "dem": inp.dem_hash is not None, **stats}
    more_objects: list[tuple[str, int, str]] = []
    if reuse is not None:
        from archive.solve.reuse import store_results

        summary["results"], more_objects = store_results(arc, unfinished, reuse, run_id)
        summary["reuse"] = reuse.summary()
    del unfinished
    m_bytes = canonical_json(manifest)
    m_hash, m_size = arc.objects.put_bytes(m_bytes)
    p_hash, p_size = arc.objects.put_table(table)
    run = Run(id=run_id, survey_id=survey_id, label=label, manifest_hash=m_hash,
              positions_hash=p_hash, positions_digest=table_digest(table),
              code_version=__version__, n_positions=table.num_rows, n_flagged=n_flagged,
              summary=json.dumps(summary, sort_keys=True), created_at=utcnow(),
              created_by=arc.actor)
    with arc.transaction() as tx:
        if tx.get(Run, run_id) is not None:  # solved meanwhile by someone else
            return RunResult(run_id, False, table.num_rows, n_flagged, flag_counts, summary)
        arc.register_object(tx, m_hash, m_size, "manifest")
        arc.register_object(tx, p_hash, p_size, "positions")
        arc.register_objects(tx, more_objects)
        tx.add(run)
        arc.log(tx, "solve.run", {"run": run_id, "manifest": m_hash, "positions": p_hash,
                                  "digest": run.positions_digest, "label": label,
                                  "n_positions": table.num_rows, "n_flagged": n_flagged},
                survey_id=survey_id, rows=[run])
    return RunResult(run_id, True, table.num_rows, n_flagged, flag_counts, summary)


def get_run(arc: Archive, survey_id: int | None, ref: str | None = None) -> Run:
    """A run of the survey by id or unique prefix (>= 4 characters); newest when None."""
    with arc.session() as s:
        q = select(Run)
        if survey_id is not None:
            q = q.where(Run.survey_id == survey_id)
        if ref is None:
            run = s.scalars(q.order_by(Run.created_at.desc(), Run.id).limit(1)).first()
            if run is None:
                raise UsageError("the survey has no solution run yet",
                                 hint="solve it with 'nodekeep solve'")
            return run
        ref = ref.strip().lower()
        if len(ref) < 4:
            raise UsageError(f"run reference {ref!r} is too short",
                             hint="give at least 4 characters of a run id ('nodekeep runs')")
        found = list(s.scalars(q.where(Run.id.startswith(ref, autoescape=True)).limit(2)))
    if not found:
        raise UsageError(f"no run {ref!r} in this survey", hint="list runs with 'nodekeep runs'")
    if len(found) > 1:
        raise UsageError(f"run reference {ref!r} matches several runs",
                         hint="give more characters of the run id")
    return found[0]


def run_positions(arc: Archive, run: Run) -> pa.Table:
    """The run's stored positions; IntegrityError when they no longer match its digest."""
    table = arc.objects.read_table(run.positions_hash)
    if table_digest(table) != run.positions_digest:
        raise IntegrityError(f"the positions of run {run.id[:12]} no longer match its digest",
                             hint="run 'nodekeep verify' to see what else changed")
    return table


def run_manifest(arc: Archive, run: Run) -> dict[str, Any]:
    """The run's manifest; IntegrityError when its bytes no longer give the run id."""
    raw = arc.objects.read_bytes(run.manifest_hash)
    data = json.loads(raw)
    # stored canonically (as every run is), its bytes hash to the run id: no need to write
    # them out again; otherwise the canonical form of what they hold must
    if sha256_bytes(raw) != run.id and canonical_hash(data) != run.id:
        raise IntegrityError(f"the manifest of run {run.id[:12]} does not hash to the run id",
                             hint="run 'nodekeep verify' to see what else changed")
    return data


def recompute(arc: Archive, run_id: str) -> pa.Table:
    """Solve again from the run's manifest and archived objects (``nodekeep reproduce``).

    Every input object is re-hashed first: a missing object or one whose bytes no longer
    match its hash raises :class:`IntegrityError` naming it.
    """
    run = get_run(arc, None, run_id)
    if not arc.objects.exists(run.manifest_hash) or not arc.objects.check(run.manifest_hash):
        raise IntegrityError(f"the manifest object {run.manifest_hash} of run {run.id[:12]} "
                             "is missing or altered", hint="run 'nodekeep verify'")
    manifest = run_manifest(arc, run)
    from archive.solve.inputs import check_objects, survey_inputs
    from archive.solve.solving import solve_inputs

    check_objects(arc, manifest)
    inp = survey_inputs(arc, run.survey_id, manifest["selection"], manifest=manifest)
    table, _, _ = solve_inputs(arc, manifest, inp, NoProgress())
    return table


def manifest_inputs(manifest: dict[str, Any]) -> dict[str, Any]:
    """The manifest's input hashes: ``fixes`` (a list of fix-table hashes) plus the named
    input tables (``stations``, ``deployments``, ``dem``)."""
    inputs = dict(manifest.get("inputs") or {})
    inputs["fixes"] = list(inputs.get("fixes") or [])
    return inputs


def list_runs(arc: Archive, survey_id: int) -> list[dict[str, Any]]:
    """The survey's runs, oldest first, as plain data."""
    with arc.session() as s:
        runs = s.scalars(select(Run).where(Run.survey_id == survey_id)
                         .order_by(Run.created_at, Run.id)).all()
    out = []
    for r in runs:
        summary = json.loads(r.summary or "{}")
        out.append({"id": r.id, "label": r.label, "created_at": r.created_at,
                    "created_by": r.created_by, "code_version": r.code_version,
                    "n_positions": r.n_positions, "n_flagged": r.n_flagged,
                    "flag_counts": summary.get("flag_counts", {}),
                    "estimator": summary.get("estimator")})
    return out


def station_solution(arc: Archive, survey_id: int, line: float, point: float,
                     index: int | None = None, run_ref: str | None = None, *,
                     node: str | None = None) -> dict[str, Any]:
    """A station's rows of a run (the newest by default) as plain data: every occupation
    (and every part of a moved one), or the occupation ``index``/``node`` choose (``index``
    may be the point index a moved node's later part is delivered under: its occupation's
    rows are given, every part)."""
    from archive.solve.occupancy import occupation_of_index, run_occupations
    from archive.survey.keys import rows_at, station_text

    run = get_run(arc, survey_id, run_ref)
    pos = run_occupations(arc, run)
    rows = rows_at(pos, line, point, None, node).to_pylist()
    if index is not None:  # the occupation delivered (wholly or in part) under that index
        occupation = occupation_of_index(rows, int(index))
        rows = [r for r in rows if r["occupation"] == occupation]
    if not rows:
        every = rows_at(pos, line, point).to_pylist()
        have = ", ".join(sorted({f"index {r['occupation']} (node {r['node']})" for r in every
                                 if r["occupation"] is not None}))
        raise UsageError(f"station {station_text(line, point, index)}"
                         + (f" node {node}" if node is not None else "")
                         + f" is not in run {run.id[:12]}" + (f"; it has {have}" if have else ""),
                         hint="check the line and point numbers, or choose a run with --run")
    n_occ = len({r["occupation"] for r in rows if r["occupation"] is not None})
    screen = run_manifest(arc, run)["params"].get("screen", {})
    from archive.solve.reuse import solved_by

    by = solved_by(arc, run, {r["node"] for r in rows})
    for r in rows:
        r["solved_by"] = by[str(r["node"])]  # an earlier run when its rows were reused
    # runs made before the parameter existed accepted every fix that passed the screen
    return {"run": run.id, "n_occupations": n_occ, "rows": rows,
            "no_quality": screen.get("no_quality", "accept")}
