"""``nodekeep demo``: the whole job on the invented Kestrel Flats 3D survey."""

from __future__ import annotations

import click

from archive.cli.options import CliState, output_options, pass_state
from archive.cli.output import Bar, emit


def _m(v: float | None) -> str:
    return "-" if v is None else f"{v:.2f} m"


def summary_text(d: dict) -> str:
    """The short readable summary of a demo run (from ``DemoSummary.as_dict()``)."""
    cp, tr = d["check_points"], d["truth"]
    caught = sum(p["flagged"] for p in d["problems"])
    lines = [
        f"{d['survey']} (invented demo survey, seed {d['seed']}, size {d['size']})",
        f"  scenario   {d['scenario_dir']}  ({d['n_stations']} stations, {d['n_logs']} node "
        f"logs, {d['n_fixes']:,} fixes, {d['n_rejected_lines']} lines rejected)",
        f"  archive    {d['archive_dir']}",
        f"  run        {d['run_id'][:12]}  ({d['n_delivered']} records delivered: one per "
        f"occupation, one per part of a moved node; {d['n_flagged']} stations flagged)",
        f"  occupied   {d['n_reoccupied']} stations more than once ({d['n_occupations']} "
        f"occupations of {d['n_stations']} stations, each delivered under its own point "
        "index)",
        f"  report     {d['report']}",
    ]
    lines += [f"  delivery   {p}  ({fmt})" for fmt, p in d["deliveries"].items()]
    lines += [
        "",
        "Horizontal difference (median / 95th percentile / max):",
        f"  to RTK check points  {_m(cp['median'])} / {_m(cp['p95'])} / {_m(cp['max'])}"
        f"  ({cp['n']} points; the sensor can sit up to ~1 m from the node)",
        f"  to the truth         {_m(tr['median'])} / {_m(tr['p95'])} / {_m(tr['max'])}"
        f"  ({tr['n']} occupations; {tr['excluded_planted']} stations with planted problems "
        "left out)",
        f"  re-occupied only     {_m(tr['reoccupied']['median'])} / "
        f"{_m(tr['reoccupied']['p95'])} / {_m(tr['reoccupied']['max'])}"
        f"  ({tr['reoccupied']['n']} occupations of {tr['reoccupied']['stations']} stations "
        "occupied more than once)",
        "",
        f"Planted problems flagged: {caught} of {len(d['problems'])}",
    ]
    for p in d["problems"]:
        mark = "flagged " if p["flagged"] else "MISSED  "
        found = ", ".join(p["found"]) or "nothing"
        lines.append(f"  {mark} {p['kind']:<12} {p['line']:.0f}/{p['point']:.0f} node "
                     f"{p['node']}: {found}")
    if d["unexpected_flags"]:
        extra = ", ".join(f"{k} ({v})" for k, v in d["unexpected_flags"].items())
        lines.append(f"  other flags on stations without a planted problem: {extra}")
    lines += [
        "",
        "Delivered with review flags allowed (demo only: a real delivery waits until each "
        "flag is acknowledged or fixed).",
        f"Archive verify: {'ok' if d['verify_ok'] else 'PROBLEMS: ' + '; '.join(d['verify_problems'])}",
        f"Total run time: {d['seconds'].get('total', 0):.0f} s",
        "Not a certified or legal survey; safety setbacks follow local regulations and a "
        "licensed surveyor.",
    ]
    return "\n".join(lines)


def failure_line(d: dict) -> str | None:
    """Why a demo run failed (verify problems, planted problems not flagged), or None."""
    missed = [p for p in d["problems"] if not p["flagged"]]
    why = []
    if not d["verify_ok"]:
        why.append(f"archive verify found {len(d['verify_problems'])} problem(s)")
    if missed:
        why.append(f"{len(missed)} planted problem(s) not flagged: "
                   + ", ".join(f"{p['kind']} {p['line']:.0f}/{p['point']:.0f}" for p in missed))
    return "demo FAILED: " + "; ".join(why) if why else None


@click.command()
@click.argument("directory", default="demo-out", type=click.Path(file_okay=False))
@click.option("--seed", default=7, show_default=True, type=int,
              help="Seed of the invented scenario (same seed, same files).")
@click.option("--size", type=click.Choice(["demo", "small", "same-day"]), default="demo",
              show_default=True,
              help="demo: 240 stations, 3-day deployments at 30 s; small: 30 stations at "
                   "60 s; same-day: 36 stations, 9-hour deployments at 30 s.")
@click.option("--interval", type=click.FloatRange(min=0.1), default=None,
              help="Log every node at this interval, seconds, instead of the size's (1, say).")
@output_options
@pass_state
def demo(state: CliState, directory: str, seed: int, size: str,
         interval: float | None) -> None:
    """Run the whole job on an invented survey, in DIRECTORY (default demo-out).

    Generates the Kestrel Flats 3D scenario, archives and solves it, writes the QC
    report, delivers SPS and SEG-P1 files, verifies the archive and prints how close the
    positions are to the check points and to the truth, and which planted problems were
    flagged. Exits 3 when verify fails or a planted problem is not flagged.
    """
    from archive.demo import run_demo

    bar = Bar(state)
    try:
        result = run_demo(directory, seed=seed, size=size, progress=bar, interval=interval)
    finally:
        bar.close()
    data = result.as_dict()
    emit(state, data, lambda: summary_text(data))
    failed = failure_line(data)
    if failed:
        click.echo(f"error: {failed}", err=True)
        raise click.exceptions.Exit(3)
