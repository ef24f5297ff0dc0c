"""The review queue and the flag counts on a generated same-day survey with planted problems.

The planted problems and the nodes' true positions come from the scenario generator
(``problems.json``, ``truth.csv``), the preplot coordinates from the SPS file read by
column, and the reference count of flagged stations from pyarrow's own group-by: none of
them goes through the code under test.
"""

from __future__ import annotations

import csv
import json
import math

import pyarrow as pa
import pyarrow.compute as pc

from archive.qc import qc_run
from archive.review.queue import load_review, review_counts
from archive.solve.occupancy import run_occupations
from archive.solve.run import get_run, solve_survey
from tests.support.cli import invoke


def _preplot(path) -> dict[tuple[float, float], tuple[float, float]]:
    """Preplot easting/northing by (line, point) from the SPS R records: SPS rev 2.1 point
    record, line in columns 2-11, point 12-21, easting 47-55, northing 56-65 (SEG SPS
    format rev 2.1, January 2006; column numbers from memory, checked against the file)."""
    out = {}
    for text in path.read_text().splitlines():
        if text.startswith("R"):
            out[(float(text[1:11]), float(text[11:21]))] = (float(text[46:55]),
                                                             float(text[55:65]))
    return out


def _truth(sc) -> list[dict[str, str]]:
    with open(sc.truth, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _reference_counts(positions: pa.Table) -> tuple[int, dict[str, int]]:
    """Flagged stations counted with pyarrow's group-by over the delivered logged rows:
    one station per (line, point, occupation), flagged when any of its rows is."""
    t = positions.filter(pc.and_(positions["delivered"], pc.equal(positions["kind"], "logged")))
    occ = pc.coalesce(t["occupation"].cast(pa.int64()), t["index"].cast(pa.int64()))
    t = t.append_column("occ", occ)
    per: dict[str, int] = {}
    keys: set[tuple] = set()
    for name in sorted({f for s in t["flags"].to_pylist() for f in s.split(";") if f}):
        hit = t.filter(pc.match_substring(t["flags"], name))
        g = hit.group_by(["line", "point", "occ"]).aggregate([])
        per[name] = g.num_rows
        keys |= set(zip(g["line"].to_pylist(), g["point"].to_pylist(), g["occ"].to_pylist(),
                        strict=True))
    return len(keys), per


def test_solve_qc_and_the_review_count_flagged_stations_alike(same_day, runner) -> None:
    arc, sid, run_id, sc, base = same_day
    run = get_run(arc, sid, run_id)
    positions = run_occupations(arc, run)
    n_ref, per_ref = _reference_counts(positions)
    solved = solve_survey(arc, sid)  # the same inputs: the recorded run, counted again
    qc = qc_run(arc, sid)
    counts = review_counts(arc, sid)
    assert solved.n_flagged == qc.n_flagged == counts["n_flagged"] == n_ref
    assert solved.flag_counts == qc.flag_counts.per_flag == counts["per_flag"] == per_ref
    # the planted move is one station, though its node has a row per part
    moved_rows = positions.filter(pc.match_substring(positions["flags"], "moved")).num_rows
    assert moved_rows == 2 and counts["per_flag"]["moved"] == 1
    # the problems the generator planted on stations (all but the damaged log) are flagged
    planted = {(p["line"], p["point"]) for p in sc.problems if p.get("expect_flags")}
    assert counts["n_flagged"] >= len(planted)
    # and the commands say it in the same words and numbers
    arc_dir = arc.root
    out = invoke(runner, arc_dir, "solve").output
    assert f"flagged {n_ref} of {counts['n_stations']} stations" in out
    out = invoke(runner, arc_dir, "qc").output
    assert f"{n_ref} flagged stations" in out
    res = invoke(runner, arc_dir, "review", "list", "--json")
    assert res.exit_code == 0
    listed = json.loads(res.output)
    assert listed["counts"]["n_flagged"] == n_ref and len(listed["stations"]) == n_ref


def test_the_queue_gives_the_figures_behind_each_flag(same_day) -> None:
    arc, sid, run_id, sc, base = same_day
    review = load_review(arc, sid)
    truth = _truth(sc)
    pre = _preplot(sc.preplot)
    by_kind = {p["kind"]: p for p in sc.problems}
    mv = by_kind["moved"]
    st = review.find((mv["line"], mv["point"], 1))
    assert st is not None and "moved" in st.state.open and st.node == mv["node"]
    parts = sorted((r for r in truth if r["node"] == mv["node"] and r["part"] in ("1", "2")),
                   key=lambda r: r["part"])
    true_move = math.dist(*[(float(r["easting"]), float(r["northing"])) for r in parts])
    # two solved centres of about a metre each (common practice, no source): within 3 m
    assert abs(st.figures["moved"]["move_m"] - true_move) < 3.0
    assert abs(true_move - mv["distance_m"]) < 0.5  # the generator's two records agree
    for p in (p for p in sc.problems if p["kind"] == "swapped"):
        st = review.find((p["line"], p["point"], 1))
        assert st is not None and {"far-from-plan", "nearer-other"} <= set(st.state.open)
        node_at = next(r for r in truth if r["node"] == p["node"])
        e, n = pre[(p["line"], p["point"])]
        to_plan = math.hypot(float(node_at["easting"]) - e, float(node_at["northing"]) - n)
        assert abs(st.figures["far-from-plan"]["to_preplot_m"] - to_plan) < 3.0
    died = by_kind["died"]
    st = review.find((died["line"], died["point"], 1))
    assert st is not None and set(st.flags) & set(died["expect_flags"])
    if "short-span" in st.figures:
        fig = st.figures["short-span"]
        assert 0 < fig["span_h"] < fig["window_h"]
    assert all(s.last is None for s in review.stations)  # nothing decided yet


def test_a_long_reason_is_cut_visibly_in_the_table():
    from datetime import UTC, datetime

    from archive.cli.review import _last

    d = {"kind": "ack-flag", "flag": "moved", "by": "data manager",
         "at": datetime(2025, 4, 8, 6, 30, tzinfo=UTC)}
    short = _last(d | {"reason": "kicked by cattle"})
    assert short.endswith(": kicked by cattle")
    long = _last(d | {"reason": "kicked by cattle during the night; each part holds for its time"})
    assert long.endswith(": kicked by cattle during the night; each…")
    assert len(long.split(": ", 1)[1]) == 40
