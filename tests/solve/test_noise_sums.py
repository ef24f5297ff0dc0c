"""The compiled sums of the pooled error model (:mod:`archive.solve.noise_sums`) give the
bits of the numpy calls they replace: numpy's own ``np.add.reduceat`` (pairwise
summation) and ``np.bincount`` are the outside reference, on clouds logged every 30 s,
1 s and 0.2 s (blocks of 2, 60 and 300 fixes: each branch of the pairwise sum), with void
HDOPs, zero weights and gaps."""

from __future__ import annotations

import numpy as np
import pytest

from archive.solve.noise import row_noise
from archive.solve.noise_sums import reduceat_sum

FIELDS = ("q", "h", "span", "n", "allan", "pairs", "white")


@pytest.mark.parametrize("n", [*range(1, 140), 255, 256, 1000, 4097])
def test_block_sum_is_numpys_reduceat(n: int) -> None:
    rng = np.random.default_rng(n)
    x = rng.normal(0, 1, n) * 10 ** rng.uniform(-8, 8, n)  # wide range: order matters
    assert np.float64(reduceat_sum(x, 0, n)).tobytes() == np.add.reduceat(x, [0]).tobytes()


def test_block_sum_keeps_negative_zero() -> None:
    x = np.array([-0.0, -0.0, -0.0])
    assert np.float64(reduceat_sum(x, 0, 3)).tobytes() == np.add.reduceat(x, [0]).tobytes()


def _clouds(rng: np.random.Generator, dt: float, n_rows: int, m: int):
    row = np.sort(rng.integers(0, n_rows, m))
    t = np.zeros(m)
    for r in range(n_rows):
        idx = np.flatnonzero(row == r)
        steps = np.full(len(idx), dt)
        steps[rng.random(len(idx)) < 0.002] = 900.0  # gaps in the log
        t[idx] = np.cumsum(steps) - steps[0]
    hdop = rng.uniform(0.5, 3, m)
    hdop[rng.random(m) < 0.05] = np.nan
    hdop[rng.random(m) < 0.02] = 0.0
    w = rng.uniform(0, 1, m)
    w[rng.random(m) < 0.1] = 0.0
    de = rng.normal(0, 2, m) + 40 * (rng.random(m) < 0.01)
    return de, rng.normal(0, 2, m), hdop, w, t, row, n_rows + 2  # two rows without fixes


@pytest.mark.parametrize("dt, n_rows, m", [(30.0, 40, 30000), (1.0, 6, 40000),
                                           (0.2, 3, 30000)])
def test_row_noise_compiled_equals_numpy_bit_for_bit(dt: float, n_rows: int, m: int) -> None:
    args = _clouds(np.random.default_rng(int(dt * 10)), dt, n_rows, m)
    got, want = row_noise(*args), row_noise(*args, compiled=False)
    assert want.pairs[:, :6].sum() > 0
    for name in FIELDS:
        a, b = getattr(got, name), getattr(want, name)
        assert a.shape == b.shape and a.tobytes() == b.tobytes(), name
