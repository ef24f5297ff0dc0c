"""An archive written before occupations were numbered still reproduces, traces and delivers.

``saved/rev0001-run`` (see its README) holds a run of manifest format 1 and two deliveries
whose files repeat the key 1001/5002 index 1 for two occupations of that station.
"""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import pytest

from archive.deliver.deliveries import deliver
from archive.lineage.check import check_delivery
from archive.lineage.reproduce import reproduce
from archive.lineage.trace import trace_file, trace_station
from archive.lineage.where import where
from archive.store import migrate
from archive.store.archive import Archive
from archive.store.verify import verify_archive
from tests.support.cli import invoke
from tests.support.delivery_tables import read_sps_r

SAVED = Path(__file__).parent / "saved" / "rev0001-run"
RUN = "29fef7454d464f37ddef675f66ba5ae613dcdccc95540c81e752ea92b682e61a"
# the same survey solved and delivered by nodekeep 0.2.0 (manifest format 2, occupations)
SAVED_V2 = Path(__file__).parent / "saved" / "rev0001-occupations"
RUN_V2 = "dcbad3903fac9d84e3448fd0af6ec2e15522520703a924ae4a04f013c296c961"


@pytest.fixture
def old(tmp_path):
    root = tmp_path / "archive"
    shutil.copytree(SAVED, root)
    arc = Archive.open(root, check_schema=False)
    migrate.upgrade(arc.engine)
    yield arc, root
    arc.close()


def test_its_run_reproduces_bit_for_bit(old):
    arc, _ = old
    r = reproduce(arc, RUN[:10])
    assert r["identical"] is True and r["code_version_differs"] is True
    assert verify_archive(arc).ok


def test_its_deliveries_still_check_and_trace(old):
    arc, root = old
    for name in ("receivers.csv", "receivers.sps"):
        c = check_delivery(arc, root / "delivered" / name)
        assert c.ok, [str(p) for p in c.problems]
        t = trace_file(arc, root / "delivered" / name)
        assert t["run"]["id"] == RUN and len(t["raw_files"]) == 4
    # the old files hold 1001/5002 index 1 twice; read through the run, each record is
    # tied to its own occupation (node 310002 first, 310004 re-laid)
    w = where(arc, 1, 1001, 5002)
    assert [(o["index"], o["node"]) for o in w["occupations"]] == [(1, "310002"), (2, "310004")]
    assert all(h["legacy"] for o in w["occupations"] for h in o["history"])
    t = trace_station(arc, 1, 1001, 5002)
    assert [(o["index"], [d["id"] for d in o["deliveries"]]) for o in t["occupations"]] == [
        (1, [1, 2]), (2, [1, 2])]


def test_a_new_delivery_of_the_old_run_numbers_the_occupations(old, runner):
    arc, root = old
    res = deliver(arc, 1, RUN, "sps", root / "again.sps", "Harrow Basin Energy",
                  allow_flags=True)
    recs = read_sps_r((root / "again.sps").read_text())
    keys = [(r["line"], r["point"], r["index"]) for r in recs]
    assert keys == [(1001.0, 5001.0, 1), (1001.0, 5002.0, 1), (1001.0, 5002.0, 2),
                    (1001.0, 5003.0, 1)]
    assert res.n_records == 4 and res.n_stations == 3
    lineage = json.loads((root / "again.sps.lineage.json").read_text())
    st = next(s for s in lineage["occupations"] if s["point"] == 5002.0)
    assert [(o["index"], o["node"]) for o in st["occupations"]] == [(1, "310002"), (2, "310004")]
    r = invoke(runner, root, "edit", "reject", "1001", "5002", "--reason", "x")
    assert r.exit_code == 2 and "index 1: node 310002" in r.stderr


def test_a_run_with_occupations_saved_by_an_earlier_version_reproduces(tmp_path):
    root = tmp_path / "v2"
    shutil.copytree(SAVED_V2, root)
    with Archive.open(root, check_schema=False) as arc:
        migrate.upgrade(arc.engine)
        r = reproduce(arc, RUN_V2[:10])
        assert r["identical"] is True
        for name in ("receivers.csv", "receivers.sps"):
            c = check_delivery(arc, root / "delivered" / name)
            assert c.ok, [str(p) for p in c.problems]
        keys = [(x["line"], x["point"], x["index"])
                for x in read_sps_r((root / "delivered" / "receivers.sps").read_text())]
        assert (1001.0, 5002.0, 2) in keys and len(set(keys)) == 4
        assert verify_archive(arc).ok


def test_a_bundle_of_an_archive_written_before_payload_digests(tmp_path):
    """Events hashed over their payload text (scheme 1) cannot be reduced to a digest: the
    bundle carries them whole, and the rows they recorded that it leaves out (the other
    delivery) are declared left out, so the bundle still verifies, proves the held file and
    reproduces the run."""
    from archive.lineage.bundle import make_bundle

    root = tmp_path / "v2"
    shutil.copytree(SAVED_V2, root)
    with Archive.open(root, check_schema=False) as arc:
        migrate.upgrade(arc.engine)
    with Archive.open(root, read_only=True) as arc:
        held = root / "delivered" / "receivers.csv"
        delivery_id = json.loads((root / "delivered" / "receivers.csv.lineage.json")
                                 .read_text(encoding="utf-8"))["delivery"]["id"]
        res = make_bundle(arc, [delivery_id], tmp_path / "bundle")
    assert res.subset.rows_left_out == 1 and res.subset.events_reduced == 0
    with Archive.open(tmp_path / "bundle") as b:
        report = verify_archive(b)
        assert report.ok and report.rows_left_out == 1
        assert check_delivery(b, held).ok
        assert reproduce(b, RUN_V2[:10])["identical"] is True
