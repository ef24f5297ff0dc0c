"""The solver's chi-square and F quantiles equal scipy.stats' to the last bit (reference
library: scipy.stats.chi2.ppf and scipy.stats.f.ppf), so runs solved when the solver called
scipy.stats reproduce unchanged."""

from __future__ import annotations

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.stats import chi2, f

from archive.solve.quantiles import chi2_ppf, f_ppf


@settings(max_examples=300, deadline=None)
@given(st.floats(1e-6, 1 - 1e-6), st.integers(1, 6))
def test_chi2_quantile_is_scipy_stats(p, df):
    assert chi2_ppf(p, df) == chi2.ppf(p, df)


def test_chi2_quantiles_the_solver_uses():
    # the 95 % radius factor of a 2-D normal: chi2(2) quantile 5.991 (statistical tables)
    assert abs(chi2_ppf(0.95, 2) - 5.991) < 5e-4
    for p in (0.5, 0.95, 0.999):
        for d in (1, 2, 3):
            assert chi2_ppf(p, d) == chi2.ppf(p, d)


@settings(max_examples=300, deadline=None)
@given(st.floats(-5, 1e6) | st.just(np.inf) | st.just(np.nan) | st.just(0.0))
def test_f_quantile_is_scipy_stats(nu):
    a = f.ppf(0.95, 2, np.array([nu]))
    b = f_ppf(0.95, 2, np.array([nu]))
    assert np.array_equal(a, b, equal_nan=True)
