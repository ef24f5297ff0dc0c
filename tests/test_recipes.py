"""The maintainer-guide recipes, each followed once: a new delivery format, a new survey input
kind, a new solver estimator and a new fix-log format, registered in one place and picked
up by the command line and the library without touching anything else."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest

from tests.support.builders import delivery_archive
from tests.support.cli import invoke


@pytest.fixture
def toy_format() -> Iterator[str]:
    from archive.deliver.formats import FORMATS

    def write_toy(table: pa.Table, ctx) -> bytes:
        rows = [f"{r['line']:g} {r['point']:g} {r['index']} {r['easting']:.3f} "
                f"{r['northing']:.3f}" for r in table.to_pylist()]
        return ("# toy list, " + f"EPSG:{ctx.crs_epsg}\n" + "\n".join(rows) + "\n").encode()

    FORMATS.register("toylist", "space-separated line point index E N (a test format)",
                     write_toy, suffix=".txt")
    yield "toylist"
    FORMATS.unregister("toylist")


def test_recipe_new_delivery_format(toy_format, survey_arc, tmp_path, runner):
    delivery_archive(survey_arc, tmp_path)
    r = invoke(runner, survey_arc.root, "deliver", "--help")
    text = " ".join(r.output.split())  # help text is wrapped to the terminal width
    assert "|toylist]" in text and "toylist: space-separated line point index E N" in text
    out = tmp_path / "receivers.txt"
    r = invoke(runner, survey_arc.root, "deliver", "--format", "toylist", "--to", str(out),
               "--recipient", "Harrow Basin Energy")
    assert r.exit_code == 0, r.stderr
    lines = out.read_text().splitlines()
    assert lines[0] == "# toy list, EPSG:32614" and len(lines) == 9
    lineage = json.loads(Path(str(out) + ".lineage.json").read_text())
    assert lineage["delivery"]["format"] == "toylist"
    r = invoke(runner, survey_arc.root, "verify", "--delivery", str(out))
    assert r.exit_code == 0, r.output + r.stderr


@pytest.fixture
def toy_kind() -> Iterator[str]:
    from archive.survey.kinds import INPUT_KINDS, InputKind, LoadOption
    from archive.survey.parsed import ParsedInput

    def parse_obstacles(ctx) -> ParsedInput:
        rows = [line.split(",") for line in ctx.read().decode().splitlines()[1:] if line]
        unit = ctx.options.get("unit") or "m"
        table = pa.table({"name": [r[0] for r in rows],
                          "easting": [float(r[1]) for r in rows],
                          "northing": [float(r[2]) for r in rows],
                          "radius_m": [float(r[3]) * (0.3048 if unit == "ft" else 1.0)
                                       for r in rows]})
        return ParsedInput(table=table, meta={"unit": unit})

    INPUT_KINDS.register("obstacles", "points to keep away from (a test kind)",
                         InputKind(parse=parse_obstacles,
                                   file_help="Load obstacles: CSV name,easting,northing,radius.",
                                   options=(LoadOption("unit", "Radius unit.", kind="choice",
                                                       choices=("m", "ft")),)))
    yield "obstacles"
    INPUT_KINDS.unregister("obstacles")


def test_recipe_new_input_kind(toy_kind, survey_arc, tmp_path, runner):
    src = tmp_path / "obstacles.csv"
    src.write_text("name,easting,northing,radius\nwell pad,583300,4062500,100\n")
    r = invoke(runner, survey_arc.root, "load", "--help")
    assert "obstacles" in r.output
    r = invoke(runner, survey_arc.root, "load", "obstacles", str(src), "--unit", "ft")
    assert r.exit_code == 0, r.stderr
    assert "loaded obstacles version 1" in r.output and "1 rows" in r.output
    r = invoke(runner, survey_arc.root, "inputs", "--json")
    [row] = [x for x in json.loads(r.output) if x["kind"] == "obstacles"]
    assert row["rows"] == 1 and row["meta"] == {"unit": "ft"}
    from archive.survey.inputs import current_input
    from tests.support.builders import survey_id

    _, table = current_input(survey_arc, survey_id(survey_arc), "obstacles")
    assert table["radius_m"].to_pylist() == [pytest.approx(30.48)]


@pytest.fixture
def toy_estimator() -> Iterator[str]:
    from archive.solve.estimators import ESTIMATORS, Estimator

    def andrews(r: np.ndarray, p: dict) -> np.ndarray:
        # Andrews' wave: psi(r) = a sin(r/a) for |r| <= a*pi, else 0 (a = 1.339)
        a = 1.339
        u = np.maximum(r / a, 1e-12)
        return np.where(u <= np.pi, np.sin(u) / u, 0.0)

    ESTIMATORS.register("andrews", "Andrews' wave M-estimator, a = 1.339 (a test estimator)",
                        Estimator(andrews))
    yield "andrews"
    ESTIMATORS.unregister("andrews")


def test_recipe_new_estimator(toy_estimator, runner):
    """A new estimator without a compiled kernel runs the numpy reference schedule; its
    centre agrees with statsmodels' RLM with the same norm and a fixed MAD scale."""
    import statsmodels.api as sm

    from archive.cli.main import cli
    from archive.solve.params import resolve_params
    from archive.solve.robust import robust_centre

    r = runner.invoke(cli, ["params"])
    assert "andrews: Andrews' wave M-estimator" in r.output
    assert resolve_params({"estimate": {"estimator": "andrews"}})["estimate"]["estimator"] == \
        "andrews"
    rng = np.random.default_rng(3)
    x = np.r_[rng.normal(10.0, 2.0, 380), rng.normal(40.0, 3.0, 20)]  # 5 % far outliers
    res = robust_centre([x], np.ones_like(x), np.zeros(400, dtype=np.int64), 1,
                        estimator="andrews", reject_quantile=1.0, iterations=60,
                        scale_updates=1, scale_sample=None)
    # Reference: statsmodels RLM with its AndrewWave norm (a = 1.339), MAD scale estimated
    # once from the initial fit and kept (update_scale=False), iterated to convergence
    ref = sm.RLM(x, np.ones((400, 1)), M=sm.robust.norms.AndrewWave(1.339)).fit(
        scale_est="mad", update_scale=False, conv="coefs", tol=1e-12, maxiter=500)
    assert abs(res.centre[0][0] - 10.0) < 0.3  # the outliers were down-weighted
    assert res.centre[0][0] == pytest.approx(ref.params[0], abs=0.05)


