"""Custody bundles: what a delivery rests on, as an archive that stands on its own.

The bundle is packed into a tar, unpacked into a fresh folder and the source archive removed
before it is questioned: it must verify, answer ``where``, ``trace`` and ``show`` as the
source did for that delivery, reproduce the run bit for bit, and prove the held file.
"""

from __future__ import annotations

import json
import shutil
import sqlite3
import tarfile
from pathlib import Path

import pytest
from click.testing import CliRunner

from archive.cli.main import cli
from archive.errors import UsageError
from archive.lineage.bundle import make_bundle, what_deliveries_rest_on
from archive.store.archive import Archive
from archive.store.models import Delivery
from archive.store.verify import verify_archive
from tests.support.delivered import Delivered


def _json(root: Path, *args: str) -> dict:
    r = CliRunner().invoke(cli, ["-A", str(root), *args, "--json"])
    assert r.exit_code == 0, (args, r.output)
    return json.loads(r.stdout)


@pytest.fixture(scope="module")
def unpacked(delivered_survey_archive: Delivered, tmp_path_factory) -> dict:
    """The SPS delivery's bundle, made from a copy of the archive, packed, unpacked in a new
    folder, and the copy removed; with the copy's answers taken before."""
    d = delivered_survey_archive
    base = tmp_path_factory.mktemp("bundle")
    source = base / "source"
    shutil.copytree(d.root, source)
    line, point, _index = (f"{v:g}" for v in d.station)
    with Archive.open(source) as arc, arc.session() as s:
        when = s.get(Delivery, d.sps.delivery_id).created_at.isoformat()
    before = {
        "where": _json(source, "where", line, point, "--as-of", when),
        "trace_file": _json(source, "trace", "--file", d.sps.path),
        "trace": _json(source, "trace", line, point),
        "show": _json(source, "show", line, point, "--run", d.run_id),
    }
    r = CliRunner().invoke(cli, ["-A", str(source), "bundle", "--delivery",
                                 str(d.sps.delivery_id), "--to", str(base / "made"),
                                 "--tar", str(base / "made.tar"), "--json"])
    assert r.exit_code == 0, r.output
    made = json.loads(r.stdout)
    shutil.rmtree(source)
    shutil.rmtree(base / "made")
    fresh = base / "fresh"
    fresh.mkdir()
    with tarfile.open(base / "made.tar") as tf:
        tf.extractall(fresh, filter="data")
    return {"root": fresh / "made", "made": made, "before": before, "line": line,
            "point": point, "when": when}


def test_the_bundle_verifies_on_its_own(unpacked, delivered_survey_archive: Delivered):
    root, made = unpacked["root"], unpacked["made"]
    assert made["verify_ok"] and made["deliveries"] == [delivered_survey_archive.sps.delivery_id]
    v = _json(root, "verify")
    assert v["ok"] and v["dangling"] == [] and v["objects_checked"] == made["objects"]
    # the source's whole chain is there: events the bundle does not need carried as their
    # payload digest, declared by the closing event, and nothing else missing
    assert v["events_checked"] == made["source_head"]["seq"] + 1
    assert v["events_reduced"] == made["events_reduced"] > 0
    history = _json(root, "history", "-n", "0")
    assert history[0]["action"] == "bundle.made"
    assert history[1]["hash"] == made["source_head"]["hash"]
    assert sum(e["payload"] is None for e in history) == made["events_reduced"]
    # the held delivered file is proved against the bundle's chain
    check = _json(root, "verify", "--delivery", delivered_survey_archive.sps.path)
    assert check["ok"] and check["anchor"]["anchor"] == delivered_survey_archive.sps.anchor
    # a delivery the bundle does not hold: its event is there only as a digest
    r = CliRunner().invoke(cli, ["-A", str(root), "verify", "--delivery",
                                 delivered_survey_archive.csv.path])
    assert r.exit_code == 3 and "PROBLEM anchor-mismatch" in r.stdout
    assert "custody bundle that carries the anchored event as its digest only" in r.stdout


