"""Archives holding a generated Kestrel Flats 3D scenario, loaded as a crew would load it."""

from __future__ import annotations

from pathlib import Path
from typing import Any

from archive.store.archive import Archive


def scenario_archive(base: Path, *, seed: int, size: str = "small", control: bool = True,
                     dem: bool = False, solve: bool = True, **options: Any
                     ) -> tuple[Archive, int, str | None, Any]:
    """Generate a scenario under ``base/scenario`` and load it into ``base/archive``
    (preplot, deployment log, optionally check points and the elevation model, every log),
    then solve. Returns (archive, survey id, run id or None, scenario)."""
    from archive.seeds.scenario import generate

    from archive.ingest.load import load_fix_files
    from archive.solve.run import solve_survey
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    sc = generate(base / "scenario", seed=seed, size=size, **options)
    arc = Archive.init(base / "archive", actor="tester")
    sid = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}",
                        vertical_datum=sc.vertical_datum, client=sc.client,
                        contractor=sc.contractor).id
    load_input(arc, sid, "stations", sc.preplot)
    load_input(arc, sid, "deployments", sc.deployments)
    if control:
        load_input(arc, sid, "control", sc.control)
    if dem:
        load_input(arc, sid, "dem", sc.dem, vertical_datum=sc.vertical_datum)
    load_fix_files(arc, sid, [sc.out_dir / "logs"])
    run_id = solve_survey(arc, sid).run_id if solve else None
    return arc, sid, run_id, sc


def harvest_in_progress(base: Path, *, seed: int, size: str = "small", every: int = 2,
                        db_url: str | None = None
                        ) -> tuple[Archive, int, Any, list[Path], list[Path]]:
    """A generated scenario mid-survey: the preplot and the whole deployment log loaded,
    the logs of every ``every``-th node (in order of their file names) harvested and loaded,
    the rest still in the ground. Returns (archive, survey id, scenario, logs loaded, logs
    not yet loaded). ``db_url`` puts the catalog elsewhere (PostgreSQL)."""
    from archive.seeds.scenario import generate

    from archive.ingest.load import load_fix_files
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    sc = generate(base / "scenario", seed=seed, size=size)
    arc = Archive.init(base / "archive", db_url=db_url, actor="tester")
    sid = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}",
                        vertical_datum=sc.vertical_datum, client=sc.client,
                        contractor=sc.contractor).id
    load_input(arc, sid, "stations", sc.preplot)
    load_input(arc, sid, "deployments", sc.deployments)
    logs = sorted((sc.out_dir / "logs").glob("*.nmea"))
    loaded, waiting = logs[::every], [p for i, p in enumerate(logs) if i % every]
    load_fix_files(arc, sid, loaded, workers=1)
    return arc, sid, sc, loaded, waiting
