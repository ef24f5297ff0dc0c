"""Deciding flagged stations: the evening's decisions on a generated survey, carried by the
report, a later run and every delivery format; 200 decisions in one transaction."""

from __future__ import annotations

import csv
import io
import json

from sqlalchemy import event, func, select

from archive.deliver.deliveries import deliver
from archive.edits.log import list_edits
from archive.qc.report import write_report
from archive.review.bulk import decide
from archive.review.queue import load_review
from archive.solve.run import solve_survey
from archive.store.models import Edit, LedgerEvent
from archive.store.verify import verify_archive
from tests.support.cli import invoke

REASON = "node knocked over by cattle and set up again; both places delivered"


def _count(arc, model, *where) -> int:
    with arc.session() as s:
        return s.scalar(select(func.count()).select_from(model).where(*where))


def _transactions(arc) -> list[int]:
    """A counter of the catalog transactions committed from now on."""
    seen: list[int] = []
    event.listen(arc.engine, "commit", lambda conn: seen.append(1))
    return seen


def test_an_evening_review_travels_to_the_report_a_new_run_and_deliveries(
        fresh_same_day, runner) -> None:
    arc, sid, run_id, sc, base = fresh_same_day
    before = load_review(arc, sid)
    moved = [p for p in sc.problems if p["kind"] == "moved"]
    died = next(p for p in sc.problems if p["kind"] == "died")
    assert moved and all(before.find((p["line"], p["point"], 1)) for p in moved)

    # accept every open 'moved' flag with one command
    res = invoke(runner, arc.root, "review", "decide", "--flag", "moved", "--accept",
                 "--reason", REASON)
    assert res.exit_code == 0, res.output
    assert f"recorded {len(moved)} edit(s) ({len(moved)} ack-flag)" in res.output
    # the rest from a file: reject the node that died, accept both flags of the swapped pair
    rows = [("line", "point", "index", "flag", "decision", "reason"),
            (died["line"], died["point"], 1, "", "reject", "battery died a few hours in")]
    for p in (p for p in sc.problems if p["kind"] == "swapped"):
        rows.append((p["line"], p["point"], "", "", "accept", "serials swapped in the log"))
    path = base / "evening.csv"
    with open(path, "w", newline="", encoding="utf-8") as fh:
        csv.writer(fh).writerows(rows)
    res = invoke(runner, arc.root, "review", "decide", "--csv", str(path), "--json")
    assert res.exit_code == 0, res.output
    made = json.loads(res.output)
    assert made["n_stations"] == len(rows) - 1

    after = load_review(arc, sid)
    waiting = {(s.line, s.point) for s in after.waiting()}
    decided = {(p["line"], p["point"]) for p in [died]
               + [p for p in sc.problems if p["kind"] == "swapped"]}
    assert not waiting & decided  # the queue no longer lists them
    st = after.find((moved[0]["line"], moved[0]["point"], 1))
    # accepting 'moved' leaves any other flag of the moved node open, and only that one
    assert "moved" not in st.state.open and set(st.state.open) == set(st.flags) - {"moved"}
    assert not after.waiting("moved")
    assert st.state.decided["moved"]["reason"] == REASON
    assert st.last["kind"] == "ack-flag" and st.last["by"] and st.last["at"] is not None

    # the report lists them as decided, with actor, time and reason, not under review
    written = write_report(arc, sid, None, base / "report.html", max_clouds=0)
    page = written.path.read_text(encoding="utf-8")
    review_part = page.split('id="review"')[1].split('id="decided"')[0]
    decided_part = page.split('id="decided"')[1].split('id="definitions"')[0]
    assert "cattle" not in review_part and REASON.split(";")[0] in decided_part
    assert "battery died a few hours in" in decided_part and "reject-station" in decided_part
    assert st.last["by"] in decided_part and st.last["at"].strftime("%Y-%m-%d %H:%M") in \
        decided_part

    # a later run (other parameters, the same deployments) keeps the decisions applying
    resolved = solve_survey(arc, sid, {"flags": {"far_from_plan": 25.0}})
    assert resolved.created and resolved.run_id != run_id
    again = load_review(arc, sid)
    assert again.run_id == resolved.run_id
    assert {(s.line, s.point) for s in again.waiting()} == waiting
    assert again.find(st.key).state.decided["moved"]["edit"] == st.state.decided["moved"]["edit"]

    # deliveries carry flags and decisions (flags still open delivered with --allow-flags)
    out = base / "out"
    out.mkdir()
    deliver(arc, sid, None, "csv", out / "r.csv", "processing centre", allow_flags=True)
    with open(out / "r.csv", newline="", encoding="utf-8") as fh:
        table = list(csv.DictReader(fh))
        fh.seek(0)
        header = next(csv.reader(fh))
    known = ["line", "point", "index", "station_index", "node", "deployed", "retrieved",
             "easting", "northing", "height", "height_source", "sigma_e", "sigma_n", "r95",
             "n_used", "n_rejected", "flags", "source", "merged", "lat", "lon", "t_start",
             "t_end", "crs", "vertical_datum", "anchor_event", "anchor_after"]
    assert header[:len(known)] == known  # existing readers keep their columns
    assert header[len(known):] == ["flags_acknowledged", "decision", "decision_edits",
                                   "decided_by", "decided_at", "decision_reason"]
    mv_rows = [r for r in table if (float(r["line"]), float(r["point"]))
               == (moved[0]["line"], moved[0]["point"])]
    assert len(mv_rows) == 2  # each part of the moved node is delivered as its own record
    for r in mv_rows:
        assert r["flags_acknowledged"] == "moved" and r["decision"] == "ack-flag:moved"
        assert "moved" not in r["flags"].split(";")
        assert r["decision_reason"] == REASON and r["decided_by"] == st.last["by"]
        assert r["decided_at"].endswith("Z")
    assert not any((float(r["line"]), float(r["point"])) == (died["line"], died["point"])
                   for r in table)  # rejected: not delivered

    deliver(arc, sid, None, "geojson", out / "r.geojson", "processing centre",
            allow_flags=True)
    doc = json.loads((out / "r.geojson").read_text(encoding="utf-8"))
    props = [f["properties"] for f in doc["features"]
             if (f["properties"]["line"], f["properties"]["point"])
             == (moved[0]["line"], moved[0]["point"])]
    # RFC 7946 §3.2: a Feature's "properties" is any JSON object; ours holds the decision
    assert props and all(p["decision"] == "ack-flag:moved" for p in props)
    assert list(props[0])[:3] == ["line", "point", "index"]

    for fmt, name in (("sps", "r.sps"), ("segp1", "r.p1")):
        deliver(arc, sid, None, fmt, out / name, "processing centre", allow_flags=True)
        head = [t for t in (out / name).read_text(encoding="ascii").splitlines()
                if t.startswith("H")]
        text = " ".join(h[4:].strip() for h in head)
        assert "lineage.json" in text and "decision" in text.lower()
        assert all(len(h) <= 80 for h in head)  # 80-column records (SPS rev 2.1, SEG-P1)
        lineage = json.loads((out / (name + ".lineage.json")).read_text(encoding="utf-8"))
        occ = next(o for s in lineage["occupations"]
                   if (s["line"], s["point"]) == (moved[0]["line"], moved[0]["point"])
                   for o in s["occupations"])
        edits = {e["id"]: e for e in lineage["edits"]}
        assert occ["flags_acknowledged"] == ["moved"]
        assert occ["decisions"] and edits[occ["decisions"][0]]["reason"] == REASON
    assert verify_archive(arc).ok


