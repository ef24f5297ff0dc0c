"""Awaiting harvest against unoccupied, in the solver: a deployment no loaded log of its
node overlaps is held (kind ``awaiting``, no position, no flag, not delivered); one whose
log is loaded but holds no usable fix in its window stays ``unoccupied``."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc
from hypothesis import given, settings
from hypothesis import strategies as st

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.survey.harvest import OPEN, covered


@settings(max_examples=200, deadline=None)
@given(st.lists(st.tuples(st.integers(0, 2), st.integers(0, 100), st.integers(0, 100),
                          st.booleans()), min_size=1, max_size=12),
       st.lists(st.tuples(st.integers(0, 3), st.integers(0, 100), st.integers(0, 100)),
                max_size=12))
def test_covered_is_closed_interval_overlap(deps, logs):
    """Reference: pandas.Interval.overlaps on closed intervals (a log whose last fix is at
    the deployment time covers it), an open end as the end of time."""
    d_node = np.array([f"N{n}" for n, *_ in deps], dtype=object)
    d0 = np.array([min(a, b) for _, a, b, _ in deps], dtype=np.int64)
    d1 = np.array([OPEN if still else max(a, b) for _, a, b, still in deps], dtype=np.int64)
    l_node = np.array([f"N{n}" for n, *_ in logs], dtype=object)
    l0 = np.array([min(a, b) for _, a, b in logs], dtype=np.int64)
    l1 = np.array([max(a, b) for _, a, b in logs], dtype=np.int64)
    got = covered(d_node, d0, d1, l_node, l0, l1)
    for i in range(len(deps)):
        want = any(pd.Interval(int(d0[i]), int(d1[i]), closed="both").overlaps(
            pd.Interval(int(l0[j]), int(l1[j]), closed="both"))
            for j in range(len(logs)) if l_node[j] == d_node[i])
        assert got[i] == want


def test_log_of_unknown_extent_covers_its_node():
    got = covered(np.array(["A", "B"], dtype=object), np.array([10, 10]), np.array([20, 20]),
                  np.array(["A"], dtype=object), np.array([OPEN]), np.array([OPEN]))
    assert got.tolist() == [True, False]


def _with_covered(deployments: pa.Table, flags: list[bool]) -> pa.Table:
    return deployments.append_column("covered", pa.array(flags, pa.bool_()))


def test_awaiting_is_held_and_an_empty_loaded_log_is_unoccupied(small_sim):
    sim = small_sim
    dep = sim.deployments
    nodes = dep["node"].to_pylist()
    wait, dead = nodes[0], nodes[1]
    # the dead node's log is loaded, but every fix in its window is without a position fix
    fixes = sim.fixes
    in_dead = pc.equal(fixes["node"], dead)
    fixes = fixes.set_column(fixes.schema.get_field_index("quality"), "quality",
                             pc.if_else(in_dead, pa.scalar(0, fixes.schema.field("quality")
                                                           .type), fixes["quality"]))
    fixes = fixes.filter(pc.invert(pc.equal(fixes["node"], wait)))
    flags = [n != wait for n in nodes]
    out = solve_fixes(fixes, _with_covered(dep, flags), sim.stations, default_params(),
                      sim.meta["epsg"]).positions
    w = out.filter(pc.equal(out["node"], wait))
    assert w["kind"].to_pylist() == ["awaiting"] * w.num_rows and w.num_rows >= 1
    assert w["flags"].to_pylist() == [""] * w.num_rows
    assert not any(w["delivered"].to_pylist()) and w["easting"].null_count == w.num_rows
    assert w["occupation"].null_count == 0  # which occupation waits is known
    d = out.filter(pc.equal(out["node"], dead))
    assert set(d["kind"].to_pylist()) == {"logged"}
    assert all("unoccupied" in f for f in d["flags"].to_pylist())
    # without the parameter (runs made before it), the waiting one is unoccupied too
    p = default_params()
    del p["window"]["hold_unharvested"]
    old = solve_fixes(fixes, _with_covered(dep, flags), sim.stations, p,
                      sim.meta["epsg"]).positions
    o = old.filter(pc.equal(old["node"], wait))
    assert set(o["kind"].to_pylist()) == {"logged"}
    assert all("unoccupied" in f for f in o["flags"].to_pylist())


@settings(max_examples=200, deadline=None)
@given(st.lists(st.integers(0, 5), max_size=15), st.lists(st.integers(0, 5), max_size=15))
def test_equal_pairs_is_every_pair_of_equal_codes(left, right):
    """Against the pairs written out one by one (a nested loop, in the same order)."""
    from archive.survey.harvest import equal_pairs

    i, j = equal_pairs(np.array(left, dtype=np.int64), np.array(right, dtype=np.int64))
    assert list(zip(i.tolist(), j.tolist(), strict=True)) == [
        (a, b) for a in range(len(left)) for b in range(len(right)) if left[a] == right[b]]
