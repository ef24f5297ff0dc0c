"""Fixes without quality information (RMC/GLL-only epochs): screened or weighted by their
cloud, counted per station, flagged when they dominate; runs made before all this keep
their positions bit for bit."""

from __future__ import annotations

import copy

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pytest

from archive.errors import UsageError
from archive.solve.engine import solve_fixes
from archive.solve.flags import flag_strings
from archive.solve.params import default_params, resolve_params
from archive.solve.schema import POSITION_SCHEMA
from archive.solve.screen import SCREEN_REASONS, cloud_hdop, screen_codes
from tests.solve.test_screen import _cols


def old_params() -> dict:
    """Resolved parameters as a run recorded before the no-quality parameters existed."""
    p = copy.deepcopy(default_params())
    del p["screen"]["no_quality"], p["flags"]["max_no_quality_share"]
    return p


def test_screen_rejects_fixes_without_quality_only_when_asked():
    unrated = np.array([False, True, True, False])
    cols = _cols(no_quality=unrated, quality=np.array([1, -1, -1, 0], dtype=np.int8))
    p = default_params()["screen"]
    assert p["no_quality"] == "accept"
    assert [SCREEN_REASONS[c] for c in screen_codes(cols, p)] == ["", "", "", "invalid"]
    strict = {**p, "no_quality": "reject"}
    assert [SCREEN_REASONS[c] for c in screen_codes(cols, strict)] == \
        ["", "no-quality", "no-quality", "invalid"]
    # a manifest without the key screens as before: nothing held against them
    assert [SCREEN_REASONS[c] for c in screen_codes(cols, old_params()["screen"])] == \
        ["", "", "", "invalid"]
    # an earlier reason wins over 'no-quality' (the order of SCREEN_REASONS)
    void = _cols(no_quality=unrated, valid=np.array([True, False, True, True]))
    assert SCREEN_REASONS[screen_codes(void, strict)[1]] == "invalid"


def test_unknown_screen_setting_is_refused():
    with pytest.raises(UsageError, match="screen.no_quality 'sometimes' is unknown"):
        resolve_params({"screen": {"no_quality": "sometimes"}})
    with pytest.raises(UsageError, match="max_no_quality_share"):
        resolve_params({"flags": {"max_no_quality_share": 1.5}})


def test_cloud_hdop_gives_unrated_fixes_the_typical_hdop_of_their_cloud():
    hdop = np.array([0.8, 1.0, 1.6, np.nan, np.nan, np.nan, np.nan])
    unrated = np.array([False, False, False, True, True, True, True])
    seg = np.array([0, 0, 0, 0, 1, 1, 1])
    out = cloud_hdop(hdop, unrated, seg, 2)
    # cloud 0: median of its rated HDOPs (0.8, 1.0, 1.6) = 1.0; cloud 1 has none rated: 1
    np.testing.assert_array_equal(out, [0.8, 1.0, 1.6, 1.0, 1.0, 1.0, 1.0])
    assert cloud_hdop(hdop, np.zeros(7, bool), seg, 2) is hdop  # nothing to do
    assert cloud_hdop(hdop, None, seg, 2) is hdop


def test_flag_when_most_used_fixes_lack_quality():
    n = 4
    cols = {"n_used": np.array([100, 100, 100, 0]), "span_s": np.full(n, 1e6),
            "allowed_s": np.full(n, 1e6), "expected": np.full(n, 100.0),
            "unit_scale": np.ones(n), "moved": np.zeros(n, bool),
            "dist_preplot": np.zeros(n), "dist_nearest": np.full(n, 50.0),
            "dh": np.zeros(n), "dh_sigma": np.ones(n), "off_model": np.zeros(n, bool),
            "kind": np.array(["logged"] * n, dtype=object),
            "n_no_quality": np.array([0, 50, 51, 0])}
    flags = flag_strings(cols, default_params())
    assert ["quality-unknown" in f.split(";") for f in flags] == [False, False, True, False]
    # an old manifest has no share: the default 0.5 applies; without counts, no flag
    assert "quality-unknown" in flag_strings(cols, old_params())[2]
    del cols["n_no_quality"]
    assert not any("quality-unknown" in f for f in flag_strings(cols, default_params()))


def _mark_unrated(fixes: pa.Table, node: str) -> pa.Table:
    """The fixes with those of ``node`` turned into RMC-only epochs (no quality information)."""
    mine = pc.equal(fixes["node"], node)
    cols = {n: fixes[n] for n in fixes.column_names}
    cols["no_quality"] = mine
    cols["quality"] = pc.if_else(mine, pa.scalar(-1, pa.int8()), fixes["quality"])
    for name in ("n_sats", "hdop", "pdop", "vdop", "fix_type"):
        cols[name] = pc.if_else(mine, pa.nulls(len(fixes), fixes[name].type), fixes[name])
    return pa.table(cols, schema=fixes.schema)


def test_unrated_node_is_solved_counted_and_flagged(small_sim):
    sim = small_sim
    node = sorted(set(sim.fixes["node"].to_pylist()))[0]
    fixes = _mark_unrated(sim.fixes, node)
    out = solve_fixes(fixes, sim.deployments, sim.stations, default_params(),
                      sim.meta["epsg"]).positions
    rated = solve_fixes(sim.fixes, sim.deployments, sim.stations, default_params(),
                        sim.meta["epsg"]).positions.to_pydict()
    assert out.schema.equals(POSITION_SCHEMA, check_metadata=True)
    d = out.to_pydict()
    mine = [i for i, n in enumerate(d["node"]) if n == node and d["n_used"][i] > 0]
    assert mine
    for i in mine:
        assert d["n_no_quality"][i] == d["n_used"][i]
        assert "quality-unknown" in d["flags"][i].split(";")
        # equal weights instead of the HDOP weights: the same place within a few decimetres
        assert np.hypot(d["easting"][i] - rated["easting"][i],
                        d["northing"][i] - rated["northing"][i]) < 0.3
    others = [i for i, n in enumerate(d["node"]) if n != node]
    assert all(d["n_no_quality"][i] == 0 for i in others)
    strict = resolve_params({"screen": {"no_quality": "reject"}})
    out2 = solve_fixes(fixes, sim.deployments, sim.stations, strict, sim.meta["epsg"]).positions
    d2 = out2.to_pydict()
    assert all(d2["n_used"][i] == 0 for i in mine)
    # the other stations do not move when the unrated fixes are screened out
    keep = [i for i in others if "unoccupied" not in d["flags"][i]]
    np.testing.assert_array_equal(np.array(d2["easting"])[keep], np.array(d["easting"])[keep])


def test_parameters_of_an_old_run_give_its_table(small_sim):
    sim = small_sim
    new = solve_fixes(sim.fixes, sim.deployments, sim.stations, default_params(),
                      sim.meta["epsg"]).positions
    old = solve_fixes(sim.fixes, sim.deployments, sim.stations, old_params(),
                      sim.meta["epsg"]).positions
    assert "n_no_quality" in new.column_names and "n_no_quality" not in old.column_names
    assert new.drop_columns(["n_no_quality"]).equals(old)
