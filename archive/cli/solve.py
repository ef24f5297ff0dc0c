"""``nodekeep params``, ``nodekeep solve``, ``nodekeep runs`` and ``nodekeep show``."""

from __future__ import annotations

from typing import Any

import click

from archive.cli.options import (
    CliState,
    occupation_options,
    output_options,
    pass_state,
    run_option,
    survey_option,
)
from archive.cli.output import Bar, emit, table
from archive.survey.keys import station_text


def _survey_id(state: CliState, name: str | None) -> int:
    arc = state.archive()
    with arc.session() as s:
        return arc.survey(s, name).id


def _stations(text: str | None) -> list[tuple[float, float]] | None:
    from archive.errors import UsageError

    if not text:
        return None
    out = []
    for item in text.split(","):
        parts = item.strip().split(":")
        try:
            if len(parts) != 2:
                raise ValueError
            out.append((float(parts[0]), float(parts[1])))
        except ValueError:
            raise UsageError(f"--stations: {item.strip()!r} is not LINE:POINT",
                             hint="e.g. --stations 1001:2001,1001:2002") from None
    return out


@click.command()
@output_options
@pass_state
def params(state: CliState) -> None:
    """Print the solver parameters and their defaults as a commented TOML file."""
    from archive.solve.params import default_params, params_toml

    emit(state, default_params(), params_toml().rstrip("\n"))


def _flags_text(counts: dict[str, int]) -> str:
    from archive.solve.schema import FLAGS

    if not counts:
        return "  no flags"
    return "\n".join(f"  {k:<16} {counts[k]:>5}  {FLAGS.get(k, '')}" for k in counts)


def solve_text(head: str, run_id: str, n_positions: int, summary: dict[str, Any],
               n_flagged: int, flag_counts: dict[str, int]) -> str:
    """The readable result of a solve: positions, what was reused and what awaits harvest,
    then flags counted per station."""
    n_st = summary.get("n_stations")
    of = f" of {n_st}" if n_st is not None else ""
    unlogged = summary.get("n_unlogged") or 0
    extra = (f"\n  {'unlogged':<16} {unlogged:>5}  stationary cluster(s) with no logged "
             "deployment, counted apart: no station (check the deployment log)"
             if unlogged else "")
    reuse = summary.get("reuse") or {}
    reused = (f"  nodes solved {reuse['nodes_solved']}, reused from earlier runs "
              f"{reuse['nodes_reused']} (their inputs unchanged)\n"
              if reuse.get("nodes_reused") else "")
    waiting = (f"  awaiting harvest {summary['n_awaiting']} deployment(s): no log of their "
               "node loaded yet (held back from deliveries)\n"
               if summary.get("n_awaiting") else "")
    return (f"{head} {run_id}\n"
            f"  positions {n_positions} ({summary.get('n_delivered', '?')} to deliver)\n"
            f"{reused}{waiting}"
            f"  flagged {n_flagged}{of} stations (a station is one occupation of a node; "
            f"each flag below counts stations too)\n{_flags_text(flag_counts)}{extra}\n"
            f"next: nodekeep review list, nodekeep show LINE POINT, nodekeep qc")


@click.command()
@click.option("--params", "params_file", type=click.Path(dir_okay=False), default=None,
              metavar="FILE.toml", help="Parameters overriding the defaults ('nodekeep params').")
@click.option("--label", default="", help="A note kept with the run.")
@click.option("--stations", default=None, metavar="LINE:POINT,...",
              help="Solve only these stations of the deployment log (an unknown one is "
                   "refused, nothing recorded).")
@click.option("--nodes", default=None, metavar="SERIAL,...", help="Solve only these nodes of the deployment log (an unknown serial is "
                   "refused, nothing recorded).")
@click.option("--scheduler", default=None, metavar="tcp://HOST:PORT", envvar="NODEKEEP_SCHEDULER",
              help="Solve node partitions on this Dask scheduler (default: $NODEKEEP_SCHEDULER). "
                   "Workers must reach the object store (S3, or a shared folder).")
@click.option("--workers", type=click.IntRange(1, 1024), default=None,
              help="Solve node partitions on a local Dask cluster of N processes.")
@click.option("--from-scratch", is_flag=True,
              help="Solve every node, reusing nothing of earlier runs (the run is the same "
                   "bit for bit; this only costs time).")
@survey_option
@output_options
@pass_state
def solve(state: CliState, params_file: str | None, label: str, stations: str | None,
          nodes: str | None, scheduler: str | None, workers: int | None,
          from_scratch: bool, survey_name: str | None) -> None:
    """Solve one position per deployment and record the run."""
    from archive.solve.params import load_params
    from archive.solve.run import solve_survey

    overrides = load_params(params_file) if params_file else None
    sid = _survey_id(state, survey_name)
    node_list = [n.strip() for n in nodes.split(",") if n.strip()] if nodes else None
    res = solve_survey(state.archive(write=True), sid, overrides, label=label,
                       stations=_stations(stations), nodes=node_list, progress=Bar(state),
                       scheduler=scheduler, workers=workers, incremental=not from_scratch)
    d = res.as_dict()

    head = "solved run" if res.created else "same inputs and parameters as run"
    emit(state, d, lambda: solve_text(head, res.run_id, res.n_positions, res.summary,
                                      res.n_flagged, res.flag_counts))


