"""Merging the occupations of a station that cannot be told apart (``deliver --merge-occupations``).

By default every occupation of a station is delivered under its own point index. On request,
a station whose occupations cannot be told apart statistically is delivered as one position:

- **test**: the occupations are one point observed k times (the hypothesis); their spread
  about the combined position, T = Σ (pᵢ − p̄)ᵀ Cᵢ⁻¹ (pᵢ − p̄), follows χ² with 2(k − 1)
  degrees of freedom under it (the homogeneity test of generalised least squares), so the
  station merges when T ≤ χ²₂₍ₖ₋₁₎(0.95). For two occupations this is their difference
  inside the 95 % ellipse of the difference (covariance C₁ + C₂). The test uses every
  occupation at once, so the chance of wrongly keeping a station apart stays 5 % however
  often it was occupied.
- **one preplot station**: occupations are grouped by line, point and the preplot's point
  index, never across two planned positions of one point.
- **only solver positions merge**: an occupation changed by an edit (set position or height),
  or without an uncertainty, keeps the station apart; the decision says why.
- **combined position**: the information-weighted mean p = C·Σ C_i⁻¹ p_i with
  C = (Σ C_i⁻¹)⁻¹ (generalised least squares of one point observed several times), so the
  combined uncertainty is C; ``r95`` is the radius holding 95 % of it.
- **the merged row**: the lowest point index of the station (index 1 when the first
  occupation is among them), nodes joined with ``+``, the window from the first deployment to
  the last retrieval (``windows`` keeps each occupation's own window), fix counts summed,
  flags of every occupation, ``merged`` listing the indices merged (``1;2``), ``source``
  ``solver;merged``. The height is the elevation model
  sampled at the combined position when every occupation's height came from the model, else
  the weighted mean of their heights (weights 1/trace C_i).

Sigmas and radii are metres; grid coordinates are in the CRS unit (``unit_factor`` metres per
unit converts between them).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import numpy as np
import pyarrow as pa
from scipy.stats import chi2

from archive.solve.schema import FLAGS
from archive.solve.uncertainty import radius95

HeightAt = Callable[[float, float], float | None]


def _covariance(se: float, sn: float, corr: float | None) -> np.ndarray:
    c = 0.0 if corr is None or not np.isfinite(corr) else float(corr)
    return np.array([[se * se, c * se * sn], [c * se * sn, sn * sn]])


def _mergeable(rows: list[dict[str, Any]]) -> str | None:
    """Why these occupations may not be merged (None when they may)."""
    for r in rows:
        if r["source"] != "solver":
            return f"index {r['index']} was changed by an edit ({r['source']})"
        if not all(np.isfinite(r.get(k) if r.get(k) is not None else np.nan)
                   for k in ("easting", "northing", "sigma_e", "sigma_n")):
            return f"index {r['index']} has no position or no uncertainty"
    return None


def _pairs(rows: list[dict[str, Any]], unit: float) -> list[dict[str, Any]]:
    """Distances between occupations (for the record; the test is :func:`_homogeneity`)."""
    return [{"indices": [rows[i]["index"], rows[j]["index"]],
             "distance_m": unit * float(np.hypot(rows[i]["easting"] - rows[j]["easting"],
                                                 rows[i]["northing"] - rows[j]["northing"]))}
            for i in range(len(rows)) for j in range(i + 1, len(rows))]


def _homogeneity(rows: list[dict[str, Any]], cov: list[np.ndarray], unit: float
                 ) -> dict[str, Any]:
    """T = Σ (pᵢ − p̄)ᵀ Cᵢ⁻¹ (pᵢ − p̄) about the combined position, its degrees of freedom and
    the 95 % quantile of χ² it is compared with."""
    info = [np.linalg.inv(c) for c in cov]
    c = np.linalg.inv(sum(info))
    p = np.array([[r["easting"], r["northing"]] for r in rows]) * unit
    mean = c @ sum(w @ x for w, x in zip(info, p, strict=True))
    t = float(sum((x - mean) @ w @ (x - mean) for w, x in zip(info, p, strict=True)))
    dof = 2 * (len(rows) - 1)
    limit = float(chi2.ppf(0.95, dof))
    return {"statistic": t, "dof": dof, "limit": limit, "inside": t <= limit}


def _join_flags(texts: list[str]) -> str:
    found = {f for t in texts for f in (t or "").split(";") if f}
    order = {k: i for i, k in enumerate(FLAGS)}
    return ";".join(sorted(found, key=lambda f: (order.get(f, len(order)), f)))


def _combined(rows: list[dict[str, Any]], cov: list[np.ndarray], unit: float,
              height_at: HeightAt | None) -> dict[str, Any]:
    info = [np.linalg.inv(c) for c in cov]  # metres⁻²
    c = np.linalg.inv(sum(info))
    p = np.array([[r["easting"], r["northing"]] for r in rows]) * unit  # metres
    mean = c @ sum(w @ x for w, x in zip(info, p, strict=True))
    east, north = float(mean[0] / unit), float(mean[1] / unit)
    se, sn = float(np.sqrt(c[0, 0])), float(np.sqrt(c[1, 1]))
    height, source = None, "none"
    if height_at is not None and all(r["height_source"] == "model" for r in rows):
        height = height_at(east, north)
        source = "model" if height is not None else "none"
    if height is None:
        hw = [(r["height"], 1.0 / np.trace(k)) for r, k in zip(rows, cov, strict=True)
              if r["height"] is not None and np.isfinite(r["height"])]
        if hw:
            height = float(sum(h * w for h, w in hw) / sum(w for _, w in hw))
            sources = {r["height_source"] for r in rows}
            source = sources.pop() if len(sources) == 1 else "mixed"
    retrieved = [r["retrieved"] for r in rows]
    starts = [r["t_start"] for r in rows if r["t_start"] is not None]
    ends = [r["t_end"] for r in rows if r["t_end"] is not None]
    return {
        "line": rows[0]["line"], "point": rows[0]["point"],
        "index": min(r["index"] for r in rows),
        "station_index": min(r["station_index"] for r in rows),
        "node": "+".join(dict.fromkeys(str(r["node"]) for r in rows)),
        "deployed": min(r["deployed"] for r in rows if r["deployed"] is not None)
        if any(r["deployed"] is not None for r in rows) else None,
        "retrieved": None if any(t is None for t in retrieved) else max(retrieved),
        "easting": east, "northing": north, "height": height, "height_source": source,
        "lat": None, "lon": None, "sigma_e": se, "sigma_n": sn,
        "corr_en": float(c[0, 1] / (se * sn)) if se > 0 and sn > 0 else 0.0,
        "r95": float(radius95(np.array([c[0, 0]]), np.array([c[1, 1]]),
                              np.array([c[0, 1]]))[0]),
        "n_used": sum(r["n_used"] or 0 for r in rows),
        "n_rejected": sum(r["n_rejected"] or 0 for r in rows),
        "t_start": min(starts) if starts else None, "t_end": max(ends) if ends else None,
        "flags": _join_flags([r["flags"] for r in rows]),
        "flags_acknowledged": _join_flags([r["flags_acknowledged"] for r in rows]),
        "source": "solver;merged",
        "merged": ";".join(str(r["index"]) for r in rows),
        "windows": ";".join(
            f"{r['deployed'].isoformat() if r['deployed'] else ''}/"
            f"{r['retrieved'].isoformat() if r['retrieved'] else ''}" for r in rows),
        "occupation": min((r["occupation"] for r in rows if r.get("occupation") is not None),
                          default=None),
        "part": 0,
    }


def merge_occupations(table: pa.Table, unit_factor: float, height_at: HeightAt | None = None
                      ) -> tuple[pa.Table, list[dict[str, Any]]]:
    """Merge each station's indistinguishable occupations (see the module doc).

    Returns the new table (same schema; lat/lon of merged rows left null for the caller to
    recompute) and one decision per station occupied more than once: its occupations, the
    pairwise tests and whether it was merged (or why not).
    """
    rows = table.to_pylist()
    groups: dict[tuple[float, float, int], list[int]] = {}
    for i, r in enumerate(rows):  # one entry per delivered occupation, not per fix
        groups.setdefault((r["line"], r["point"], r["station_index"]), []).append(i)
    out: list[dict[str, Any]] = []
    decisions: list[dict[str, Any]] = []
    for (line, point, station_index), members in groups.items():
        group = sorted((rows[i] for i in members), key=lambda r: r["index"])
        if len(group) == 1:
            out.append(group[0])
            continue
        decision: dict[str, Any] = {"line": line, "point": point,
                                    "station_index": station_index,
                                    "indices": [r["index"] for r in group],
                                    "nodes": [r["node"] for r in group], "merged": False}
        why = _mergeable(group)
        if why is None:
            cov = [_covariance(r["sigma_e"], r["sigma_n"], r.get("corr_en")) for r in group]
            decision["pairs"] = _pairs(group, unit_factor)
            decision["test"] = _homogeneity(group, cov, unit_factor)
            if decision["test"]["inside"]:
                merged = _combined(group, cov, unit_factor, height_at)
                decision |= {"merged": True, "index": merged["index"],
                             "easting": merged["easting"], "northing": merged["northing"],
                             "r95_m": merged["r95"]}
                out.append(merged)
            else:
                far = max(decision["pairs"], key=lambda p: p["distance_m"])
                t = decision["test"]
                decision["reason"] = (
                    f"the occupations differ beyond their uncertainty (chi-square "
                    f"{t['statistic']:.1f} on {t['dof']} degrees of freedom, 95 % limit "
                    f"{t['limit']:.1f}); indices {far['indices'][0]} and {far['indices'][1]} "
                    f"are {far['distance_m']:.2f} m apart")
                out += group
        else:
            decision["reason"] = why
            out += group
        decisions.append(decision)
    return pa.Table.from_pylist(out, schema=table.schema), decisions
