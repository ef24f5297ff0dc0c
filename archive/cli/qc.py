"""``nodekeep qc`` and ``nodekeep report``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from archive.cli.options import (
    CliState,
    force_option,
    output_options,
    pass_state,
    run_option,
    survey_option,
)
from archive.cli.output import Bar, emit, table
from archive.qc.notes import DEFAULT_TOLERANCE

tolerance_option = click.option(
    "--tolerance", type=float, default=DEFAULT_TOLERANCE, show_default=True, metavar="M",
    help="List stations farther than M metres from their check point.")



def _m(v: Any, fmt: str = "{:.3f}") -> str:
    return "-" if v is None else fmt.format(v)


def _pct(v: Any) -> str:
    return "-" if v is None else f"{100 * v:.0f} %"


def qc_text(d: dict[str, Any]) -> str:
    """The readable form of a qc result (``QcResult.as_dict()``)."""
    from archive.qc.check import summary_rows

    fc = d.get("flag_counts") or {}
    stations = f" ({fc['n_stations']} stations)" if fc.get("n_stations") is not None else ""
    head = (f"run {d['run'][:12]} of {d['survey']} ({d['crs']}): {d['n_delivered']} delivered "
            f"records{stations}, {d['n_flagged']} flagged stations; {d['n_check_points']} "
            f"check points, {d['n_checked']} matched")
    rows = [(label, _pct(a) if unit == "fraction" else _m(a),
             _pct(b) if unit == "fraction" else _m(b))
            for label, a, b, unit in summary_rows(d)]
    out = [head, "", table(rows, ["against the check points (m)", "solved", "preplot"])]
    if d["within_own_r95"] is not None:
        out.append(f"check points inside the solver's own 95 % radius: "
                   f"{_pct(d['within_own_r95'])} (about 95 % expected if the check points marked "
                   "the node itself)")
    beyond = d["beyond_tolerance"]
    out += ["", f"{len(beyond)} station(s) beyond {d['tolerance_m']:g} m:" if beyond
            else f"no station beyond {d['tolerance_m']:g} m"]
    if beyond:
        out.append(table([(f"{r['line']:g}", f"{r['point']:g}", r["index"], r["node"],
                           _m(r["de"], "{:+.2f}"), _m(r["dn"], "{:+.2f}"), _m(r["dist"], "{:.2f}"),
                           r["flags"]) for r in beyond[:200]],
                         ["line", "point", "idx", "node", "dE", "dN", "dist (m)", "flags"]))
        if len(beyond) > 200:
            out.append(f"... and {len(beyond) - 200} more (use --json for all)")
    out += [""] + [f"note: {n}" for n in d["notes"]]
    return "\n".join(out)


@click.command()
@survey_option
@run_option
@tolerance_option
@output_options
@pass_state
def qc(state: CliState, survey_name: str | None, run_ref: str | None, tolerance: float) -> None:
    """Compare a run's positions, and the preplot, with the RTK check points."""
    from archive.qc import qc_run

    result = qc_run(state.archive(), state.survey_id(survey_name), run_ref, tolerance)
    data = result.as_dict()
    emit(state, data, lambda: qc_text(data))


@click.command()
@survey_option
@run_option
@tolerance_option
@click.option("--to", "to", required=True, type=click.Path(dir_okay=False, path_type=Path),
              metavar="FILE", help="Where to write the HTML report.")
@click.option("--max-clouds", "max_clouds", type=click.IntRange(min=0), default=40,
              show_default=True, metavar="N",
              help="Draw the fix cloud of at most N stations to review (0: all of them).")
@force_option
@output_options
@pass_state
def report(state: CliState, survey_name: str | None, run_ref: str | None, tolerance: float,
           to: Path, max_clouds: int, force: bool) -> None:
    """Write a self-contained HTML report of a run: lineage, figures, flagged stations."""
    from archive.qc.report import write_report

    written = write_report(state.archive(), state.survey_id(survey_name), run_ref, to,
                           tolerance=tolerance, force=force, max_clouds=max_clouds,
                           progress=Bar(state))
    data = written.as_dict()
    emit(state, data, f"wrote {data['path']} ({data['size_bytes'] / 1e6:.1f} MB, "
                      f"{data['n_figures']} figures, {data['n_clouds']} station clouds) "
                      f"for run {data['run'][:12]} in {data['seconds']:.1f} s")