@click.command()
@survey_option
@output_options
@pass_state
def runs(state: CliState, survey_name: str | None) -> None:
    """List the solution runs of the survey, oldest first."""
    from archive.solve.run import list_runs

    rows = list_runs(state.archive(), _survey_id(state, survey_name))
    emit(state, rows, lambda: table(
        [(r["id"][:12], r["created_at"].strftime("%Y-%m-%d %H:%M:%SZ"), r["created_by"],
          r["estimator"], r["n_positions"], r["n_flagged"], r["label"]) for r in rows],
        ["run", "created (UTC)", "by", "estimator", "positions", "flagged", "label"])
        if rows else "no runs yet (solve with 'nodekeep solve')")


def _fmt(v: Any, digits: int = 2) -> str:
    if v is None:
        return "-"
    if isinstance(v, float):
        return f"{v:.{digits}f}"
    return str(v)


def _no_quality_text(r: dict[str, Any], setting: str) -> str:
    """How many used fixes had no quality information (runs before the count: unknown)."""
    n = r.get("n_no_quality")
    count = "not counted in this run" if n is None else f"{n} of the used fixes"
    return f"  no quality {count} (RMC/GLL only; screen.no_quality = {setting})"


def _show_text(run_id: str, rows: list[dict[str, Any]], n_occupations: int,
               no_quality: str = "accept") -> str:
    out = [f"run {run_id}"]
    if n_occupations > 1:
        out.append(f"{n_occupations} occupations (one delivered record each, under its own "
                   "point index); choose one with --index N or --node SERIAL")
    for r in rows:
        if r["kind"] == "awaiting":
            out.append(f"station {station_text(r['line'], r['point'])} occupation index "
                       f"{r['occupation']}  node {r['node']}  awaiting harvest: no log of "
                       "the node loaded yet covers its deployment (held back from deliveries)")
            continue
        occ = (f"occupation index {r['occupation']} (preplot index {r['index']})"
               if r["occupation"] is not None else f"preplot index {r['index']}")
        held = (f"  deployed   {r['deployed']} .. "
                f"{r['retrieved'] if r['retrieved'] is not None else 'still deployed'}"
                if r["deployed"] is not None else "")
        margins = ("  (no usable fix in the settled window: solved from the settle-margin "
                   "fixes, uncertainty widened)" if r["from_margins"] else "")
        delivered = ""
        if r["delivered"]:
            k = r.get("point_index")
            delivered = (f"  (delivered as index {k}, holds {r.get('held_from')} .. "
                         f"{r.get('held_to') or 'open'})"
                         if k is not None and r.get("part") in (1, 2) else "  (delivered)")
        dof = (f"; expanded for {_fmt(r['dof'], 0)} degrees of freedom"
               if r.get("dof") is not None else "")
        out += [
            f"station {station_text(r['line'], r['point'])} {occ}  node {r['node']}  "
            f"{r['kind']} part {r['part']}{delivered}",
            *([held] if held else []),
            *([f"  solved in  run {r['solved_by'][:12]} (this node's inputs unchanged since; "
               "its rows reused)"] if r.get("solved_by", run_id) != run_id else []),
            f"  window     {r['t_start']} .. {r['t_end']}{margins}",
            f"  position   E {_fmt(r['easting'], 3)}  N {_fmt(r['northing'], 3)}  "
            f"lat {_fmt(r['lat'], 8)}  lon {_fmt(r['lon'], 8)}",
            f"  height     {_fmt(r['height'], 2)} ({r['height_source']})  GNSS "
            f"{_fmt(r['h_gnss'])}  model {_fmt(r['h_model'])}  dh {_fmt(r['dh'])}  "
            f"sigma {_fmt(r['sigma_h'])}",
            f"  sigma      E {_fmt(r['sigma_e'], 3)}  N {_fmt(r['sigma_n'], 3)}  corr "
            f"{_fmt(r['corr_en'])}  95% ellipse {_fmt(r['ell_major'])} x {_fmt(r['ell_minor'])}"
            f" m at {_fmt(r['ell_bearing'], 0)} deg  r95 {_fmt(r['r95'])} m{dof}",
            f"  fixes      {r['n_used']} used, {r['n_rejected']} not used of {r['n_total']}; "
            f"n_eff {_fmt(r['n_eff'], 0)}; span {_fmt((r['span_s'] or 0) / 3600, 1)} h; "
            f"spread {_fmt(r['spread'])} m ({r['estimator']})",
            _no_quality_text(r, no_quality),
            f"  preplot    {_fmt(r['dist_preplot'])} m away; nearest other station "
            f"{_fmt(r['nearest_line'], 0)}/{_fmt(r['nearest_point'], 0)} at "
            f"{_fmt(r['dist_nearest'])} m",
            f"  flags      {r['flags'] or 'none'}",
        ]
    return "\n".join(out)


@click.command()
@click.argument("line", type=float)
@click.argument("point", type=float)
@occupation_options
@run_option
@survey_option
@output_options
@pass_state
def show(state: CliState, line: float, point: float, index: int | None, node: str | None,
         run_ref: str | None, survey_name: str | None) -> None:
    """Show the solution of station LINE POINT in a run (the newest by default): every
    occupation, or the one --index / --node choose."""
    from archive.solve.run import station_solution

    res = station_solution(state.archive(), _survey_id(state, survey_name), line, point,
                           index, run_ref, node=node)
    emit(state, res, lambda: _show_text(res["run"], res["rows"], res["n_occupations"],
                                        res["no_quality"]))
