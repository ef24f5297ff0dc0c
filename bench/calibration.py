"""Calibration of the solver on simulated truth: coverage of the stated r95, moves found,
false moves, where each part of a moved node lands, and the short-span rate.

    python -m bench.calibration [--seeds 8] [--first-seed 1000] [--stations 36] [--cases ...]

Each case is a survey simulated by :func:`archive.seeds.simulate.simulate` (one node per
station, ``--stations`` stations, two nodes moved 8-15 m part way through their stay) with
one of the two receiver error models of ``archive.seeds`` (``demo``: the demo scenario's
:class:`~archive.seeds.gnss_errors.ErrorModel`; ``heavy``: the solver tests'
``SOLVER_TEST_MODEL``), a deployment length (hours, drawn per node in a range) and a
logging interval. Every seed is a new survey; none is a seed the tests use. Each survey is
solved with the default parameters (``--floor`` changes ``uncertainty.floor``), alone (its
own run), and compared with its truth:

- **coverage**: the share of positions lying inside their own stated r95 (normal stations
  and each part of a moved node, against where it stood), pooled over the seeds; the
  target is 93-97 %;
- **moves**: planted moves found (the node's rows flagged ``moved``), and false ``moved``
  flags on the normal stations (target: at most 2 %);
- **parts**: the largest distance of a delivered part to its true place (target 1.5 m)
  and the largest error of the split time;
- **short-span**: the share of normal stations carrying ``short-span``.

Prints one line per case and a pooled line per family of cases (short deployments, 1 s
logging, long deployments). ``--quick`` runs two seeds of the short cases only.
"""

from __future__ import annotations

import argparse
import time
from dataclasses import dataclass, field

import numpy as np
from archive.seeds.gnss_errors import ErrorModel
from archive.seeds.simulate import SOLVER_TEST_MODEL, SimConfig, simulate

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params

MODELS = {"demo": ErrorModel(), "heavy": SOLVER_TEST_MODEL}
# name -> (hours range, logging interval s, family)
CASES = {
    "6-12h@30s": ((6.0, 12.0), 30.0, "short"),
    "6-12h@10s": ((6.0, 12.0), 10.0, "short"),
    "6-12h@1s": ((6.0, 12.0), 1.0, "1 s"),
    "24h@30s": ((24.0, 24.0), 30.0, "long"),
    "3d@30s": ((72.0, 72.0), 30.0, "long"),
    "5d@30s": ((120.0, 120.0), 30.0, "long"),
}


@dataclass
class Tally:
    """Counts of one case (or a pool of cases) over its seeds."""

    inside: int = 0
    positions: int = 0
    moved: int = 0
    found: int = 0
    normal: int = 0
    false: int = 0
    short: int = 0
    part_err: list[float] = field(default_factory=list)
    part_inside: int = 0
    split_err: list[float] = field(default_factory=list)
    errors: list[float] = field(default_factory=list)
    r95: list[float] = field(default_factory=list)

    def add(self, other: Tally) -> None:
        for k, v in other.__dict__.items():
            setattr(self, k, getattr(self, k) + v)

    def line(self) -> str:
        cov = self.inside / max(self.positions, 1)
        worst = max(self.part_err, default=float("nan"))
        split = max(self.split_err, default=float("nan"))
        return (f"coverage {cov:6.1%} of {self.positions:4d} | moves found {self.found:2d}/"
                f"{self.moved:<2d} | false moved {self.false:2d}/{self.normal:<4d} "
                f"({self.false / max(self.normal, 1):.1%}) | parts within 1.5 m "
                f"{sum(x <= 1.5 for x in self.part_err)}/{len(self.part_err)} (inside r95 "
                f"{self.part_inside}), <= {worst:4.2f} m, split "
                f"<= {split:6.0f} s | short-span {self.short / max(self.normal, 1):5.1%} | "
                f"median error {np.median(self.errors):.2f} m, r95 {np.median(self.r95):.2f} m")


def one_survey(model: str, hours: tuple[float, float], interval: float, seed: int,
               stations: int, floor: float | None = None) -> Tally:
    """Simulate, solve (``floor``: another ``uncertainty.floor``) and compare one survey."""
    n_lines = max(1, stations // 12)
    sim = simulate(SimConfig(n_lines=n_lines, n_points=stations // n_lines, hours=hours,
                             interval=interval, model=MODELS[model], n_moves=2, n_swaps=0,
                             n_unlogged=0, camp_hours=1.0, seed=seed))
    params = default_params()
    if floor is not None:
        params["uncertainty"]["floor"] = floor
    out = solve_fixes(sim.fixes, sim.deployments, sim.stations, params, sim.meta["epsg"])
    pos = out.positions.to_pydict()
    t = sim.truth
    at = {n: i for i, n in enumerate(t["node"])}
    tally = Tally()
    flagged: dict[str, bool] = {}
    for k in range(len(pos["node"])):
        if pos["kind"][k] != "logged" or not pos["delivered"][k]:
            continue
        i = at[pos["node"][k]]
        moved_flag = "moved" in pos["flags"][k].split(";")
        flagged[pos["node"][k]] = flagged.get(pos["node"][k], False) or moved_flag
        first = t["moved"][i] and pos["part"][k] == 1
        te, tn = (t["e_first"][i], t["n_first"][i]) if first else (t["e"][i], t["n"][i])
        if t["moved"][i] and pos["part"][k] == 0:
            continue  # a missed move: counted below, its position is of no one place
        err = float(np.hypot(pos["easting"][k] - te, pos["northing"][k] - tn))
        tally.positions += 1
        tally.inside += err <= pos["r95"][k]
        tally.errors.append(err)
        tally.r95.append(pos["r95"][k])
        if t["moved"][i]:
            tally.part_err.append(err)
            tally.part_inside += err <= pos["r95"][k]
            if pos["part"][k] == 2:
                split = pos["held_from"][k].timestamp()
                tally.split_err.append(abs(split - t["move_t"][i]))
        else:
            tally.short += "short-span" in pos["flags"][k].split(";")
    for node, hit in flagged.items():
        if t["moved"][at[node]]:
            tally.moved += 1
            tally.found += hit
        else:
            tally.normal += 1
            tally.false += hit
    return tally


def main(argv: list[str] | None = None) -> None:
    """Run the cases over the seeds and print the figures."""
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--seeds", type=int, default=8)
    ap.add_argument("--first-seed", type=int, default=1000)
    ap.add_argument("--stations", type=int, default=36)
    ap.add_argument("--cases", default=",".join(CASES))
    ap.add_argument("--models", default=",".join(MODELS))
    ap.add_argument("--quick", action="store_true")
    ap.add_argument("--floor", type=float, default=None,
                    help="uncertainty.floor to solve with (default: the parameter's default)")
    args = ap.parse_args(argv)
    cases = args.cases.split(",")
    seeds = range(args.first_seed, args.first_seed + (2 if args.quick else args.seeds))
    if args.quick:
        cases = [c for c in cases if CASES[c][2] != "long"]
    pools: dict[str, Tally] = {}
    for model in args.models.split(","):
        for case in cases:
            hours, interval, family = CASES[case]
            total = Tally()
            t0 = time.perf_counter()
            for seed in seeds:
                total.add(one_survey(model, hours, interval, seed, args.stations,
                                     args.floor))
            print(f"{model:5s} {case:10s} {total.line()}  [{time.perf_counter() - t0:.0f} s]",
                  flush=True)
            pools.setdefault(family, Tally()).add(total)
    for family, total in pools.items():
        print(f"pooled {family:9s} {total.line()}")


if __name__ == "__main__":
    main()