def test_two_hundred_decisions_in_one_transaction(many_flags_any) -> None:
    arc, sid, positions, base = many_flags_any
    waiting = load_review(arc, sid).waiting("wide-spread")
    assert len(waiting) == 200
    edits0, events0 = _count(arc, Edit), _count(arc, LedgerEvent)
    commits = _transactions(arc)
    res = decide(arc, sid, decision="accept", flag="wide-spread",
                 reason="spread of a node under trees, accepted")
    assert len(commits) == 1  # ONE catalog transaction for all of them
    assert len(res.edits) == 200
    assert _count(arc, Edit) - edits0 == 200
    assert _count(arc, LedgerEvent) - events0 == 200  # one event per decision
    with arc.session() as s:
        payloads = [json.loads(p) for p in s.scalars(
            select(LedgerEvent.payload).where(LedgerEvent.action == "edit.ack-flag"))]
    assert len(payloads) == 200 and all(p["batch"]["size"] == 200 for p in payloads)
    assert load_review(arc, sid).waiting("wide-spread") == []
    written = write_report(arc, sid, None, base / "report.html", max_clouds=1,
                           read_cloud=lambda *a: None)
    page = written.path.read_text(encoding="utf-8")
    decided_part = page.split('id="decided"')[1].split('id="definitions"')[0]
    assert decided_part.count("spread of a node under trees, accepted") == 200
    assert "Decided flags (200)" in page
    assert verify_archive(arc).ok


