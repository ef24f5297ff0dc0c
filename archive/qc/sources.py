"""What the qc layer reads from the archive: a run, its positions and lineage, the inputs.

Every read goes through the public functions of the solve and survey layers, so qc never
depends on how they store things. Nothing here writes.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any

import pyarrow as pa

from archive.edits.decided import in_force_by_occupation
from archive.store.archive import Archive
from archive.store.models import Survey


@dataclass
class InputInfo:
    """One survey input version as the qc output cites it (None fields when not loaded)."""

    kind: str
    version: int | None = None
    table_hash: str | None = None
    source_hash: str | None = None
    original_name: str | None = None
    n_rows: int = 0

    def as_dict(self) -> dict[str, Any]:
        """Plain data."""
        return dict(vars(self))


@dataclass
class RunData:
    """A run with everything qc needs: its survey, positions, manifest and inputs."""

    survey: dict[str, Any]
    run: dict[str, Any]
    manifest: dict[str, Any]
    positions: pa.Table
    control: pa.Table | None
    stations: pa.Table | None
    inputs: dict[str, InputInfo] = field(default_factory=dict)
    # the deciding edits in force (acks, rejects, set positions and heights) by occupation
    # (line, point, occupation index), as :mod:`archive.edits.decided` keys them
    decisions: dict[tuple[float, float, int], list[Any]] = field(default_factory=dict)


def survey_info(arc: Archive, survey_id: int) -> dict[str, Any]:
    """Name, CRS and parties of a survey."""
    from archive.errors import UsageError

    with arc.session() as s:
        sv = s.get(Survey, survey_id)
        if sv is None:
            raise UsageError(f"no survey with id {survey_id}",
                             hint="list the surveys with 'nodekeep survey list'")
        return {"id": sv.id, "name": sv.name, "crs": f"EPSG:{sv.crs_epsg}",
                "crs_name": sv.crs_name, "unit": sv.linear_unit,
                "vertical_datum": sv.vertical_datum, "client": sv.client,
                "contractor": sv.contractor, "area": sv.area}


def _input(arc: Archive, survey_id: int, kind: str) -> tuple[InputInfo, pa.Table | None]:
    from archive.survey.inputs import current_input

    found = current_input(arc, survey_id, kind)
    if found is None:
        return InputInfo(kind), None
    version, table = found
    info = InputInfo(kind, version=version.version, table_hash=version.table_hash,
                     source_hash=version.source_hash, original_name=version.original_name,
                     n_rows=int(version.n_rows))
    return info, table


def run_info(run: Any) -> dict[str, Any]:
    """The catalog facts of a run as plain data."""
    return {"id": run.id, "label": run.label, "code_version": run.code_version,
            "n_positions": run.n_positions, "n_flagged": run.n_flagged,
            "positions_hash": run.positions_hash, "manifest_hash": run.manifest_hash,
            "created_at": run.created_at, "created_by": run.created_by}


def load_run_data(arc: Archive, survey_id: int, run_ref: str | None = None) -> RunData:
    """Read a run (the newest when ``run_ref`` is None) and the current survey inputs."""
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run, run_manifest

    survey = survey_info(arc, survey_id)
    run = get_run(arc, survey_id, run_ref)
    positions = run_occupations(arc, run)
    manifest = run_manifest(arc, run)
    control_info, control = _input(arc, survey_id, "control")
    stations_info, stations = _input(arc, survey_id, "stations")
    with arc.session() as s:
        decisions = in_force_by_occupation(s, survey_id)
    return RunData(survey=survey, run=run_info(run), manifest=manifest, positions=positions,
                   control=control, stations=stations,
                   inputs={"control": control_info, "stations": stations_info},
                   decisions=decisions)


def cloud_reader(arc: Archive, run_id: str):
    """A function (line, point, occupation index) -> that occupation's fix cloud table,
    re-solved by the solver from the run's manifest."""
    from archive.solve.cloud import station_cloud

    def read(line: float, point: float, occupation: int) -> pa.Table | None:
        return station_cloud(arc, run_id, line, point, occupation=occupation)

    return read