@pytest.fixture
def toy_log_format() -> Iterator[str]:
    from archive.ingest.formats import LOG_FORMATS, LogFormat
    from archive.ingest.result import ParseResult, empty_rejects, rejects_table
    from archive.ingest.schema import FIX_SCHEMA

    def parse_semicolons(data: bytes, options) -> ParseResult:
        """``UTC time;lat;lon;height;quality`` lines; any other line is rejected."""
        lines = data.decode("ascii", "replace").splitlines()
        good, bad = [], []
        for k, line in enumerate(lines, start=1):
            parts = line.split(";")
            try:
                t = np.datetime64(parts[0].rstrip("Z"), "us")
                lat, lon, h, q = float(parts[1]), float(parts[2]), float(parts[3]), int(parts[4])
            except (ValueError, IndexError):
                bad.append(k)
                continue
            good.append((k, t, lat, lon, h, q))
        n = len(good)
        col = list(zip(*good, strict=True)) if good else [[]] * 6
        fixes = pa.table({
            "node": [options.node] * n,
            "time": pa.array(np.array(col[1], dtype="datetime64[us]")).cast(
                FIX_SCHEMA.field("time").type),
            "lat": pa.array(col[2], pa.float64()), "lon": pa.array(col[3], pa.float64()),
            "h_ell": pa.nulls(n, pa.float64()), "h_msl": pa.array(col[4], pa.float64()),
            "geoid_sep": pa.nulls(n, pa.float64()), "quality": pa.array(col[5], pa.int8()),
            "fix_type": pa.nulls(n, pa.int8()),
            "valid": pa.array([q > 0 for q in col[5]], pa.bool_()),
            "n_sats": pa.nulls(n, pa.int16()), "pdop": pa.nulls(n, pa.float32()),
            "hdop": pa.nulls(n, pa.float32()), "vdop": pa.nulls(n, pa.float32()),
            "raw_hash": [options.raw_hash] * n, "raw_line": pa.array(col[0], pa.int64()),
            "sentence": pa.nulls(n, pa.string()), "no_quality": pa.array([False] * n),
            "weeks_added": pa.array([0] * n, pa.int16())}, schema=FIX_SCHEMA)
        rejects = (rejects_table(np.array(bad), np.array(["malformed"] * len(bad)),
                                 pa.array([lines[k - 1] for k in bad]))
                   if bad else empty_rejects())
        return ParseResult(fixes=fixes, rejects=rejects, n_lines=len(lines), n_accepted=n,
                           n_rejected=len(bad), n_ignored=0)

    LOG_FORMATS.register("semicolons", "time;lat;lon;height;quality lines (a test format)",
                         LogFormat(parse=parse_semicolons, parser="semicolons-1",
                                   expected="time;lat;lon;height;quality lines"))
    yield "semicolons"
    LOG_FORMATS.unregister("semicolons")


def test_recipe_new_log_format(toy_log_format, survey_arc, tmp_path, runner):
    log = tmp_path / "KF40001.txt"
    log.write_text("2024-03-01T00:00:00Z;35.1000001;-101.2;910.5;1\n"
                   "a note the logger wrote\n"
                   "2024-03-01T00:00:01Z;35.1000002;-101.2000001;910.7;4\n")
    r = invoke(runner, survey_arc.root, "load", "fixes", "--help")
    text = " ".join(r.output.split())
    assert "semicolons]" in text and "semicolons: time;lat;lon;height;quality lines" in text
    r = invoke(runner, survey_arc.root, "load", "fixes", str(log), "--format", "semicolons",
               "--workers", "1")
    assert r.exit_code == 0, r.stderr
    r = invoke(runner, survey_arc.root, "logs", "--json")
    [row] = json.loads(r.output)
    assert (row["node"], row["n_fixes"], row["n_rejected"]) == ("KF40001", 2, 1)
    from archive.store.models import RawFile

    with survey_arc.session() as s:
        assert s.query(RawFile).one().parser == "semicolons-1"
    out = tmp_path / "fixes.csv"
    r = invoke(runner, survey_arc.root, "fixes", "KF40001", "--to", str(out))
    assert r.exit_code == 0, r.stderr
    assert out.read_text().splitlines()[1].split(",")[:3] == [
        '"KF40001"', '"2024-03-01T00:00:00.000000Z"', "35.1000001"]
    empty = tmp_path / "KF40002.txt"
    empty.write_text("nothing here\n")
    r = invoke(runner, survey_arc.root, "load", "fixes", str(empty), "--format", "semicolons",
               "--workers", "1")
    assert r.exit_code == 1 and "expected time;lat;lon;height;quality lines" in r.output + r.stderr
