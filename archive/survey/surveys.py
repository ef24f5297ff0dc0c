"""Creating and listing surveys."""

from __future__ import annotations

from typing import Any

from sqlalchemy import select

from archive.errors import UsageError
from archive.store.archive import Archive
from archive.store.models import Survey, utcnow
from archive.survey.crs import survey_crs
from archive.survey.heights import HEIGHT_MODES, check_height_mode

__all__ = ["HEIGHT_MODES", "create_survey", "list_surveys", "survey_dict"]


def create_survey(
    arc: Archive,
    name: str,
    crs: str | int,
    *,
    vertical_datum: str = "",
    client: str = "",
    contractor: str = "",
    area: str = "",
    height_mode: str = "gga",
    height_param: str = "",
) -> Survey:
    """Create a survey after validating its projected CRS; ledgered."""
    name = name.strip()
    if not name:
        raise UsageError("a survey needs a name")
    check_height_mode(height_mode, height_param)  # a missing geoid grid is refused here
    scrs = survey_crs(crs)
    with arc.transaction() as tx:
        if tx.execute(select(Survey.id).where(Survey.name == name)).first():
            raise UsageError(f"a survey named {name!r} already exists")
        survey = Survey(
            name=name, crs_epsg=scrs.epsg, crs_name=scrs.name, linear_unit=scrs.unit,
            unit_factor=scrs.unit_factor, vertical_datum=vertical_datum,
            height_mode=height_mode, height_param=height_param, client=client,
            contractor=contractor, area=area, created_at=utcnow(), created_by=arc.actor,
        )
        tx.add(survey)
        tx.flush()
        arc.log(tx, "survey.create", {"name": name, "crs": f"EPSG:{scrs.epsg}"},
                survey_id=survey.id, rows=[survey])
    return survey


def survey_dict(s: Survey) -> dict[str, Any]:
    """A survey as plain data."""
    return {
        "id": s.id, "name": s.name, "crs": f"EPSG:{s.crs_epsg}", "crs_name": s.crs_name,
        "unit": s.linear_unit, "vertical_datum": s.vertical_datum,
        "height_mode": s.height_mode, "height_param": s.height_param, "client": s.client,
        "contractor": s.contractor, "area": s.area, "created_at": s.created_at,
        "created_by": s.created_by,
    }


def list_surveys(arc: Archive) -> list[dict[str, Any]]:
    """Every survey of the archive, oldest first."""
    with arc.session() as s:
        return [survey_dict(x) for x in s.scalars(select(Survey).order_by(Survey.id))]
