"""Finishing a positions table with the pooled error model (``uncertainty.method = "pooled"``).

The model (:mod:`archive.solve.noise`) is measured on every cloud of the run, so a table is
finished only once all its rows are together: the solver leaves what each row gives the
model in working columns (:data:`WORK`, after the schema's), and :func:`finish` fits the
model on the rows in the table's order, fills in the uncertainty columns and drops the
working ones. :func:`archive.solve.engine.solve_fixes` finishes its own table; a run solved
in node partitions finishes the combined one (:func:`archive.solve.solving.finish_rows`), so the
positions do not depend on how the nodes were partitioned.
"""

from __future__ import annotations

from typing import Any

import numpy as np
import pyarrow as pa

from archive.solve.heights import model_height_sigma
from archive.solve.noise import (
    LEVELS,
    NoiseModel,
    RowNoise,
    centre_covariance,
    coverage_factor,
    fit_model,
)
from archive.solve.schema import POSITION_SCHEMA
from archive.solve.stages import Estimate, grid_uncertainty
from archive.survey.crs import survey_crs

SCALARS = ("_q_ee", "_q_nn", "_q_en", "_h", "_span", "_slope_e", "_slope_n", "_single")
VECTORS = ("_allan", "_pairs", "_white")
WORK = SCALARS + VECTORS


def work_columns(est: Estimate, slope_e: np.ndarray, slope_n: np.ndarray
                 ) -> dict[str, np.ndarray]:
    """The working columns of every row (before the table's sort)."""
    nz = est.noise
    assert nz is not None
    return {"_q_ee": nz.q[:, 0], "_q_nn": nz.q[:, 1], "_q_en": nz.q[:, 2], "_h": nz.h,
            "_span": nz.span, "_slope_e": slope_e, "_slope_n": slope_n,
            "_single": est.single, "_allan": nz.allan, "_pairs": nz.pairs,
            "_white": nz.white}


def work_arrays(data: dict[str, np.ndarray]) -> list[tuple[str, pa.Array]]:
    """Arrow arrays of the working columns (the per-level sums as fixed-size lists)."""
    out = []
    for name in SCALARS:
        out.append((name, pa.array(np.asarray(data[name], dtype=np.float64),
                                    from_pandas=True)))
    for name in VECTORS:
        flat = pa.array(np.ascontiguousarray(data[name], dtype=np.float64).reshape(-1))
        out.append((name, pa.FixedSizeListArray.from_arrays(flat, LEVELS)))
    return out


def _col(table: pa.Table, name: str) -> np.ndarray:
    """A float column as numpy (null as NaN)."""
    return np.array(table[name].to_numpy(zero_copy_only=False), dtype=np.float64)


def _matrix(table: pa.Table, name: str) -> np.ndarray:
    flat = table[name].combine_chunks().flatten().to_numpy(zero_copy_only=False)
    return np.asarray(flat, dtype=np.float64).reshape(table.num_rows, LEVELS)


def finish(table: pa.Table, params: dict[str, Any], crs_epsg: int
           ) -> tuple[pa.Table, NoiseModel]:
    """The table (with :data:`WORK` columns) with its uncertainty from the pooled model,
    in :data:`POSITION_SCHEMA`; and the model."""
    n_used = table["n_used"].to_numpy().astype(np.float64)
    rows = RowNoise(q=np.column_stack([_col(table, c) for c in ("_q_ee", "_q_nn", "_q_en")]),
                    h=_col(table, "_h"), span=_col(table, "_span"), n=n_used,
                    allan=_matrix(table, "_allan"), pairs=_matrix(table, "_pairs"),
                    white=_matrix(table, "_white"))
    occupied = n_used > 0
    margins = table["from_margins"].to_numpy(zero_copy_only=False).astype(bool)
    usable = (n_used >= 2) & ~margins & np.isfinite(rows.q).all(axis=1)
    model = fit_model(rows, usable)
    floor = params["uncertainty"]["floor"]
    cov = centre_covariance(rows, model, floor, usable)
    single = _col(table, "_single") + floor * floor
    vee = np.where(np.isfinite(single), np.fmax(cov.vee, single), cov.vee)
    vnn = np.where(np.isfinite(single), np.fmax(cov.vnn, single), cov.vnn)
    k2 = coverage_factor(cov.dof)
    unit = survey_crs(crs_epsg).unit_factor
    lat, lon = _col(table, "lat"), _col(table, "lon")
    east, north = _col(table, "easting"), _col(table, "northing")
    sig_e, sig_n, corr, major, minor, bearing, r95 = grid_uncertainty(
        lat, lon, east, north, vee, vnn, cov.ven, crs_epsg, unit, k2)
    out = {"sigma_e": sig_e, "sigma_n": sig_n, "corr_en": corr, "ell_major": major,
           "ell_minor": minor, "ell_bearing": bearing, "r95": r95, "n_eff": cov.n_eff,
           "dof": cov.dof}
    src = np.array(table["height_source"].to_pylist(), dtype=object)
    sigma_h = _col(table, "sigma_h")
    from_model = src == "model"
    sigma_h[from_model] = model_height_sigma(sig_e, sig_n, _col(table, "_slope_e"),
                                             _col(table, "_slope_n"),
                                             params["height"])[from_model]
    out["sigma_h"] = sigma_h
    for name, values in out.items():
        v = np.where(occupied, values, np.nan)
        i = table.schema.get_field_index(name)
        table = table.set_column(i, POSITION_SCHEMA.field(name),
                                 pa.array(v, pa.float64(), from_pandas=True))
    return table.drop_columns(list(WORK)), model
