"""Solver parameters: every threshold with its default, read from TOML, stored with each run.

Parameters are a flat table of named values grouped into sections (``[window]``,
``[screen]``, ``[estimate]``, ``[uncertainty]``, ``[height]``, ``[flags]``, ``[clusters]``).
:func:`default_params` is the reference: a parameter file may override any subset, and any
key it names that is not a known parameter is refused (a typo must not silently fall back
to a default). The fully resolved parameters go into the run manifest, so a run records
exactly what it used.
"""

from __future__ import annotations

import copy
import tomllib
from pathlib import Path
from typing import Any

from archive.errors import InputError, UsageError

NO_QUALITY = ("accept", "reject")
UNCERTAINTY_METHODS = ("pooled", "batch", "ar1")
MOVE_METHODS = ("scan", "blocks")
MOVE_DELIVERY = ("each", "last")

# section -> key -> (default, help). Order here is the order printed by ``nodekeep params``.
_SPEC: dict[str, dict[str, tuple[Any, str]]] = {
    "window": {
        "settle_start_min": (30.0, "minutes dropped after the logged deployment time"),
        "settle_end_min": (30.0, "minutes dropped before the logged retrieval time"),
        "margin_fallback": (True, "solve from the settle margins when the settled window has "
                                  "no usable fix (a node that died just after lay-out)"),
        "hold_unharvested": (True, "a deployment no loaded log of its node overlaps awaits "
                                   "harvest: not solved, not flagged, held back from "
                                   "deliveries (false: solved as unoccupied)"),
    },
    "screen": {
        "min_quality": (1, "lowest GGA fix quality kept (0 = no fix)"),
        "require_3d": (True, "keep only 3-D fixes (GSA fix type 3) when the log says"),
        "min_sats": (4, "fewest satellites in use"),
        "max_pdop": (6.0, "largest PDOP kept"),
        "max_hdop": (4.0, "largest HDOP kept"),
        "no_quality": ("accept", "fixes without quality information (RMC/GLL only): accept "
                                 "(weighted by their cloud's spread) | reject"),
    },
    "estimate": {
        "estimator": ("huber", "robust estimator, one of:"),
        "sigma0": (3.0, "per-axis error at HDOP 1, m (sigma_i = sigma0 * HDOP_i)"),
        "huber_k": (1.345, "Huber tuning constant (95 % efficiency at the normal, 1-D)"),
        "tukey_c": (4.685, "Tukey biweight tuning constant (95 % efficiency, 1-D)"),
        "reject_quantile": (0.999, "chi-square (2 dof) quantile beyond which a fix is rejected"),
        "iterations": (6, "IRLS iterations per scale update (same for every cloud)"),
        "scale_updates": (3, "times the MAD scale is re-estimated"),
        "scale_sample": (2048, "most fixes per cloud used for the median and MAD"),
    },
    "uncertainty": {
        "method": ("pooled", "pooled (error model measured on all the run's clouds, scaled "
                             "per cloud, Student-type quantiles) | batch (batch means, normal "
                             "quantile) | ar1 (AR(1) effective sample size)"),
        "batch_hours": (3.0, "batch length of 'batch' (and of GNSS heights), hours"),
        "min_batches": (4, "fewest batches; shorter windows use shorter batches"),
        "floor": (0.25, "per-axis error that never averages out (multipath bias, offsets), m"),
    },
    "height": {
        "model_sigma": (0.2, "one-sigma error of the elevation model itself, m"),
        "gnss_floor": (2.0, "one-sigma error of an averaged GNSS height that never averages out, m"),
        "slope_step": (2.0, "distance used to measure the model slope, m"),
    },
    "flags": {
        "min_fixes": (120, "fewest used fixes before 'few-fixes'"),
        "min_fix_fraction": (0.5, "'few-fixes' also below this share of the fixes the window "
                                  "and the node's logging interval allow"),
        "min_span_fraction": (0.5, "'short-span' when the used fixes span less than this share "
                                   "of the window"),
        "spread_factor": (3.0, "'wide-spread' when the robust scale per HDOP exceeds this x sigma0"),
        "move_method": ("scan", "scan (two-sample scan of block medians, split at the fix) | "
                                "blocks (hour blocks, 6 h a side; runs made before)"),
        "move_step": (5.0, "smallest persistent step of the cloud centre reported as a move, m"),
        "move_min_hours": (1.0, "shortest part on each side of a move, hours"),
        "move_block_min": (5.0, "block length of the running centre used to find moves, minutes"),
        "move_z": (6.0, "the step's scan statistic must also exceed this (see docs/solving.md)"),
        "move_deliver": ("each", "each (every part of a moved node delivered, its own point "
                                 "index and time) | last (only the last part)"),
        "far_from_plan": (20.0, "distance to the preplot station before 'far-from-plan', m"),
        "height_tol": (6.0, "|GNSS - model height| before 'height-mismatch', m"),
        "height_z": (3.0, "'height-mismatch' also needs |dh| beyond this many of its sigmas"),
        "max_no_quality_share": (0.5, "share of used fixes without quality information "
                                      "beyond which 'quality-unknown'"),
    },
    "clusters": {
        "radius": (10.0, "stationary cluster radius R, m"),
        "min_hours": (2.0, "shortest stationary cluster T reported as unlogged, hours"),
        "chunk_min": (10.0, "time chunk whose mean position tracks the node, minutes"),
        "match_tol": (20.0, "farthest a cluster may be from a station to be reported, m"),
    },
}