def test_a_bad_row_names_file_line_and_expectation_and_records_nothing(many_flags,
                                                                       runner) -> None:
    arc, sid, positions, base = many_flags
    st = load_review(arc, sid).waiting()[:2]
    good = f"{st[0].line:g},{st[0].point:g},accept,fine\n"
    cases = {
        # a reason over two physical lines (RFC 4180 §2.6 quoted line break): the bad row
        # after it is on physical line 4
        "multi.csv": ("line,point,decision,reason\n"
                      f'{st[0].line:g},{st[0].point:g},accept,"two\nlines"\n'
                      f"{st[1].line:g},{st[1].point:g},maybe,x\n", 4, "accept or reject"),
        "header.csv": ("line,point,reason\n" + good, 1, "a header row naming"),
        "number.csv": ("line,point,decision,reason\n" + good + "1001,x12,accept,r\n", 3,
                       "a number"),
        "unknown.csv": ("line,point,decision,reason\n" + good + "9999,1,accept,r\n", 3,
                        "a flagged station"),
        "twice.csv": ("line,point,decision,reason\n" + good + good, 3, "one decision"),
        "empty.csv": ("line,point,decision,reason\n" + good.replace("fine", ""), 2,
                      "why, in the reason column"),
        "flag.csv": ("line,point,flag,decision,reason\n"
                     f"{st[0].line:g},{st[0].point:g},moved,accept,r\n", 2, "open flags"),
    }
    edits0 = _count(arc, Edit)
    for name, (text, line, expected) in cases.items():
        path = base / name
        path.write_text(text, encoding="utf-8")
        res = invoke(runner, arc.root, "review", "decide", "--csv", str(path))
        assert res.exit_code != 0, name
        msg = res.stderr if hasattr(res, "stderr") else res.output
        assert f"{path}:{line}:" in msg and expected in msg, (name, msg)
    assert _count(arc, Edit) == edits0  # all or nothing: nothing recorded


def test_the_single_edit_path_still_supersedes_and_lists(many_flags) -> None:
    from archive.review.acknowledge import ack_flag

    arc, sid, positions, base = many_flags
    st = load_review(arc, sid).waiting()[0]
    first = ack_flag(arc, sid, st.line, st.point, st.index, flag="wide-spread", reason="a")
    second = ack_flag(arc, sid, st.line, st.point, st.index, flag="wide-spread", reason="b")
    assert second.supersedes == first.id
    live = list_edits(arc, sid)
    assert [e["id"] for e in live] == [second.id]
    assert load_review(arc, sid).find(st.key).last["reason"] == "b"


