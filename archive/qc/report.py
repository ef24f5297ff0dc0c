"""The HTML report of a run: one self-contained file people can open and read.

Sections: cautions, lineage (run id, parameters, input hashes, code version), summary
against the check points (solved and preplot side by side), overview map, error vectors,
distributions, stations beyond tolerance, flagged stations with their fix clouds, and the
definitions. Cloud plots are drawn only for stations needing review (beyond the tolerance
or flagged by the solver), at most ``max_clouds`` (0: all); the overview is decimated along
lines.
The report only reads the archive.
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from datetime import UTC, datetime
from html import escape
from pathlib import Path
from typing import Any

import numpy as np

from archive import __version__
from archive.errors import UsageError
from archive.progress import NoProgress, Progress
from archive.qc import figures, html, notes
from archive.qc.check import QcResult, qc_of, summary_rows
from archive.qc.review_list import (
    BEYOND,
    MAX_TABLE_ROWS,
    OCC_KEY,
    CloudReader,
    cloud_section,
    decided_list,
    decided_table,
    occupation_count,
    records_with_edits,
    review_list,
    review_table,
    with_occupation,
)
from archive.qc.sources import RunData, cloud_reader, load_run_data
from archive.qc.stats import delivered
from archive.store.archive import Archive
from archive.store.outfiles import check_target, write_file

MAX_CLOUDS = 40
"""Stations drawn with their fix cloud; the rest of the review list is tabled only."""


@dataclass
class ReportWritten:
    """What was written."""

    path: Path
    size_bytes: int
    n_figures: int
    n_clouds: int
    n_review: int
    run: str
    seconds: float

    def as_dict(self) -> dict[str, Any]:
        """Plain data for printing."""
        return {"path": str(self.path), "size_bytes": self.size_bytes,
                "n_figures": self.n_figures, "n_clouds": self.n_clouds,
                "n_review": self.n_review, "run": self.run, "seconds": round(self.seconds, 2)}


def _summary_section(result: QcResult) -> str:
    d = result.as_dict()
    rows = [(label, html.pct(a) if unit == "fraction" else html.num(a),
             html.pct(b) if unit == "fraction" else html.num(b))
            for label, a, b, unit in summary_rows(d)]
    body = (f"<p>{result.n_checked:,} stations have both a delivered position and an RTK check "
            f"point ({result.n_check_points:,} check points loaded). Both columns use the same "
            "stations.</p>"
            + html.table(["against the check points (metres)", "solved", "preplot"], rows,
                         numeric=(1, 2), cls="summary"))
    if d["within_own_r95"] is not None:
        body += (f"<p>{html.pct(d['within_own_r95'])} of the check points lie inside the "
                 "solver's own 95 % radius of their station (about 95 % if the check points "
                 "marked the node itself; the sensor offset lowers it).</p>")
    body += "".join(f'<p class="note">{escape(n)}</p>' for n in result.notes[:4])
    return html.section("summary", "Summary against the check points", body)


def _no_quality_section(data: RunData) -> str:
    """Delivered stations that used fixes without quality information, and how many each."""
    dl = delivered(data.positions)
    if "n_no_quality" not in dl.column_names:
        return ""  # a run made before the count was kept
    n = dl["n_no_quality"].to_numpy(zero_copy_only=False)
    used = dl["n_used"].to_numpy(zero_copy_only=False)
    some = np.flatnonzero(n > 0)
    if some.size == 0:
        return ""
    params = (data.manifest or {}).get("params", {})
    setting = params.get("screen", {}).get("no_quality", "accept")
    limit = params.get("flags", {}).get("max_no_quality_share", 0.5)
    share = n[some] / np.maximum(used[some], 1)
    order = some[np.argsort(-share, kind="stable")][:MAX_TABLE_ROWS]
    cols = {c: dl[c].to_pylist() for c in ("line", "point", "index", "node")}
    rows = [(f"{cols['line'][i]:g} / {cols['point'][i]:g}", cols["index"][i],
             cols["node"][i], f"{int(n[i]):,}", f"{int(used[i]):,}",
             html.pct(n[i] / max(used[i], 1))) for i in order.tolist()]
    body = (f"<p>{some.size:,} of {len(n):,} delivered stations used fixes without quality "
            "information (epochs of RMC or GLL sentences only: no fix quality, satellite "
            f"count or HDOP), {int(n.sum()):,} fixes in all. The run's screen.no_quality is "
            f"{escape(str(setting))}: such fixes are weighted as a typical fix of their own "
            f"cloud. Where they are more than {html.pct(limit)} of the fixes used, the "
            "station carries the flag quality-unknown.</p>"
            + '<div class="scroll">' + html.table(
                ["station (line / point)", "index", "node", "without quality", "fixes used",
                 "share"], rows, numeric=(1, 3, 4, 5)) + "</div>")
    return html.section("no-quality", "Fixes without quality information", body)


def _lineage_section(data: RunData) -> str:
    run, m = data.run, data.manifest or {}
    facts = [("run id", run["id"]), ("label", run.get("label") or "–"),
             ("created", html._short(run["created_at"])), ("by", str(run["created_by"])),
             ("code version", str(m.get("code_version", run["code_version"]))),
             ("positions table", run["positions_hash"]), ("manifest", run["manifest_hash"])]
    body = html.kv_table(facts)
    body += "<h3>Inputs of the run</h3>" + html.kv_table(html.flatten(m.get("inputs", {})))
    body += ("<details><summary>Parameters of the run</summary>"
             + html.kv_table(html.flatten(m.get("params", {}))) + "</details>")
    qc_inputs = [(f"{k} (version {v.version})" if v.version else k,
                  v.table_hash or "not loaded") for k, v in data.inputs.items()]
    body += ("<h3>Inputs read by this report (current versions)</h3>"
             + html.kv_table(qc_inputs))
    return html.section("lineage", "Lineage", body)


def _definitions() -> str:
    from archive.solve.schema import FLAGS

    flags = dict(FLAGS)
    flags[BEYOND] = "farther from its RTK check point than the qc tolerance"
    items = [("Differences", notes.SIGN_NOTE), ("Horizontal distance",
              "sqrt(dE^2 + dN^2) per station; its mean, median, RMS (root mean square), 95th "
              "percentile and maximum are empirical. " + notes.PERCENTILE_NOTE),
             ("Bias and spread", "Per axis: bias is the mean difference, spread the sample "
              "standard deviation (n - 1 in the denominator)."),
             ("Accuracy measures", notes.ACCURACY_NOTE),
             ("Own R95", "The solver's 95 % horizontal radius of each station, from its own "
              "uncertainty model.")]
    dl = "".join(f"<dt>{escape(k)}</dt><dd>{escape(v)}</dd>" for k, v in items)
    return html.section("definitions", "Definitions", f'<dl class="defs">{dl}</dl>'
                        + "<h3>Review reasons</h3>"
                        + html.table(["reason", "meaning"], sorted(flags.items())))


def _figures(data: RunData, result: QcResult, review: Any, progress: Progress) -> list[str]:
    """The overview map, error vectors and distributions, as HTML figures."""
    pts = result.comparison.points
    col = {c: pts[c].to_numpy(zero_copy_only=False).astype(float) for c in
           ("check_e", "check_n", "de", "dn", "dh", "dist", "pre_de", "pre_dn", "pre_dh",
            "pre_dist")}
    dl = delivered(data.positions)
    arr = {c: dl[c].to_numpy(zero_copy_only=False).astype(float) for c in
           ("line", "point", "easting", "northing", "preplot_e", "preplot_n")}
    flagged = np.zeros(dl.num_rows, dtype=bool)
    if len(review):
        keys = with_occupation(dl.select(
            [c for c in OCC_KEY if c in dl.column_names]).to_pandas())
        marked = keys.merge(review[OCC_KEY].drop_duplicates(), on=OCC_KEY, how="left",
                            indicator=True)
        flagged = (marked["_merge"] == "both").to_numpy()
    crs = data.survey["crs"]
    figs: list[str] = []
    uri, cap = figures.overview(figures.MapData(
        arr["line"], arr["point"], arr["easting"], arr["northing"], arr["preplot_e"],
        arr["preplot_n"], flagged, col["check_e"], col["check_n"], crs))
    figs.append(html.figure(uri, cap, "overview", "map of the spread"))
    progress.advance(1, "overview")
    if pts.num_rows:
        uri, cap, _ = figures.vectors(col["check_e"], col["check_n"], col["de"], col["dn"],
                                      col["pre_de"], col["pre_dn"], crs)
        figs.append(html.figure(uri, cap, "vectors", "error vectors at the check points"))
        progress.advance(1, "vectors")
        uri, cap = figures.distributions(col["dist"], col["pre_dist"], col["dh"], col["pre_dh"],
                                         result.tolerance)
        figs.append(html.figure(uri, cap, "distributions",
                                "histograms and cumulative distributions of the differences"))
        progress.advance(1, "distributions")
    else:
        figs.append('<p class="note">No check point matches a delivered station: no vector or '
                    "distribution figures.</p>")
    return figs


def _verdict(result: QcResult, beyond_n: int, n_waiting: int, records: tuple[int, int]
             ) -> str:
    """The tiles at the top: delivered, checked, accuracy, beyond tolerance, flagged."""
    s = result.comparison.solved.horizontal
    p = result.comparison.preplot.horizontal
    n_final, n_rejected = records
    tiles = [(f"{n_final:,}", "positions to deliver with the edits in force (one per "
              "occupation, or per part of a moved node)"
              + (f"; {n_rejected:,} occupation(s) rejected" if n_rejected else "")),
             (f"{result.n_checked:,}", "with an RTK check point"),
             (f"{html.num(s.mean, '{:.2f}')} m",
              f"mean to check, solved (preplot {html.num(p.mean, '{:.2f}')} m)"),
             (f"{html.num(s.p95, '{:.2f}')} m",
              f"95th percentile, solved (preplot {html.num(p.p95, '{:.2f}')} m)"),
             (f"{beyond_n:,}", f"beyond {result.tolerance:g} m of their check point"),
             (f"{result.n_flagged:,}", "stations flagged by the solver"),
             (f"{n_waiting:,}", "flagged stations still waiting for a decision")]
    return '<div class="verdict">' + "".join(
        f'<div class="tile"><div class="v">{escape(v)}</div><div class="k">{escape(k)}</div></div>'
        for v, k in tiles) + "</div>"


LEGEND = ("<p>Symbols in every figure: fixes used, small grey dots; rejected fixes, small "
          "hollow grey rings; solved position, filled vermillion diamond with its 95 % "
          "ellipse as a thin vermillion line; preplot, thin black plus; RTK check point, "
          "hollow reddish-purple circle; flagged station, large dashed orange ring.</p>")


def _page(data: RunData, result: QcResult, figs: list[str], review: Any, clouds_html: str,
          drawn: int, generated_at: datetime | None) -> str:
    """The whole page: verdict, cautions, lineage, summary, figures, review (open flags,
    then decided ones), definitions."""
    beyond_n = int(review["beyond"].sum()) if len(review) else 0
    waiting = review[review["flags"] != ""][OCC_KEY].drop_duplicates() if len(review) else []
    decided = decided_list(data)
    n_occ = occupation_count(review)
    counted = f"{n_occ:,}" + (f" occupations, {len(review):,} delivered records"
                              if n_occ != len(review) else "")
    cautions = html.section("cautions", "Read this first", "<ul>" + "".join(
        f"<li>{escape(c)}</li>" for c in notes.CAUTIONS) + "</ul>", cls="caution")
    body = "".join([
        _verdict(result, beyond_n, len(waiting), records_with_edits(data)), cautions, _lineage_section(data), _summary_section(result),
        _no_quality_section(data),
        html.section("figures", "Maps and distributions", LEGEND + "".join(figs)),
        html.section("review", f"Stations to review ({counted})",
                     review_table(review, set(range(drawn))) + clouds_html),
        html.section("decided", f"Decided flags ({len(decided):,})",
                     "<p>Flags a person settled: accepted (acknowledged), the station "
                     "rejected, or the solver's position replaced. They no longer wait for "
                     "review.</p>" + decided_table(decided)),
        _definitions(),
    ])
    when = (generated_at or datetime.now(UTC)).strftime("%Y-%m-%d %H:%M UTC")
    sv = data.survey
    title = f"Position report: {sv['name']}"
    subtitle = (f"run {data.run['id'][:12]} · {sv['crs']} {sv['crs_name']} · "
                + (f"client {sv['client']} · " if sv.get("client") else "")
                + (f"{sv['contractor']} · " if sv.get("contractor") else "")
                + "not a certified survey")
    nav = [("cautions", "Cautions"), ("lineage", "Lineage"), ("summary", "Summary"),
           ("figures", "Figures"), ("review", "Review"), ("decided", "Decided"),
           ("definitions", "Definitions")]
    footer = (f"nodekeep {__version__} · generated {when} · read-only view of run "
              f"{data.run['id']}")
    return html.page(title, subtitle, nav, body, footer)


def render_report(data: RunData, result: QcResult, read_cloud: CloudReader | None, *,
                  progress: Progress | None = None, max_clouds: int = MAX_CLOUDS,
                  generated_at: datetime | None = None) -> tuple[str, dict[str, int]]:
    """The report page as text, with counts of figures and clouds drawn.

    ``max_clouds`` limits the cloud plots to the first stations to review; 0 draws all.
    """
    if max_clouds < 0:
        raise UsageError(f"the number of cloud plots cannot be negative ({max_clouds})",
                         hint="give 0 for all, or a positive limit")
    progress = progress or NoProgress()
    review = review_list(data, result)
    max_clouds = max_clouds or len(review)
    progress.start(3 + min(len(review), max_clouds), "figures", "report")
    figs = _figures(data, result, review, progress)
    clouds_html, drawn = cloud_section(review, read_cloud, max_clouds, progress)
    progress.close()
    page = _page(data, result, figs, review, clouds_html, drawn, generated_at)
    n_figures = sum(f.startswith("<figure") for f in figs) + drawn
    return page, {"n_figures": n_figures, "n_clouds": drawn, "n_review": len(review)}


def write_report(arc: Archive, survey_id: int, run_ref: str | None, path: str | Path,
                 progress: Progress | None = None, *, tolerance: float = notes.DEFAULT_TOLERANCE,
                 force: bool = False, max_clouds: int = MAX_CLOUDS,
                 read_cloud: CloudReader | None = None) -> ReportWritten:
    """Write the report of a run (the newest when ``run_ref`` is None) to ``path``.

    Fix clouds come from the solver (:func:`archive.solve.cloud.station_cloud`) unless
    ``read_cloud`` is given: a function (line, point, occupation index) -> cloud table, for callers
    that hold the clouds already (simulations, benchmarks). ``max_clouds`` limits the
    cloud plots (0: one per station to review). Refuses to overwrite an
    existing file unless ``force``. The file is written whole to a temporary name and
    renamed, so a failure never leaves half a report.
    """
    path = Path(path)
    check_target(path, force, "a report is not archived; written again, it shows the run "
                              "with the edits in force then")
    t0 = time.perf_counter()
    data = load_run_data(arc, survey_id, run_ref)
    result = qc_of(data, tolerance)
    reader = read_cloud if read_cloud is not None else cloud_reader(arc, data.run["id"])
    page, counts = render_report(data, result, reader, progress=progress,
                                 max_clouds=max_clouds)
    write_file(path, page.encode("utf-8"))
    return ReportWritten(path=path, size_bytes=path.stat().st_size, n_figures=counts["n_figures"],
                         n_clouds=counts["n_clouds"], n_review=counts["n_review"],
                         run=data.run["id"], seconds=time.perf_counter() - t0)