# What a run manifest written before a parameter existed meant: the behaviour of that time.
# A run is recomputed from its manifest's own parameters, so every parameter added later is
# read through :func:`setting` with the value that gives the old behaviour.
BEFORE: dict[tuple[str, str], Any] = {
    ("window", "margin_fallback"): False,
    ("window", "hold_unharvested"): False,
    ("flags", "min_fix_fraction"): 0.0,
    ("flags", "min_span_fraction"): None,  # the absolute rule of flags.min_span_hours
    ("flags", "move_method"): "blocks",
    ("flags", "move_deliver"): "last",
    ("flags", "height_z"): 0.0,
}


def setting(params: dict[str, Any], section: str, key: str) -> Any:
    """``params[section][key]``, or what a manifest without it meant (:data:`BEFORE`)."""
    sec = params.get(section) or {}
    return sec[key] if key in sec else BEFORE[(section, key)]


def default_params() -> dict[str, dict[str, Any]]:
    """Every solver parameter with its default, as ``{section: {key: value}}``."""
    return {sec: {k: v[0] for k, v in keys.items()} for sec, keys in _SPEC.items()}


def _check_type(where: str, default: Any, value: Any) -> Any:
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise UsageError(f"{where} must be true or false, not {value!r}")
        return value
    if isinstance(default, int):
        if isinstance(value, bool) or not isinstance(value, int):
            raise UsageError(f"{where} must be a whole number, not {value!r}")
        return value
    if isinstance(default, float):
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise UsageError(f"{where} must be a number, not {value!r}")
        return float(value)
    if not isinstance(value, str):
        raise UsageError(f"{where} must be text, not {value!r}")
    return value


def resolve_params(overrides: dict[str, Any] | None = None, *, source: str = "parameters"
                   ) -> dict[str, dict[str, Any]]:
    """Defaults updated by ``overrides`` (same nesting); unknown keys and bad types refused."""
    params = default_params()
    for sec, keys in (overrides or {}).items():
        if sec not in _SPEC:
            raise UsageError(f"{source}: unknown section [{sec}]",
                             hint=f"known sections: {', '.join(_SPEC)}")
        if not isinstance(keys, dict):
            raise UsageError(f"{source}: [{sec}] must be a table of parameters")
        for key, value in keys.items():
            if key not in _SPEC[sec]:
                raise UsageError(f"{source}: unknown parameter {sec}.{key}",
                                 hint=f"parameters of [{sec}]: {', '.join(_SPEC[sec])}; "
                                      "'nodekeep params' prints them all")
            params[sec][key] = _check_type(f"{source}: {sec}.{key}", _SPEC[sec][key][0], value)
    _validate(params, source)
    return params


