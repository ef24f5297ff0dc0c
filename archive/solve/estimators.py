"""The robust estimators: name -> IRLS weight function ψ(r)/r, and the compiled kernel that
runs it fast (when there is one).

Every estimator is an M-estimator solved by iteratively reweighted least squares
(:mod:`archive.solve.robust`): per fix, the weight is ψ(rᵢ)/rᵢ / HDOPᵢ² with rᵢ the
standardised distance to the current centre. An entry gives the weight as a numpy function
of ``r`` and the ``[estimate]`` parameters, a one-line description, and the code of the
compiled kernel that implements the same weight (:mod:`archive.solve.kernels`), or None: an
estimator without a kernel runs through the numpy reference path, slower but the same
schedule. ``[estimate] estimator`` accepts exactly the registered names, and ``nodekeep
params`` lists them; docs/maintainer-guide.md has the recipe for a new estimator.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from archive.registry import Registry

WeightFn = Callable[[np.ndarray, dict[str, Any]], np.ndarray]


@dataclass(frozen=True)
class Estimator:
    """How an estimator weights a fix, and whether the compiled kernel knows it."""

    weight: WeightFn  # ψ(r)/r for standardised distances r (HDOP weighting is separate)
    kernel_code: int | None = None  # archive.solve.kernels EST_* code, None: numpy path
    one_step: bool = False  # a closed form (the weighted mean): one step, no scale rounds


def _huber(r: np.ndarray, p: dict[str, Any]) -> np.ndarray:
    k = float(p["huber_k"])
    return k / np.maximum(r, k)


def _tukey(r: np.ndarray, p: dict[str, Any]) -> np.ndarray:
    u = r / float(p["tukey_c"])
    return np.where(u < 1.0, (1.0 - u * u) ** 2, 0.0)


def _geomedian(r: np.ndarray, _p: dict[str, Any]) -> np.ndarray:
    return 1.0 / np.maximum(r, 1e-9)


def _mean(r: np.ndarray, _p: dict[str, Any]) -> np.ndarray:
    return np.ones_like(r)


# kernel codes as in archive.solve.kernels (EST_HUBER, EST_TUKEY, EST_GEOMEDIAN, EST_MEAN);
# written out so that listing the estimators does not compile the kernels
ESTIMATORS: Registry[Estimator] = Registry("estimator")
ESTIMATORS.register("huber", "Huber M-estimator (k = huber_k, 1.345: 95 % efficiency)",
                    Estimator(_huber, 0))
ESTIMATORS.register("tukey", "Tukey biweight (c = tukey_c, 4.685), for heavy multipath tails",
                    Estimator(_tukey, 1))
ESTIMATORS.register("geomedian", "HDOP-weighted geometric median (Weiszfeld)",
                    Estimator(_geomedian, 2))
ESTIMATORS.register("mean", "HDOP-weighted mean (for comparison)",
                    Estimator(_mean, 3, one_step=True))
