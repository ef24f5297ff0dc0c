"""Reading and checking each kind of survey input file (the parse functions of
:mod:`archive.survey.kinds`): the file's table, its warnings and format details."""

from __future__ import annotations

import json
from typing import Any

from archive.errors import Refused, UsageError
from archive.survey.kinds import LoadContext
from archive.survey.parsed import ParsedInput, format_problem


def _current_table(ctx: LoadContext, kind: str):
    from archive.survey.inputs import current_input

    found = current_input(ctx.arc, ctx.survey.id, kind)
    return found[1] if found else None


def parse_stations(ctx: LoadContext) -> ParsedInput:
    """A preplot (SPS or CSV), inside the survey CRS's area of use."""
    from archive.survey import stations
    from archive.survey.guards import check_dropped, check_header_crs
    from archive.survey.inputs import current_input

    margin = float(ctx.options.get("area_margin_deg", 0.0))
    parsed = stations.read_stations(ctx.read(), str(ctx.path), ctx.options.get("format"))
    check_header_crs(parsed.meta, ctx.survey.crs_epsg, str(ctx.path),
                     ctx.options.get("crs_from_survey"))
    stations.check_area(parsed.table, ctx.survey.crs_epsg, str(ctx.path), margin_deg=margin)
    current = current_input(ctx.arc, ctx.survey.id, "stations")
    check_dropped(parsed.table, current[1] if current else None,
                  current[0].version if current else None, str(ctx.path),
                  bool(ctx.options.get("replace")), parsed.meta)
    # a preplot raises M for moved nodes' later parts too: those already delivered keep
    # their index, kept with this version as with the deployment log's
    earlier = json.loads(current[0].meta or "{}").get("later_parts", []) if current else []
    later = delivered_later_parts(ctx.arc, ctx.survey.id, earlier)
    if later:
        parsed.meta["later_parts"] = later
        parsed.warnings += _preplot_on_later_parts(parsed.table, later)
    return parsed


def _preplot_on_later_parts(table, later: list[dict[str, Any]]) -> list[dict[str, Any]]:
    """A warning for each preplot station whose point index a moved node's later part was
    delivered under (the two share a key until one of them is resolved)."""
    from archive.survey.keys import station_text
    from archive.survey.parsed import problem

    held = {(p["line"], p["point"], p["index"]) for p in later}
    return [problem("later-part-index", f"station {station_text(a, b, k)} has the point index "
                    "a moved node's later part was delivered under: the part keeps it, so "
                    "an occupation or an edit of this station under that index would give "
                    "two records one key (a delivery refuses that)", int(n))
            for a, b, k, n in zip(table["line"].to_pylist(), table["point"].to_pylist(),
                                  table["index"].to_pylist(), table["src_line"].to_pylist(),
                                  strict=True)
            if (float(a), float(b), int(k)) in held]


def parse_control(ctx: LoadContext) -> ParsedInput:
    """RTK check points (CSV or SPS), inside the area, warned when not at a preplot station."""
    from archive.survey import stations
    from archive.survey.guards import check_header_crs

    margin = float(ctx.options.get("area_margin_deg", 0.0))
    parsed = stations.read_control(ctx.read(), str(ctx.path), ctx.options.get("format"))
    check_header_crs(parsed.meta, ctx.survey.crs_epsg, str(ctx.path),
                     ctx.options.get("crs_from_survey"))
    stations.check_area(parsed.table, ctx.survey.crs_epsg, str(ctx.path), margin_deg=margin)
    parsed.warnings += stations.unknown_stations(parsed.table, _current_table(ctx, "stations"),
                                                 "check point")
    parsed.warnings.sort(key=lambda w: (w["line"] or 0, w["code"]))
    return parsed


