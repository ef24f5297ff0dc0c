"""The solver on simulated truth (error model: archive.seeds.simulate, sources cited there).

48 stations, 3.2 days each at 30 s, first-order Gauss–Markov errors (σ = 2 m per axis,
τ = 30 min: tens of minutes; Howind et al. 1999 report 5–20 min for double-difference
residuals), a per-deployment multipath bias, outlier
bursts, void and 2-D fixes, camp and transit fixes, three moves, two swapped pairs of
serials in the log and one unlogged deployment.
"""

from __future__ import annotations

import numpy as np
import pyarrow.compute as pc
import pytest
from archive.seeds.simulate import Simulation

from archive.solve.engine import solve_fixes
from archive.solve.params import default_params
from archive.solve.segments import from_local, to_local
from archive.survey.crs import WGS84_GEOGRAPHIC, transformer

pytestmark = pytest.mark.slow


def _delivered(sim: Simulation, solved) -> tuple[dict, np.ndarray]:
    pos = solved.positions.filter(solved.positions["delivered"]).to_pydict()
    at = {n: i for i, n in enumerate(sim.truth["node"])}
    return pos, np.array([at[n] for n in pos["node"]])


def _errors(sim: Simulation, solved) -> tuple[np.ndarray, np.ndarray, dict, np.ndarray]:
    """Errors of the delivered rows, each part of a moved node against where it stood."""
    pos, i = _delivered(sim, solved)
    first = np.array(pos["part"]) == 1
    t = sim.truth
    de = np.array(pos["easting"]) - np.where(first, t["e_first"][i], t["e"][i])
    dn = np.array(pos["northing"]) - np.where(first, t["n_first"][i], t["n"][i])
    return de, dn, pos, i


def test_horizontal_accuracy_on_simulated_truth(big_sim: Simulation, big_solved) -> None:
    de, dn, _, _ = _errors(big_sim, big_solved)
    err = np.hypot(de, dn)
    print(f"\nhorizontal error over {len(err)} deployments: median {np.median(err):.3f} m, "
          f"95th percentile {np.percentile(err, 95):.3f} m, max {err.max():.3f} m")
    assert len(err) >= 45
    assert np.median(err) <= 0.5  # issue target for 3+ days of single-frequency fixes
    assert np.percentile(err, 95) <= 1.2


def test_reported_uncertainty_is_calibrated(big_sim: Simulation, big_solved) -> None:
    de, dn, pos, _ = _errors(big_sim, big_solved)
    se, sn, r = (np.array(pos[k]) for k in ("sigma_e", "sigma_n", "corr_en"))
    ven = r * se * sn
    det = se**2 * sn**2 - ven**2
    m2 = (sn**2 * de**2 - 2 * ven * de * dn + se**2 * dn**2) / det
    # the standard uncertainty: E[m²] = 2 for a calibrated 2-D normal (χ²₂ mean)
    print(f"\nmean squared standardised error {np.mean(m2) / 2:.2f} per axis")
    assert 0.6 <= np.mean(m2) / 2 <= 1.6
    inside = np.mean(np.hypot(de, dn) <= np.array(pos["r95"]))
    print(f"{inside:.1%} of {len(m2)} positions inside their own stated r95")
    # 3.2 days: the floor (0.25 m) against this model's 0.3 m multipath bias (see
    # docs/solving.md, "Measured") makes it slightly short of 95 %
    assert 0.85 <= inside <= 0.99
    # σ/√n would claim a few centimetres: the reported sigmas must be far above that
    n_used = np.array(pos["n_used"])
    assert np.all(se > 5 * 2.0 / np.sqrt(n_used))


def test_robust_estimate_beats_the_plain_mean(big_sim: Simulation, big_solved) -> None:
    de, dn, pos, i = _errors(big_sim, big_solved)
    robust = np.hypot(de, dn)
    # plain mean of the same screened fixes of the same windows (no weights, no rejection)
    m = big_solved.members
    fx = m.fx
    keep = m.screen == 0
    lat, lon, row = fx.lat[m.fix][keep], fx.lon[m.fix][keep], m.row[keep]
    lat0, lon0 = lat.mean(), lon.mean()
    e, n = to_local(lat, lon, lat0, lon0)
    cnt = np.bincount(row)
    me, mn = np.bincount(row, weights=e) / cnt, np.bincount(row, weights=n) / cnt
    rows = np.flatnonzero(big_solved.positions["delivered"].to_numpy(zero_copy_only=False))
    mlat, mlon = from_local(me[rows], mn[rows], lat0, lon0)
    ge, gn = transformer(WGS84_GEOGRAPHIC, big_sim.meta["epsg"]).transform(mlon, mlat)
    moved = big_sim.truth["moved"][i]
    plain = np.hypot(np.asarray(ge) - big_sim.truth["e"][i], np.asarray(gn) - big_sim.truth["n"][i])
    print(f"\nmedian error: robust {np.median(robust[~moved]):.3f} m, "
          f"plain mean {np.median(plain[~moved]):.3f} m")
    assert np.median(robust[~moved]) < np.median(plain[~moved])
    assert np.mean(robust[~moved]) < np.mean(plain[~moved])


