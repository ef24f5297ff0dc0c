"""Starting archives for the reliability tests: the invented survey alone, or with the scenario's
inputs, logs, a run, an edit and a delivery."""

from __future__ import annotations

import importlib.util
from pathlib import Path

from sqlalchemy import select

from archive.store.archive import Archive
from archive.survey.surveys import create_survey
from tests.support.cli import SURVEY_EPSG, SURVEY_NAME


def make_survey_archive(root: Path, db_url: str | None) -> Path:
    """A new archive holding the invented survey; closed, ready to be copied."""
    with Archive.init(root, db_url=db_url, actor="reliability") as arc:
        create_survey(arc, SURVEY_NAME, f"EPSG:{SURVEY_EPSG}", client="Harrow Basin Energy",
                      contractor="Bluestem Geophysical crew 7")
    return root


def has(module: str) -> bool:
    """True when a module of the project exists (parts land at different times)."""
    return importlib.util.find_spec(module) is not None


def fill_archive(root: Path, db_url: str | None, sc, *, n_logs: int = 3,
                 deliver_to: Path | None = None) -> Path:
    """An archive with the scenario's survey, inputs and ``n_logs`` logs (all when 0); with
    ``deliver_to`` (a folder) also a run, an edit and a CSV delivery written there."""
    from archive.ingest.load import load_fix_files
    from archive.survey.inputs import load_input

    with Archive.init(root, db_url=db_url, actor="reliability") as arc:
        survey = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}", client=sc.client,
                               contractor=sc.contractor, vertical_datum=sc.vertical_datum)
        load_input(arc, survey.id, "stations", sc.preplot)
        load_input(arc, survey.id, "deployments", sc.deployments)
        load_input(arc, survey.id, "control", sc.control)
        logs = sc.logs if not n_logs else sorted(sc.logs)[:n_logs]
        load_fix_files(arc, survey.id, logs, workers=1)
        if deliver_to is not None:
            make_delivery(arc, survey.id, deliver_to / "kestrel-positions.csv")
    return root


def make_delivery(arc: Archive, survey_id: int, to: Path):
    """Solve (a look-up when already solved), reject one station with a reason, deliver CSV."""
    from archive.deliver.deliveries import deliver
    from archive.edits.decisions import reject_station
    from archive.solve.run import solve_survey
    from archive.store.models import RawFile

    with arc.session() as s:
        nodes = sorted(set(s.scalars(select(RawFile.node).where(RawFile.survey_id == survey_id))))
    solve_survey(arc, survey_id, nodes=nodes)
    reject_station(arc, survey_id, 1001, 5014, reason="node battery died on the first day")
    to.parent.mkdir(parents=True, exist_ok=True)
    return deliver(arc, survey_id, None, "csv", to, "Harrow Basin Energy processing",
                   allow_flags=True, force=True)