def parse_deployments(ctx: LoadContext) -> ParsedInput:
    """A deployment log: checked against the preplot and itself, occupations numbered
    against the previous version (:mod:`archive.survey.occupations`); ``strict`` refuses a
    log with any problem."""
    from archive.survey import deployments
    from archive.survey.inputs import current_input
    from archive.survey.occupations import occupation_summary, occupation_warnings

    name = str(ctx.path)
    parsed = deployments.read_deployments(ctx.read(), name, ctx.options.get("columns"))
    parsed.table, repeated = deployments.drop_repeated(parsed.table)
    parsed.warnings += repeated
    parsed.warnings += deployments.check_deployments(parsed.table,
                                                     _current_table(ctx, "stations"))
    previous = current_input(ctx.arc, ctx.survey.id, "deployments")
    before = (json.loads(previous[0].meta or "{}").get("occupations") or {}) if previous else {}
    retired = before.get("retired", [])
    later = delivered_later_parts(ctx.arc, ctx.survey.id, before.get("later_parts", []))
    parsed.table, gone = deployments.number_occupations(
        parsed.table, name, previous[1] if previous else None, retired,
        _current_table(ctx, "stations"), later)
    parsed.warnings += occupation_warnings(parsed.table)
    parsed.warnings.sort(key=lambda w: (w["line"] or 0, w["code"]))
    parsed.meta["occupations"] = occupation_summary(parsed.table) | {"retired": gone}
    if later:
        parsed.meta["occupations"]["later_parts"] = later
    if previous is not None:
        parsed.meta["occupations"]["numbered_after_version"] = previous[0].version
    parsed.meta["strict"] = bool(ctx.options.get("strict", False))
    if ctx.options.get("strict") and parsed.warnings:
        listed = "; ".join(format_problem(ctx.path.name, w) for w in parsed.warnings[:5])
        more = f" (and {len(parsed.warnings) - 5} more)" if len(parsed.warnings) > 5 else ""
        raise Refused(f"{name}: {len(parsed.warnings)} problem(s) in the deployment log, "
                      f"refused by --strict: {listed}{more}",
                      hint="correct the log, or load it without --strict to keep the "
                           "warnings with the version")
    return parsed


def delivered_later_parts(arc, survey_id: int, earlier: list[dict[str, Any]] | tuple = ()
                          ) -> list[dict[str, Any]]:
    """The point index each moved node's later part was last delivered under (line, point,
    occupation, index), from the records of the survey's deliveries, with those the
    previous version of the log kept (``earlier``). A record a recipient holds keeps its
    meaning: a later log that adds an occupation at the station numbers it above them, and
    the part keeps its index in every later run (:mod:`archive.solve.parts`)."""
    import pyarrow.compute as pc
    from sqlalchemy import select

    from archive.store.models import Delivery

    found = {(float(r["line"]), float(r["point"]), int(r["occupation"])): int(r["index"])
             for r in earlier}
    with arc.session() as s:
        hashes = s.scalars(select(Delivery.final_hash).where(Delivery.survey_id == survey_id)
                           .order_by(Delivery.id)).all()
    cols = ["line", "point", "occupation", "part", "index"]
    # each table once, in the order of its latest delivery: the latest has the last word
    for h in list(dict.fromkeys(reversed(hashes)))[::-1]:
        f = arc.objects.parquet_file(h)  # checked against its hash; five columns decoded
        if not set(cols) <= set(f.schema_arrow.names):
            continue  # delivered before parts had indices of their own
        t = f.read(columns=cols)
        t = t.filter(pc.fill_null(pc.and_(pc.equal(t["part"], 2),
                                          pc.not_equal(t["index"], t["occupation"])), False))
        for r in t.to_pylist():  # later parts only: a few per survey
            found[(float(r["line"]), float(r["point"]), int(r["occupation"]))] = int(r["index"])
    return [{"line": a, "point": b, "occupation": k, "index": v}
            for (a, b, k), v in sorted(found.items())]


def parse_dem(ctx: LoadContext) -> ParsedInput:
    """An elevation model: its raster facts (no table); the vertical datum is required."""
    from archive.survey.dem import inspect_dem

    datum = str(ctx.options.get("vertical_datum") or "").strip()
    if not datum:
        raise UsageError("an elevation model needs its vertical datum",
                         hint="pass --vertical-datum, e.g. 'NAVD88 (GEOID18)'")
    meta = inspect_dem(ctx.path, read_pixels=True)
    meta["vertical_datum"] = datum
    return ParsedInput(table=None, meta=meta)