def test_every_move_and_mixup_is_flagged(big_sim: Simulation, big_solved) -> None:
    t = big_sim.truth
    pos = big_solved.positions.to_pydict()
    flags = {}
    for node, f, kind in zip(pos["node"], pos["flags"], pos["kind"], strict=True):
        if kind == "logged":
            flags.setdefault(node, set()).update(f.split(";") if f else [])
    for node in t["node"][t["moved"]]:
        assert "moved" in flags[node], node
    for node in t["node"][t["swapped"]]:
        assert "nearer-other" in flags[node], node
    # and nothing else moved (no false alarms on this data)
    assert {n for n, f in flags.items() if "moved" in f} == set(t["node"][t["moved"]])
    # each part of a moved node is delivered, near where it stood, split at the move
    de, dn, p, i = _errors(big_sim, big_solved)
    moved = t["moved"][i]
    assert np.all(np.hypot(de, dn)[moved] < 1.5)
    assert sorted(np.array(p["part"])[moved]) == sorted([1, 2] * int(t["moved"].sum()))
    later = moved & (np.array(p["part"]) == 2)
    split = np.array([x.timestamp() for x in np.array(p["held_from"], dtype=object)[later]])
    assert np.all(np.abs(split - t["move_t"][i[later]]) <= 30.0)  # at the fix (30 s logging)


def test_unlogged_deployment_is_found_and_camp_never_used(big_sim: Simulation,
                                                          big_solved) -> None:
    t = big_sim.truth
    pos = big_solved.positions
    unl = pos.filter(pc.equal(pos["kind"], "unlogged")).to_pydict()
    lost = t["node"][t["unlogged"]]
    assert sorted(unl["node"]) == sorted(lost)
    st = t["station"][t["unlogged"]][0]
    assert unl["line"] == [t["line"][st]] and unl["point"] == [t["point"][st]]
    assert all("unlogged" in f for f in unl["flags"])
    # camp and transit fixes never enter a cloud: every member is within 100 m of its node
    m = big_solved.members
    e, n = transformer(WGS84_GEOGRAPHIC, big_sim.meta["epsg"]).transform(
        m.fx.lon[m.fix], m.fx.lat[m.fix])
    at = {x: i for i, x in enumerate(t["node"])}
    node = np.array(m.fx.node_names, dtype=object)[m.fx.node_code[m.fix]]
    idx = np.array([at[x] for x in node])
    used = (m.screen == 0) & ~m.rejected
    d_first = np.hypot(np.asarray(e) - t["e_first"][idx], np.asarray(n) - t["n_first"][idx])
    d_last = np.hypot(np.asarray(e) - t["e"][idx], np.asarray(n) - t["n"][idx])
    assert np.all(np.minimum(d_first, d_last)[used] < 100.0)
    camp = np.hypot(np.asarray(e) - big_sim.camp[0], np.asarray(n) - big_sim.camp[1])
    assert np.all(camp[used] > 500.0)


@pytest.mark.parametrize("estimator", ["tukey", "geomedian", "mean"])
def test_other_estimators_and_ar1_run_on_the_same_data(big_sim: Simulation,
                                                       estimator: str) -> None:
    p = default_params()
    p["estimate"]["estimator"] = estimator
    p["uncertainty"]["method"] = "ar1"
    sub = big_sim.deployments.slice(0, 6)
    nodes = sub["node"]
    fixes = big_sim.fixes.filter(pc.is_in(big_sim.fixes["node"], value_set=nodes))
    out = solve_fixes(fixes, sub, big_sim.stations, p, big_sim.meta["epsg"],
                      detect_unlogged=False)
    pos = out.positions.to_pydict()
    assert set(pos["estimator"]) == {estimator}
    floor = p["uncertainty"]["floor"]
    assert all(np.isfinite(pos["sigma_e"])) and all(x > floor for x in pos["sigma_e"])