def test_csv_of_decisions_never_crashes_on_garbage(many_flags) -> None:
    """Every file either gives decisions or an InputError naming the file (hypothesis)."""
    from hypothesis import HealthCheck, given, settings
    from hypothesis import strategies as hs

    from archive.errors import InputError
    from archive.review.bulk import read_decisions

    arc, sid, positions, base = many_flags
    review = load_review(arc, sid)
    st = review.waiting()[0]
    cell = hs.one_of(hs.text(max_size=8), hs.sampled_from(
        [f"{st.line:g}", f"{st.point:g}", "accept", "reject", "wide-spread", "1", ""]))
    row = hs.lists(cell, min_size=0, max_size=6)

    @settings(max_examples=150, deadline=None,
              suppress_health_check=[HealthCheck.function_scoped_fixture])
    @given(header=hs.sampled_from(["line,point,decision,reason",
                                   "line,point,index,flag,decision,reason", "x,y"]),
           rows=hs.lists(row, max_size=5))
    def check(header: str, rows: list[list[str]]) -> None:
        buf = io.StringIO()
        csv.writer(buf).writerows(rows)
        path = base / "garbage.csv"
        path.write_text(header + "\n" + buf.getvalue(), encoding="utf-8")
        try:
            planned = read_decisions(path, review)
        except InputError as exc:
            assert str(path) in str(exc)
        else:
            assert planned and all(p.decision in ("accept", "reject") for p in planned)

    check()


def test_segp1_says_where_the_review_is_without_losing_a_header_that_fitted() -> None:
    """SEG-P1 has 20 header records (SEG, "Recommended standards for the exchange of
    positional data", Geophysics 1983; the count of 20 from memory, as the writer states it):
    the review pointer takes a record of its own where
    one is free, else joins the 'Produced' record, so no CRS that fitted before is refused."""
    import pytest

    from archive.deliver.segp1 import header_records
    from archive.errors import Refused
    from archive.store.ledger import Anchor
    from tests.support.delivery_tables import context

    prec = {"easting": 1, "northing": 1, "height": 1}
    # 32614 UTM 14N (Transverse Mercator), 2277 NAD83 / Texas Central (ftUS) (Lambert 2SP,
    # long parameters), 2193 NZGD2000 / New Zealand Transverse Mercator 2000
    for epsg, own in ((32614, True), (2277, False), (2193, False)):
        recs = header_records(context(crs_epsg=epsg, anchor=Anchor(12, "c" * 64)), prec)
        assert len(recs) == 20 and all(len(r) == 80 for r in recs)
        pointer = [r for r in recs if ".lineage.json" in r]
        assert len(pointer) == 1
        assert pointer[0][4:].startswith("Flags, decisions:" if own else "Produced:")
    # 6473 (Kentucky Single Zone ftUS) needed 21 records before the pointer: still refused
    with pytest.raises(Refused):
        header_records(context(crs_epsg=6473, anchor=Anchor(12, "c" * 64)), prec)


def test_a_batch_that_names_one_flag_twice_keeps_the_later_in_force(many_flags) -> None:
    from archive.edits.log import EditSpec, record_edits

    arc, sid, positions, base = many_flags
    st = load_review(arc, sid).waiting()[0]
    specs = [EditSpec("ack-flag", st.line, st.point, st.index, {"flag": "wide-spread"}, r)
             for r in ("first look", "second look")]
    first, second = record_edits(arc, sid, specs)
    assert first.supersedes is None and second.supersedes == first.id
    assert [e["id"] for e in list_edits(arc, sid)] == [second.id]
    with arc.session() as s:
        seqs = list(s.scalars(select(LedgerEvent.seq).order_by(LedgerEvent.seq)))
    assert seqs == list(range(1, len(seqs) + 1))  # one chain, no gap
    assert verify_archive(arc).ok
