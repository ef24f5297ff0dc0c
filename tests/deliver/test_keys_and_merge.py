"""Unique delivery keys in every writer, merging indistinguishable occupations, file modes."""

from __future__ import annotations

import json
import os
import stat
from datetime import timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from archive.deliver.csvfile import write_csv
from archive.deliver.gis import write_geojson, write_gpkg
from archive.deliver.merge import merge_occupations
from archive.deliver.segp1 import write_segp1
from archive.deliver.sps import write_sps
from archive.errors import Refused
from archive.solve.uncertainty import radius95
from tests.support.delivery_tables import context, final_table


def _with(table: pa.Table, name: str, values) -> pa.Table:
    i = table.schema.get_field_index(name)
    return table.set_column(i, table.schema.field(name), pa.array(values, table.schema.field(name).type))


@pytest.mark.parametrize("write", [write_sps, write_segp1, write_csv, write_geojson, write_gpkg])
def test_every_writer_refuses_a_repeated_key(write):
    t = final_table(6)
    point = t["point"].to_numpy().copy()
    point[1] = point[0]  # 1001/2001 index 1 twice, with two positions
    t = _with(t, "point", point)
    with pytest.raises(Refused, match=r"1 key\(s\) \(line, point, index\) appear more than once: "
                                      r"station 1001/2001 index 1 \(2 records\)"):
        write(t, context())
    # the same two records under their own point indices are fine
    index = t["index"].to_numpy().copy()
    index[1] = 2
    assert write(_with(t, "index", index), context())


def _final_rows(rows: list[dict]) -> pa.Table:
    from archive.deliver.final import FINAL_SCHEMA

    base = {"station_index": 1, "height_source": "model", "lat": None, "lon": None,
            "n_used": 1000, "n_rejected": 10, "t_start": None, "t_end": None, "flags": "",
            "flags_acknowledged": "", "source": "solver", "merged": "", "retrieved": None,
            "deployed": None, "corr_en": 0.0, "r95": None, "height": 400.0}
    return pa.Table.from_pylist([base | r for r in rows], schema=FINAL_SCHEMA)


def test_merge_is_the_generalised_least_squares_of_the_occupations():
    import statsmodels.api as sm

    rows = [
        {"line": 1001.0, "point": 2001.0, "index": 1, "node": "N1", "easting": 612345.20,
         "northing": 3512345.10, "sigma_e": 0.40, "sigma_n": 0.55, "corr_en": 0.3},
        {"line": 1001.0, "point": 2001.0, "index": 2, "node": "N2", "easting": 612345.65,
         "northing": 3512344.80, "sigma_e": 0.60, "sigma_n": 0.35, "corr_en": -0.2},
    ]
    out, decisions = merge_occupations(_final_rows(rows), 1.0)
    assert decisions[0]["merged"] and out.num_rows == 1
    m = out.to_pylist()[0]
    # Reference: statsmodels GLS of one 2-D point observed twice, with the two occupations'
    # covariances as a block-diagonal error covariance (Aitken's generalised least squares).
    y = np.array([rows[0]["easting"], rows[0]["northing"], rows[1]["easting"],
                  rows[1]["northing"]])
    x = np.array([[1, 0], [0, 1], [1, 0], [0, 1]], dtype=float)
    sigma = np.zeros((4, 4))
    for k, r in enumerate(rows):
        c = r["corr_en"] * r["sigma_e"] * r["sigma_n"]
        sigma[2 * k:2 * k + 2, 2 * k:2 * k + 2] = [[r["sigma_e"] ** 2, c], [c, r["sigma_n"] ** 2]]
    fit = sm.GLS(y, x, sigma=sigma).fit()
    cov = fit.normalized_cov_params  # (X' S^-1 X)^-1: the known-covariance GLS variance
    # same solution to floating-point rounding of coordinates near 3.5e6 m (a few nm)
    assert (m["easting"], m["northing"]) == pytest.approx(tuple(fit.params), abs=1e-7)
    assert m["sigma_e"] == pytest.approx(np.sqrt(cov[0, 0]), rel=1e-12)
    assert m["sigma_n"] == pytest.approx(np.sqrt(cov[1, 1]), rel=1e-12)
    assert m["r95"] == pytest.approx(float(radius95(np.array([cov[0, 0]]), np.array([cov[1, 1]]),
                                                    np.array([cov[0, 1]]))[0]), rel=1e-12)
    assert (m["index"], m["node"], m["merged"], m["source"]) == (1, "N1+N2", "1;2",
                                                                 "solver;merged")
    assert m["n_used"] == 2000


def test_twelve_occupations_of_one_spot_merge_and_two_preplot_stations_never_do():
    rng = np.random.default_rng(12)
    rows = [{"line": 1001.0, "point": 2001.0, "index": k, "node": "N1",
             "easting": 612345.0 + rng.normal(0, 0.5), "northing": 3512345.0 + rng.normal(0, 0.5),
             "sigma_e": 0.5, "sigma_n": 0.5} for k in range(1, 13)]
    out, d = merge_occupations(_final_rows(rows), 1.0)
    assert d[0]["merged"] and out.num_rows == 1 and d[0]["test"]["dof"] == 22
    assert out["node"].to_pylist() == ["N1"]  # one node re-laid twelve times: named once
    # two planned positions of one point (preplot indices 1 and 2) stay two positions
    two = [dict(rows[0], station_index=1), dict(rows[1], index=2, station_index=2)]
    out, d = merge_occupations(_final_rows(two), 1.0)
    assert out.num_rows == 2 and d == []


