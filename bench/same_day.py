"""End to end on generated same-day surveys: NMEA logs, ingest, solve, against the truth.

    python -m bench.same_day [--seeds 6] [--first-seed 500] [--interval 30,1]

Each seed generates the invented Kestrel Flats 3D scenario at size ``same-day`` (36
stations on 3 lines, 9-hour deployments, one node moved 15-40 m part way through its stay,
stations laid out again, a swapped pair of serials, a node that died early, a damaged log)
logged every ``--interval`` seconds, loads it as a crew would (preplot, deployment log,
elevation model, every NMEA log) into a fresh archive and solves it with the default
parameters in a child process that reports its peak memory. Against ``truth.csv``:

- **coverage**: the share of delivered records inside their own stated r95 (stations with
  a planted problem left out, except the parts of the moved node, each against where it
  stood);
- **moves**: planted moves found, and false ``moved`` on the other stations;
- **parts**: distance of each part of the moved node to its true place, and how far the
  later part's start is from the move;
- **short-span** on stations without a planted problem, and the solve's peak memory
  (``ru_maxrss`` of the child) per fix.
"""

from __future__ import annotations

import argparse
import csv
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np

SOLVE = """
import json, resource, sys
from archive.store.archive import Archive
from archive.solve.run import solve_survey
arc = Archive.open(sys.argv[1])
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
res = solve_survey(arc, 1)
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({"run": res.run_id, "fixes": res.summary.get("n_fixes", 0),
                  "before_kb": before, "peak_kb": peak}))
"""


def _csv(path: Path) -> list[dict[str, str]]:
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _load(root: Path, seed: int, interval: float):
    """Generate and load one scenario; returns (archive path, scenario)."""
    from archive.seeds.scenario import generate

    from archive.ingest.load import load_fix_files
    from archive.store.archive import Archive
    from archive.survey.inputs import load_input
    from archive.survey.surveys import create_survey

    sc = generate(root / "scenario", seed=seed, size="same-day", interval=interval)
    with Archive.init(root / "archive", actor="bench") as arc:
        sid = create_survey(arc, sc.survey_name, f"EPSG:{sc.epsg}",
                            vertical_datum=sc.vertical_datum, client=sc.client,
                            contractor=sc.contractor).id
        load_input(arc, sid, "stations", sc.preplot)
        load_input(arc, sid, "deployments", sc.deployments)
        load_input(arc, sid, "dem", sc.dem, vertical_datum=sc.vertical_datum)
        load_fix_files(arc, sid, [sc.out_dir / "logs"])
    return root / "archive", sc


def one(seed: int, interval: float) -> dict:
    """Figures of one generated survey (see module doc)."""
    from archive.solve.occupancy import run_occupations
    from archive.solve.run import get_run
    from archive.store.archive import Archive

    with tempfile.TemporaryDirectory() as tmp:
        path, sc = _load(Path(tmp), seed, interval)
        out = subprocess.run([sys.executable, "-c", SOLVE, str(path)], capture_output=True,
                             text=True, check=True)
        solved = json.loads(out.stdout.strip().splitlines()[-1])
        with Archive.open(path) as arc:
            pos = run_occupations(arc, get_run(arc, 1, solved["run"])).to_pylist()
        truth = {(float(r["line"]), float(r["point"]), int(r["occupation"]), int(r["part"])): r
                 for r in _csv(sc.truth)}
    planted = {(p["line"], p["point"]): p for p in sc.problems if p["kind"] != "damaged-log"}
    moved = next(p for p in sc.problems if p["kind"] == "moved")
    f = {"inside": 0, "n": 0, "found": 0, "false": 0, "normal": 0, "short": 0, "parts": [],
         "parts_inside": 0,
         "split_s": None, "fixes": solved["fixes"],
         "peak_mb": solved["peak_kb"] / 1024, "base_mb": solved["before_kb"] / 1024}
    for r in pos:
        if not r["delivered"] or r["kind"] != "logged":
            continue
        st = (r["line"], r["point"])
        flags = (r["flags"] or "").split(";")
        is_moved = st == (moved["line"], moved["point"])
        if st in planted and not is_moved:
            continue
        if is_moved:
            f["found"] = max(f["found"], int("moved" in flags))
        elif r["part"] != 2:  # one count per occupation (a false move delivers two parts)
            f["normal"] += 1
            f["false"] += "moved" in flags
            f["short"] += "short-span" in flags
        t = truth.get((r["line"], r["point"], r["occupation"], r["part"]))
        if t is None:  # a missed move: the whole stay against no one place
            continue
        err = float(np.hypot(r["easting"] - float(t["easting"]),
                             r["northing"] - float(t["northing"])))
        f["n"] += 1
        f["inside"] += err <= r["r95"]
        if is_moved:
            f["parts"].append(err)
            f["parts_inside"] += err <= r["r95"]
            if r["part"] == 2:
                start = np.datetime64(t["start_utc"].rstrip("Z"))
                held = np.datetime64(r["held_from"].replace(tzinfo=None))
                f["split_s"] = float(abs(held - start) / np.timedelta64(1, "s"))
    return f


def main(argv: list[str] | None = None) -> None:
    """Run the seeds at each interval and print the figures."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", type=int, default=6)
    ap.add_argument("--first-seed", type=int, default=500)
    ap.add_argument("--interval", default="30,1")
    args = ap.parse_args(argv)
    for interval in (float(x) for x in args.interval.split(",")):
        rows = [one(seed, interval) for seed in range(args.first_seed,
                                                       args.first_seed + args.seeds)]
        for seed, r in zip(range(args.first_seed, args.first_seed + args.seeds), rows,
                           strict=True):
            parts = ", ".join(f"{x:.2f}" for x in r["parts"]) or "-"
            print(f"{interval:4g} s seed {seed}: coverage {r['inside']}/{r['n']}, move "
                  f"{'found' if r['found'] else 'MISSED'} (parts {parts} m from truth, split "
                  f"{r['split_s'] if r['split_s'] is not None else '-'} s from the move), "
                  f"false moved {r['false']}/{r['normal']}, short-span {r['short']}, "
                  f"{r['fixes']:,} fixes, solve peak {r['peak_mb']:.0f} MB "
                  f"({(r['peak_mb'] - r['base_mb']) * 1e6 / max(r['fixes'], 1):.0f} B/fix "
                  "above the process before solving)", flush=True)
        n = sum(r["n"] for r in rows)
        inside = sum(r["inside"] for r in rows)
        parts = [x for r in rows for x in r["parts"]]
        print(f"{interval:4g} s pooled: coverage {inside / max(n, 1):.1%} of {n}, moves found "
              f"{sum(r['found'] for r in rows)} of {len(rows)}, false moved "
              f"{sum(r['false'] for r in rows)} of {sum(r['normal'] for r in rows)}, parts "
              f"within 1.5 m {sum(x <= 1.5 for x in parts)} of {len(parts)}, inside their r95 "
              f"{sum(r['parts_inside'] for r in rows)} (largest "
              f"{max(parts, default=float('nan')):.2f} m), short-span "
              f"{sum(r['short'] for r in rows)} of {sum(r['normal'] for r in rows)}")


if __name__ == "__main__":
    main()
