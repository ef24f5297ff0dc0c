"""The maintainer-guide recipes, each followed once: a new delivery format, a new survey input
kind, a new solver estimator (and a new fix-log format), registered in one place and picked
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
