"""The hour-block move detection of runs made before the scan (``flags.move_method =
"blocks"``), on Gauss–Markov clouds (thresholds: common practice, no source)."""

from __future__ import annotations

import numpy as np
from archive.seeds.gnss_errors import gauss_markov

from archive.solve.moves import detect_moves
from archive.solve.params import default_params

# the parameters of that time: hour blocks, 6 h a side, 4 standard errors
P = default_params()["flags"] | {"move_block_min": 60.0, "move_min_hours": 6.0,
                                 "move_z": 4.0}


def _clouds(k: int, n: int, seed: int) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    rng = np.random.default_rng(seed)

    def gm() -> np.ndarray:  # 30 s fixes, τ = 30 min (cf. Howind et al. 1999: 5–20 min)
        return gauss_markov(rng, n, 30.0, 2.0, 1800.0, size=k)

    t = np.broadcast_to(np.arange(n) * 30_000_000, (k, n)).ravel().copy()
    return gm().ravel(), gm().ravel(), t, np.repeat(np.arange(k), n)


def test_no_false_moves_even_with_an_outlier_in_a_thin_last_block() -> None:
    e, n, t, seg = _clouds(300, 8521, seed=8)  # 71 h + 1 fix: the last block holds one fix
    last = np.flatnonzero(np.diff(seg, append=seg[-1] + 1))
    e[last] += 50.0  # and that fix is a 50 m outlier
    mv = detect_moves(e, n, t, seg, 300, P)
    assert not (mv.split_us >= 0).any()
    assert np.nanmax(mv.step) < P["move_step"]


def test_a_persistent_step_is_found_near_its_time() -> None:
    e, n, t, seg = _clouds(40, 8640, seed=9)
    at = np.random.default_rng(1).integers(2000, 6600, 40)
    size = np.linspace(6.0, 15.0, 40)
    idx = np.arange(len(seg)) - seg * 8640
    after = idx >= at[seg]
    e[after] += size[seg][after]
    mv = detect_moves(e, n, t, seg, 40, P)
    assert (mv.split_us >= 0).all()
    assert np.all(np.abs(mv.split_us - at * 30_000_000) <= 3600e6)  # within one block