def test_occupations_apart_or_edited_are_kept_apart():
    far = [{"line": 1001.0, "point": 2001.0, "index": k, "node": f"N{k}",
            "easting": 612345.0 + 3.0 * k, "northing": 3512345.0, "sigma_e": 0.3,
            "sigma_n": 0.3} for k in (1, 2)]
    out, d = merge_occupations(_final_rows(far), 1.0)
    assert out.num_rows == 2 and not d[0]["merged"]
    # 3 m apart with 0.3 m sigmas: chi-square 50 on 2 degrees of freedom, far beyond 5.99
    assert d[0]["test"]["statistic"] == pytest.approx(9.0 / 0.18, rel=1e-9)
    assert d[0]["test"]["limit"] == pytest.approx(5.991464547107979)  # chi2(2) 95 % (scipy)
    assert "indices 1 and 2 are 3.00 m apart" in d[0]["reason"]
    edited = [dict(r, easting=612345.0) for r in far]
    edited[1]["source"] = "edit:7"
    out, d = merge_occupations(_final_rows(edited), 1.0)
    assert out.num_rows == 2 and d[0]["reason"] == "index 2 was changed by an edit (edit:7)"


def test_merge_end_to_end_on_a_survey_relaid_at_the_same_spot(tmp_path, runner):
    from tests.support.cli import invoke
    from tests.support.scenarios import scenario_archive

    # re-laid within 0.2 m of the first spot: the occupations cannot be told apart
    arc, _, _, sc = scenario_archive(tmp_path, seed=5, control=False, dem=True, reoccupy=2,
                                     relay_offset=(0.0, 0.2))
    arc.close()
    out = tmp_path / "merged.csv"
    r = invoke(runner, tmp_path / "archive", "deliver", "--format", "csv", "--to", str(out),
               "--recipient", "Harrow Basin Energy", "--allow-flags", "--merge-occupations")
    assert r.exit_code == 0, r.stderr
    # the two stations re-laid at the same spot merge; the node moved 15-40 m part way
    # through its stay is two records that stay apart
    assert ("occupations merged at 2 of 3 station(s) with more than one record (occupied "
            "again, or a node that moved)") in r.output
    moved = next(p for p in sc.problems if p["kind"] == "moved")
    assert f"{moved['line']:g}/{moved['point']:g} kept apart: the occupations differ" in r.output
    lineage = json.loads(Path(str(out) + ".lineage.json").read_text())
    assert lineage["delivery"]["merge_occupations"] is True
    merged = [m for m in lineage["merges"] if m["merged"]]
    assert len(merged) == 2 and all(m["test"]["inside"] for m in merged)
    import csv as _csv

    rows = list(_csv.DictReader(out.read_text().splitlines()))
    again = {(float(x["line"]), float(x["point"])): x["occupations"] for x in sc.reoccupied}
    for x in rows:
        n = again.get((float(x["line"]), float(x["point"])))
        if n:
            assert x["index"] == "1" and x["merged"] == ";".join(str(k) for k in range(1, n + 1))
            nodes = x["node"].split("+")  # each node named once (one may be re-laid)
            assert len(nodes) == len(set(nodes)) <= n and x["height_source"] == "model"
    n_log = len(sc.deployments.read_text().splitlines()) - 1
    assert len(rows) == n_log + 1 - sum(n - 1 for n in again.values())  # + the moved part
    # where --at on a merged record answers only inside one of the merged windows
    from archive.lineage.where import where
    from archive.store.archive import Archive

    (line, point), _ = next(iter(again.items()))
    log = sorted((x for x in _csv.DictReader(sc.deployments.read_text().splitlines())
                  if (float(x["line"]), float(x["point"])) == (line, point)),
                 key=lambda x: x["deployed_utc"])
    gap = log[0]["retrieved_utc"].replace("Z", "+00:00")
    from datetime import datetime, timedelta

    t_gap = datetime.fromisoformat(gap) + timedelta(minutes=5)
    t_in = datetime.fromisoformat(log[1]["deployed_utc"].replace("Z", "+00:00")) + \
        timedelta(hours=2)
    with Archive.open(tmp_path / "archive") as arc:
        assert where(arc, 1, line, point, at=t_gap)["delivered"] is None
        assert where(arc, 1, line, point, at=t_in)["delivered"]["merged"].startswith("1;2")
        w = where(arc, 1, line, point, index=2)
        assert w["delivered"]["index"] == 1
        assert "index 2 was delivered merged into index 1" in w["notes"][0]


@pytest.mark.parametrize("mask,mode", [(0o022, 0o644), (0o027, 0o640)])
def test_delivered_files_get_the_users_umask(survey_arc, tmp_path, mask, mode):
    from archive.deliver.deliveries import deliver
    from tests.support.builders import delivery_archive

    sid, *_ = delivery_archive(survey_arc, tmp_path)
    old = os.umask(mask)
    try:
        deliver(survey_arc, sid, None, "csv", tmp_path / "r.csv", "processing centre")
    finally:
        os.umask(old)
    for p in (tmp_path / "r.csv", tmp_path / "r.csv.lineage.json"):
        assert stat.S_IMODE(p.stat().st_mode) == mode
    assert timedelta(0) == timedelta(0)