def _validate(p: dict[str, dict[str, Any]], source: str) -> None:
    from archive.solve.estimators import ESTIMATORS

    est = p["estimate"]
    if est["estimator"] not in ESTIMATORS:
        raise UsageError(f"{source}: estimate.estimator {est['estimator']!r} is unknown",
                         hint=f"use one of {', '.join(ESTIMATORS.names())}")
    if p["screen"]["no_quality"] not in NO_QUALITY:
        raise UsageError(f"{source}: screen.no_quality {p['screen']['no_quality']!r} is unknown",
                         hint=f"use one of {', '.join(NO_QUALITY)}")
    if not 0.0 <= p["flags"]["max_no_quality_share"] <= 1.0:
        raise UsageError(f"{source}: flags.max_no_quality_share must be in [0, 1]")
    if p["uncertainty"]["method"] not in UNCERTAINTY_METHODS:
        raise UsageError(f"{source}: uncertainty.method {p['uncertainty']['method']!r} is unknown",
                         hint=f"use one of {', '.join(UNCERTAINTY_METHODS)}")
    for key, allowed in (("move_method", MOVE_METHODS), ("move_deliver", MOVE_DELIVERY)):
        if p["flags"][key] not in allowed:
            raise UsageError(f"{source}: flags.{key} {p['flags'][key]!r} is unknown",
                             hint=f"use one of {', '.join(allowed)}")
    for key in ("min_fix_fraction", "min_span_fraction"):
        if not 0.0 <= p["flags"][key] <= 1.0:
            raise UsageError(f"{source}: flags.{key} must be between 0 and 1")
    if not 0.5 < est["reject_quantile"] <= 1.0:
        raise UsageError(f"{source}: estimate.reject_quantile must be in (0.5, 1]; 1 rejects nothing")
    positive = [("estimate", "sigma0"), ("estimate", "huber_k"), ("estimate", "tukey_c"),
                ("uncertainty", "batch_hours"), ("clusters", "radius"), ("clusters", "chunk_min"),
                ("flags", "move_block_min"), ("flags", "move_min_hours")]
    for sec, key in positive:
        if p[sec][key] <= 0:
            raise UsageError(f"{source}: {sec}.{key} must be positive")
    for sec, key in (("estimate", "iterations"), ("estimate", "scale_updates"),
                     ("estimate", "scale_sample"), ("uncertainty", "min_batches")):
        if p[sec][key] < 1:
            raise UsageError(f"{source}: {sec}.{key} must be at least 1")
    if p["uncertainty"]["min_batches"] < 2:
        raise UsageError(f"{source}: uncertainty.min_batches must be at least 2")


def load_params(path: str | Path) -> dict[str, dict[str, Any]]:
    """Read a TOML parameter file and resolve it against the defaults."""
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(str(path), "file not found",
                         hint="'nodekeep params > solve.toml' writes a file to start from") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(str(path), f"not valid TOML: {exc}") from None
    return resolve_params(data, source=str(path))


def _toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str):
        return '"' + value.replace("\\", "\\\\").replace('"', '\\"') + '"'
    return repr(value)


def params_toml(params: dict[str, dict[str, Any]] | None = None) -> str:
    """Commented TOML of the parameters (the defaults when none are given)."""
    params = copy.deepcopy(params) if params is not None else default_params()
    lines = ["# nodekeep solver parameters. Any subset may be given to 'nodekeep solve --params';",
             "# unknown names are refused. Units: metres, minutes or hours as named.", ""]
    for sec, keys in _SPEC.items():
        lines.append(f"[{sec}]")
        width = max(len(f"{k} = {_toml_value(params[sec][k])}") for k in keys)
        for key, (_default, text) in keys.items():
            item = f"{key} = {_toml_value(params[sec][key])}"
            lines.append(f"{item.ljust(width)}  # {text}")
            if (sec, key) == ("estimate", "estimator"):
                from archive.solve.estimators import ESTIMATORS

                lines += [f"{'':{width}}  #   {e.name}: {e.description}" for e in ESTIMATORS]
        lines.append("")
    return "\n".join(lines)
