"""``nodekeep review list`` and ``nodekeep review decide``: the evening review."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import click

from archive.cli.options import CliState, output_options, pass_state, run_option, survey_option
from archive.cli.output import emit, table


def _when(v: Any) -> str:
    return v.strftime("%Y-%m-%d %H:%M") if v is not None else ""


def _last(d: dict[str, Any] | None) -> str:
    if not d:
        return ""
    what = d["kind"] + (f" {d['flag']}" if d.get("flag") else "")
    reason = d["reason"] if len(d["reason"]) <= 40 else d["reason"][:39] + "…"
    return f"{what}, {d['by']} {_when(d['at'])}: {reason}"


def queue_text(data: dict[str, Any], stations: list[Any], show_all: bool) -> str:
    """The readable queue: counts (in stations), then one row per station."""
    from archive.review.queue import figures_text

    c = data["counts"]
    head = (f"run {data['run'][:12]}: {c['n_waiting']} of {c['n_flagged']} flagged stations "
            f"wait for review, {c['n_decided']} decided ({c['n_stations']} stations; a station "
            "is one occupation of a node)")
    if not stations:
        return head + "\nnothing to review" + ("" if show_all else
                                               " ('--all' lists the decided ones too)")
    rows = [(f"{s.line:g}", f"{s.point:g}", s.index, s.node,
             ", ".join(s.state.open) or "-",
             ", ".join(sorted(s.state.decided)) or "-",
             figures_text(s), _last(s.last)) for s in stations]
    out = [head, "", table(rows, ["line", "point", "idx", "node", "open flags", "decided",
                                  "figures", "last decision"])]
    out.append("\nnext: nodekeep review decide --flag NAME --accept --reason TEXT, or "
               "--csv FILE (columns line,point,index,flag,decision,reason)")
    return "\n".join(out)


@click.group()
def review() -> None:
    """The evening review: stations whose review flags wait for a decision."""


@review.command("list")
@click.option("--all", "show_all", is_flag=True,
              help="Also the flagged stations already decided, with their decisions.")
@click.option("--flag", default=None, metavar="NAME",
              help="Only stations with this open flag.")
@run_option
@survey_option
@output_options
@pass_state
def list_(state: CliState, show_all: bool, flag: str | None, run_ref: str | None,
          survey_name: str | None) -> None:
    """List the stations of a run (the newest by default) waiting for review: node, open
    flags, the figures behind them and the last decision made on each."""
    from archive.errors import UsageError
    from archive.review.queue import load_review
    from archive.solve.schema import FLAGS

    if flag is not None and flag not in FLAGS:
        raise UsageError(f"unknown flag {flag!r}", hint=f"flags are: {', '.join(FLAGS)}")
    rv = load_review(state.archive(), state.survey_id(survey_name), run_ref)
    stations = [s for s in rv.stations if flag is None or flag in s.flags] if show_all \
        else rv.waiting(flag)
    data = {"run": rv.run_id, "counts": rv.counts, "stations": [s.as_dict() for s in stations]}
    emit(state, data, lambda: queue_text(data, stations, show_all))


@review.command("decide")
@click.option("--csv", "csv_path", type=click.Path(dir_okay=False, path_type=Path),
              default=None, metavar="FILE",
              help="Decisions, one per row: line,point,decision,reason and optional "
                   "index,flag (header row required).")
@click.option("--accept", "decision", flag_value="accept", default=None,
              help="Accept the open flags of every station the filter selects.")
@click.option("--reject", "decision", flag_value="reject",
              help="Reject (do not deliver) every station the filter selects.")
@click.option("--flag", default=None, metavar="NAME",
              help="Filter: stations with this open flag (--accept then acknowledges it only).")
@click.option("--reason", default=None, metavar="TEXT",
              help="Why (with --accept/--reject; kept with every edit for good).")
@click.option("--dry-run", is_flag=True, help="Check and list the decisions, record nothing.")
@run_option
@survey_option
@output_options
@pass_state
def decide(state: CliState, csv_path: Path | None, decision: str | None, flag: str | None,
           reason: str | None, dry_run: bool, run_ref: str | None,
           survey_name: str | None) -> None:
    """Decide many stations at once, from a CSV file or a filter: all or nothing, in one
    transaction, one edit and ledger event per accepted flag or rejected station."""
    from archive.review.bulk import decide as run

    arc = state.archive(write=not dry_run)
    res = run(arc, state.survey_id(survey_name), run_ref=run_ref, csv_path=csv_path,
              decision=decision, flag=flag, reason=reason, dry_run=dry_run)
    data = res.as_dict()
    kinds: dict[str, int] = {}
    for e in res.edits:
        kinds[e["kind"]] = kinds.get(e["kind"], 0) + 1
    what = ", ".join(f"{v} {k}" for k, v in sorted(kinds.items()))
    verb = "would record" if dry_run else "recorded"
    emit(state, data, f"{verb} {len(res.edits)} edit(s) ({what}) on {res.n_stations} "
                      f"station(s) of run {res.run_id[:12]} from {res.source}"
                      + ("" if dry_run else " in one transaction"))
