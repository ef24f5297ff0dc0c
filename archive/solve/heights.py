"""Heights of solved positions: the elevation model, with the GNSS height as a check.

The delivered height is the bare-earth elevation model sampled at the solved horizontal
position (the sampler does the bilinear interpolation in the model's CRS). Its one-sigma
error combines the model's own error with the slope times the horizontal uncertainty:
σ_h² = σ_model² + (∂z/∂E)²σ_E² + (∂z/∂N)²σ_N² (first-order propagation). The GNSS
orthometric height of the cloud (median of its used fixes) is kept beside it, with
dh = h_gnss − h_model. Outside the model or on nodata the GNSS height is delivered, with
the batch-means uncertainty of the cloud's heights plus ``gnss_floor``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

Sampler = Callable[[np.ndarray, np.ndarray], np.ndarray]


@dataclass
class Heights:
    """Per position: delivered height, its source and sigma, the model and GNSS values."""

    height: np.ndarray
    source: np.ndarray  # object: "model" | "gnss" | "none"
    sigma: np.ndarray
    h_model: np.ndarray
    h_gnss: np.ndarray
    dh: np.ndarray
    off_model: np.ndarray  # bool: a model exists but has no value here
    slope_e: np.ndarray  # model slope dz/dE, dz/dN at the position (0 without a model)
    slope_n: np.ndarray
    sigma_gnss: np.ndarray  # σ of the GNSS height (batch means and the floor)


def solve_heights(east: np.ndarray, north: np.ndarray, sigma_e: np.ndarray,
                  sigma_n: np.ndarray, h_gnss: np.ndarray, sigma_gnss: np.ndarray,
                  sampler: Sampler | None, params: dict[str, Any]) -> Heights:
    """Model heights at the positions (grid E/N), GNSS fallback; ``params`` = [height]."""
    n = len(east)
    finite = np.isfinite(east) & np.isfinite(north)
    h_model = np.full(n, np.nan)
    slope_e = np.zeros(n)
    slope_n = np.zeros(n)
    if sampler is not None and finite.any():
        d = params["slope_step"]
        x, y = east[finite], north[finite]
        xs = np.concatenate([x, x + d, x - d, x, x])
        ys = np.concatenate([y, y, y, y + d, y - d])
        z = np.asarray(sampler(xs, ys), dtype=float).reshape(5, -1)
        h_model[finite] = z[0]
        ge = (z[1] - z[2]) / (2 * d)
        gn = (z[3] - z[4]) / (2 * d)
        slope_e[finite] = np.where(np.isfinite(ge), ge, 0.0)
        slope_n[finite] = np.where(np.isfinite(gn), gn, 0.0)
    has_model = np.isfinite(h_model)
    sig_model = model_height_sigma(sigma_e, sigma_n, slope_e, slope_n, params)
    sig_gnss = np.sqrt(sigma_gnss**2 + params["gnss_floor"] ** 2)
    has_gnss = np.isfinite(h_gnss)
    height = np.where(has_model, h_model, np.where(has_gnss, h_gnss, np.nan))
    source = np.where(has_model, "model", np.where(has_gnss, "gnss", "none")).astype(object)
    sigma = np.where(has_model, sig_model, np.where(has_gnss, sig_gnss, np.nan))
    off = (sampler is not None) & finite & ~has_model
    return Heights(height=height, source=source, sigma=sigma, h_model=h_model, h_gnss=h_gnss,
                   dh=h_gnss - h_model, off_model=np.asarray(off, dtype=bool),
                   slope_e=slope_e, slope_n=slope_n, sigma_gnss=sig_gnss)


def model_height_sigma(sigma_e: np.ndarray, sigma_n: np.ndarray, slope_e: np.ndarray,
                       slope_n: np.ndarray, params: dict[str, Any]) -> np.ndarray:
    """σ of a model height: the model's own σ and the slope times the horizontal σ."""
    return np.sqrt(params["model_sigma"] ** 2 + (slope_e * sigma_e) ** 2
                   + (slope_n * sigma_n) ** 2)
