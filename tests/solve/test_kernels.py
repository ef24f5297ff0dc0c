"""The compiled segment kernels against the numpy reference and statsmodels RLM."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm
from statsmodels.robust.scale import mad

from archive.solve import kernels
from archive.solve.robust import robust_centre, robust_centre_reference
from archive.solve.segments import seg_median, seg_median_reference
from archive.solve.uncertainty import batch_covariance, batch_covariance_reference

X = np.array([2, 3, 3.5, 4, 4.5, 5, 40.0])  # location vector; oracle: statsmodels RLM


def _clouds(sizes: list[int], seed: int = 1) -> tuple[np.ndarray, ...]:
    """Heavy-tailed 2-D clouds with outlier bursts, HDOP, time (30 s epochs), segment ids."""
    rng = np.random.default_rng(seed)
    seg = np.repeat(np.arange(len(sizes)), sizes)
    n = len(seg)
    e = rng.standard_t(3, n) * 2 + seg * 7.0
    no = rng.standard_t(3, n) * 2 - seg * 3.0
    burst = rng.random(n) < 0.02
    e[burst] += rng.uniform(15, 60, burst.sum())
    hd = rng.uniform(0.7, 2.5, n)
    hd[::97] = np.nan  # a missing HDOP counts as 1
    first = np.concatenate([[0], np.cumsum(sizes)[:-1]])
    t = (np.arange(n) - np.repeat(first, sizes)) * 30.0
    return e, no, hd, t, seg


SIZES = [0, 1, 2, 7, 50, 300, 2880, 5000, 3, 0, 1200]


@pytest.mark.parametrize("estimator", ["huber", "tukey", "geomedian", "mean"])
@pytest.mark.parametrize("cap", [2048, None])
def test_robust_kernel_equals_numpy_reference(estimator: str, cap: int | None) -> None:
    e, n, hd, _, seg = _clouds(SIZES)
    opts = {"estimator": estimator, "scale_sample": cap}
    got = robust_centre([e, n], hd, seg, len(SIZES), **opts)
    ref = robust_centre_reference([e, n], hd, seg, len(SIZES), **opts)
    for d in range(2):
        np.testing.assert_allclose(got.centre[d], ref.centre[d], rtol=0, atol=1e-9)
    np.testing.assert_allclose(got.scale, ref.scale, rtol=1e-9)
    assert np.array_equal(got.rejected, ref.rejected)
    np.testing.assert_allclose(got.weight, ref.weight, rtol=1e-9, atol=1e-15)
    np.testing.assert_allclose(got.r, ref.r, rtol=1e-9)


def test_one_dimension_matches_statsmodels_rlm_and_mad() -> None:
    # statsmodels RLM(x, ones, M=HuberT()).fit() -> 4.0, scale 1.48260; mad(x) 1.48260
    # (statsmodels RLM documentation; computed with statsmodels, the oracle is re-run here)
    fit = sm.RLM(X, np.ones(len(X)), M=sm.robust.norms.HuberT()).fit()
    seg = np.zeros(len(X), dtype=np.int64)
    got = robust_centre([X], np.ones(len(X)), seg, 1, reject_quantile=1.0, iterations=50,
                        scale_updates=50)
    assert got.centre[0][0] == pytest.approx(fit.params[0], abs=1e-6)
    assert got.scale[0] == pytest.approx(fit.scale, abs=1e-5)
    # the first scale round is the MAD about the median: statsmodels' mad(x)
    first = robust_centre([X], np.ones(len(X)), seg, 1, reject_quantile=1.0, iterations=0,
                          scale_updates=1)
    assert first.scale[0] == pytest.approx(mad(X), rel=1e-12)
    assert first.centre[0][0] == np.median(X)


def test_many_clouds_match_statsmodels_one_by_one() -> None:
    # each cloud alone through statsmodels RLM (HuberT, MAD scale); 1-D clouds of the
    # location vector X shifted and stretched, solved all at once by the kernel
    xs = [X * s + o for s, o in [(1.0, 0.0), (2.5, -3.0), (0.1, 100.0), (7.0, 5.0)]]
    seg = np.repeat(np.arange(len(xs)), [len(x) for x in xs])
    got = robust_centre([np.concatenate(xs)], np.ones(len(seg)), seg, len(xs),
                        reject_quantile=1.0, iterations=50, scale_updates=50)
    for i, x in enumerate(xs):
        fit = sm.RLM(x, np.ones(len(x)), M=sm.robust.norms.HuberT()).fit()
        assert got.centre[0][i] == pytest.approx(fit.params[0], abs=1e-6)
        assert got.scale[i] == pytest.approx(fit.scale, rel=1e-5)


@pytest.mark.parametrize("cap", [None, 64, 5])
def test_segment_median_equals_numpy(cap: int | None) -> None:
    rng = np.random.default_rng(4)
    sizes = [0, 1, 2, 3, 10, 64, 65, 1000, 0]
    seg = np.repeat(np.arange(len(sizes)), sizes)
    v = rng.normal(0, 5, len(seg)) + seg * 1000.0
    got = seg_median(v, seg, len(sizes), cap)
    ref = seg_median_reference(v, seg, len(sizes), cap)
    np.testing.assert_allclose(got, ref, rtol=1e-13, atol=0)
    # without a cap: np.median of each segment exactly
    if cap is None:
        for i, m in enumerate(sizes):
            if m:
                assert got[i] == np.median(v[seg == i])
            else:
                assert np.isnan(got[i])


def test_batch_kernel_equals_numpy_reference() -> None:
    e, n, hd, t, seg = _clouds(SIZES, seed=7)
    w = 1.0 / np.nan_to_num(hd, nan=1.0) ** 2
    w[::13] = 0.0  # rejected fixes
    for batch_s, min_b in ((3 * 3600.0, 4), (600.0, 2)):
        got = batch_covariance(e, n, w, t, seg, len(SIZES), batch_s=batch_s, min_batches=min_b)
        ref = batch_covariance_reference(e, n, w, t, seg, len(SIZES), batch_s=batch_s,
                                         min_batches=min_b)
        for f in ("vee", "vnn", "ven", "n_eff"):
            np.testing.assert_allclose(getattr(got, f), getattr(ref, f), rtol=1e-10,
                                       atol=1e-13, equal_nan=True)


def test_results_do_not_depend_on_the_thread_count() -> None:
    e, n, hd, t, seg = _clouds([4000] * 30, seed=11)  # 120 000 fixes: up to 3 threads
    before = kernels.get_threads()
    out = []
    try:
        for threads in (1, 2, 3):
            kernels.set_threads(threads)
            r = robust_centre([e, n], hd, seg, 30)
            c = batch_covariance(e - r.centre[0][seg], n - r.centre[1][seg], r.weight, t, seg,
                                 30, batch_s=3600.0, min_batches=4)
            out.append(np.concatenate([r.centre[0], r.centre[1], r.scale, r.weight, c.vee,
                                       c.n_eff]))
    finally:
        kernels.set_threads(before)
    assert np.array_equal(out[0], out[1]) and np.array_equal(out[0], out[2])