def test_the_bundle_answers_as_the_source_did(unpacked, delivered_survey_archive):
    root, before = unpacked["root"], unpacked["before"]
    d = delivered_survey_archive
    line, point = unpacked["line"], unpacked["point"]
    assert _json(root, "where", line, point, "--as-of", unpacked["when"]) == before["where"]
    assert _json(root, "trace", "--file", d.sps.path) == before["trace_file"]
    assert _json(root, "show", line, point, "--run", d.run_id) == before["show"]
    t, src = _json(root, "trace", line, point), before["trace"]
    assert t["run"] == src["run"] and t["edits"] == src["edits"]
    for o, so in zip(t["occupations"], src["occupations"], strict=True):
        for key in ("solution", "fixes", "fixes_by_part", "raw_files", "edits"):
            assert o[key] == so[key]
        # the source also delivered the CSV; the bundle holds the SPS delivery only
        assert o["deliveries"] == [x for x in so["deliveries"]
                                   if x["id"] == d.sps.delivery_id]
    assert [e["id"] for e in t["edits"]] == [1, 2, 3]  # 2 superseded by 3, still shown


def test_the_bundle_reproduces_its_run(unpacked, delivered_survey_archive):
    r = _json(unpacked["root"], "reproduce", delivered_survey_archive.run_id)
    assert r["identical"] is True


def test_exactly_what_the_delivery_rests_on(delivered_survey_archive: Delivered):
    d = delivered_survey_archive
    with Archive.open(d.root, read_only=True) as arc:  # bundling only reads
        sel, runs = what_deliveries_rest_on(arc, [d.sps.delivery_id])
        lineage = json.loads(Path(d.sps.lineage_path).read_text(encoding="utf-8"))
        assert runs == [d.run_id]
        assert sel.rows["deliveries"] == {str(d.sps.delivery_id)}
        assert sel.rows["runs"] == {d.run_id}
        assert len(sel.rows["raw_files"]) == len(lineage["raw_files"])
        assert {r["hash"] for r in lineage["raw_files"]} <= sel.objects
        assert {r["fixes"] for r in lineage["raw_files"]} <= sel.objects
        assert {d.sps.file_hash, d.sps.manifest_hash, d.sps.final_hash} <= sel.objects
        assert d.csv.file_hash not in sel.objects  # the other delivery stays out
        kinds = {k for k, h in lineage["inputs"].items() if k != "fixes" and h}
        assert len(sel.rows["input_versions"]) == len(kinds)
        with pytest.raises(UsageError, match="no delivery 99"):
            what_deliveries_rest_on(arc, [99])


def test_a_payload_removed_from_a_whole_event_is_named(unpacked, tmp_path):
    root = tmp_path / "b"
    shutil.copytree(unpacked["root"], root)
    db = sqlite3.connect(root / "catalog.sqlite")
    seq = db.execute("SELECT seq FROM ledger_events WHERE action = 'archive.init'").fetchone()[0]
    db.execute("UPDATE ledger_events SET payload = NULL WHERE seq = ?", (seq,))
    db.commit()
    db.close()
    with Archive.open(root) as arc:
        report = verify_archive(arc)
    assert [(p.kind, p.subject) for p in report.problems] == [
        ("broken-chain", f"ledger event {seq} (archive.init)")]


def test_refusals(delivered_survey_archive: Delivered, tmp_path):
    d = delivered_survey_archive
    (tmp_path / "full").mkdir()
    (tmp_path / "full" / "x").write_text("x")
    with Archive.open(d.root, read_only=True) as arc:
        with pytest.raises(UsageError, match="not an empty folder"):
            make_bundle(arc, [d.sps.delivery_id], tmp_path / "full")
        with pytest.raises(UsageError, match="at least one delivery"):
            make_bundle(arc, [], tmp_path / "none")
    r = CliRunner().invoke(cli, ["-A", str(d.root), "bundle", "--delivery", "42", "--to",
                                 str(tmp_path / "b")])
    assert r.exit_code == 2 and "no delivery 42" in r.stderr


def test_several_deliveries_in_one_bundle(delivered_survey_archive: Delivered, tmp_path):
    d = delivered_survey_archive
    r = CliRunner().invoke(cli, ["-A", str(d.root), "bundle", "--delivery", str(d.sps.delivery_id),
                                 "--delivery", str(d.csv.delivery_id), "--to",
                                 str(tmp_path / "both")])
    assert r.exit_code == 0, r.output
    assert "bundle of deliveries 1, 2" in r.stdout and "verified: archive OK" in r.stdout
    for held in (d.sps, d.csv):
        assert _json(tmp_path / "both", "verify", "--delivery", held.path)["ok"]
