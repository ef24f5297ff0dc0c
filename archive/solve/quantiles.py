"""Quantiles of the chi-square and F distributions from ``scipy.special`` alone.

``scipy.stats`` costs about half a second to import, on every solve, for two quantile
functions; these are the very functions ``scipy.stats`` evaluates inside (its ``chi2`` and
``f`` distributions' percent-point functions for arguments in range), so every value is the
same to the last bit (tests/solve/test_quantiles.py compares them).
"""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.special import fdtri, gammaincinv


def chi2_ppf(p: Any, df: Any) -> Any:
    """The ``p`` quantile of the chi-square distribution with ``df`` degrees of freedom
    (0 < p < 1, df > 0)."""
    return 2 * gammaincinv(np.asarray(df, dtype=float) / 2, p)


def f_ppf(q: Any, dfn: Any, dfd: Any) -> np.ndarray:
    """The ``q`` quantile of the F distribution (``dfn``, ``dfd`` degrees of freedom); NaN
    where a degree of freedom is not positive or not a number."""
    dfn = np.asarray(dfn, dtype=float)
    dfd = np.asarray(dfd, dtype=float)
    ok = (dfn > 0) & (dfd > 0)
    with np.errstate(invalid="ignore"):
        return np.where(ok, fdtri(dfn, dfd, q), np.nan)
