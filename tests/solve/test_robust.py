"""The robust location estimator against statsmodels RLM, scipy, and the chi-square rule."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from scipy.optimize import minimize
from scipy.stats import chi2

from archive.solve.robust import robust_centre

X = np.array([2, 3, 3.5, 4, 4.5, 5, 40.0])  # location vector; oracle: statsmodels RLM


@pytest.mark.parametrize("estimator, norm, expected, scale", [
    # statsmodels RLM(x, ones, M=HuberT()).fit() -> 4.0, scale 1.48260;
    # TukeyBiweight() -> 3.68977, scale 1.20125 (statsmodels RLM documentation; computed with
    # statsmodels 0.15; recomputed here against the installed statsmodels too).
    ("huber", sm.robust.norms.HuberT(), 4.0, 1.48260),
    ("tukey", sm.robust.norms.TukeyBiweight(), 3.68977, 1.20125),
])
def test_location_matches_statsmodels_rlm(estimator: str, norm, expected: float,
                                          scale: float) -> None:
    fit = sm.RLM(X, np.ones(len(X)), M=norm).fit()
    seg = np.zeros(len(X), dtype=np.int64)
    exact = robust_centre([X], np.ones(len(X)), seg, 1, estimator=estimator,
                          reject_quantile=1.0, iterations=50, scale_updates=50)
    assert exact.centre[0][0] == pytest.approx(fit.params[0], abs=1e-6)
    assert exact.centre[0][0] == pytest.approx(expected, abs=1e-5)
    assert exact.scale[0] == pytest.approx(fit.scale, abs=1e-5)
    assert exact.scale[0] == pytest.approx(scale, abs=1e-5)
    # the default schedule (fixed number of steps for every cloud) is within 0.1 mm
    default = robust_centre([X], np.ones(len(X)), seg, 1, estimator=estimator,
                            reject_quantile=1.0)
    assert default.centre[0][0] == pytest.approx(expected, abs=1e-4)


def test_many_segments_at_once_equal_one_at_a_time() -> None:
    rng = np.random.default_rng(3)
    sizes = [7, 50, 1, 300, 12]
    data = [rng.standard_t(2, n) * 2 + 10 * i for i, n in enumerate(sizes)]
    hd = [rng.uniform(0.7, 2.5, n) for n in sizes]
    seg = np.repeat(np.arange(len(sizes)), sizes)
    together = robust_centre([np.concatenate(data)], np.concatenate(hd), seg, len(sizes))
    for i, (x, h) in enumerate(zip(data, hd, strict=True)):
        alone = robust_centre([x], h, np.zeros(len(x), dtype=np.int64), 1)
        assert together.centre[0][i] == pytest.approx(alone.centre[0][0], abs=1e-12)


def test_weighted_mean_and_geometric_median_match_direct_solutions() -> None:
    rng = np.random.default_rng(5)
    e, n = rng.normal(0, 2, 400), rng.normal(0, 3, 400)
    e[:20] += 40
    hd = rng.uniform(0.8, 2.0, 400)
    seg = np.zeros(400, dtype=np.int64)
    w = 1 / hd**2
    mean = robust_centre([e, n], hd, seg, 1, estimator="mean", reject_quantile=1.0)
    assert mean.centre[0][0] == pytest.approx(np.sum(w * e) / np.sum(w), rel=1e-12)
    gm = robust_centre([e, n], hd, seg, 1, estimator="geomedian", reject_quantile=1.0,
                       iterations=100, scale_updates=3)

    def cost(c: np.ndarray) -> float:  # Σ |x - c| / σ_i, minimised by scipy (Nelder-Mead)
        return float(np.sum(np.hypot(e - c[0], n - c[1]) / hd))

    ref = minimize(cost, x0=[0.0, 0.0], method="Nelder-Mead",
                   options={"xatol": 1e-7, "fatol": 1e-10, "maxiter": 5000}).x
    assert gm.centre[0][0] == pytest.approx(ref[0], abs=1e-3)
    assert gm.centre[1][0] == pytest.approx(ref[1], abs=1e-3)


def test_chi_square_rejection_keeps_its_limit() -> None:
    rng = np.random.default_rng(9)
    e, n = rng.normal(0, 1, 5000), rng.normal(0, 1, 5000)
    e[:10] += 30  # gross outliers
    seg = np.zeros(5000, dtype=np.int64)
    res = robust_centre([e, n], np.ones(5000), seg, 1, reject_quantile=0.999)
    assert res.rejected[:10].all()
    assert not res.rejected[10:].all()
    # chi-square with 2 dof: 0.1 % of Gaussian fixes lie beyond the 99.9 % quantile (13.82)
    assert chi2.ppf(0.999, 2) == pytest.approx(13.8155, abs=1e-4)
    share = res.rejected[10:].mean()
    assert 0.0 <= share < 0.004
    assert np.all(res.weight[res.rejected] == 0)
    assert res.r[res.rejected].min() > np.sqrt(chi2.ppf(0.999, 2))
