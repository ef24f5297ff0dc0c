"""Did the node change place during its deployment? A persistent step in the running centre.

Each cloud is cut into time blocks (``move_block_min``); the median east/north of each block
is the running centre (blocks holding under a quarter of the usual count, such as a
partial last block, are left out). For every possible split between blocks that leaves at least
``move_min_hours`` on both sides, the step is the distance between the mean block centres
before and after; the split with the largest size-weighted step (|Δ|²·n₁n₂/(n₁+n₂), the
two-sample mean-shift statistic) is the candidate. It is a move when the step is at least
``move_step`` metres *and* at least ``move_z`` standard errors (from the scatter of the
block centres on each side around their own mean). All clouds are tested at once on a
padded (cloud × block) array.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from archive.solve.segments import block_medians, seg_starts


@dataclass
class MoveResult:
    """Per segment: split time (µs, -1 when no move), step (m) and its z-score."""

    split_us: np.ndarray
    step: np.ndarray
    z: np.ndarray


def detect_moves(e: np.ndarray, n: np.ndarray, t_us: np.ndarray, seg: np.ndarray, n_seg: int,
                 params: dict[str, Any]) -> MoveResult:
    """Test every segment for a persistent step (see module doc); ``params`` = [flags]."""
    split = np.full(n_seg, -1, dtype=np.int64)
    step = np.full(n_seg, np.nan)
    zval = np.full(n_seg, np.nan)
    if len(seg) == 0:
        return MoveResult(split, step, zval)
    block = int(params["move_block_min"] * 60e6)
    starts, counts = seg_starts(seg, n_seg)
    bl = block_medians(e, n, t_us, seg, starts, counts, block, min_fixes=5)
    pe, pn, t0, t1 = bl.pe, bl.pn, bl.t0, bl.t1
    width = pe.shape[1]
    ok = np.isfinite(pe)
    cnt = np.cumsum(ok, axis=1).astype(float)
    se_ = np.cumsum(np.where(ok, pe, 0.0), axis=1)
    sn_ = np.cumsum(np.where(ok, pn, 0.0), axis=1)
    qq = np.cumsum(np.where(ok, pe * pe + pn * pn, 0.0), axis=1)
    tot_c, tot_e, tot_n, tot_q = cnt[:, -1:], se_[:, -1:], sn_[:, -1:], qq[:, -1:]
    # split k (1..width-1): left = blocks [0, k), right = [k, nb)
    nl, nr = cnt[:, :-1], tot_c - cnt[:, :-1]
    ks = np.arange(1, width)[None, :]
    min_us = params["move_min_hours"] * 3600e6
    before = ks * block  # time from the first fix to the split
    after = (t1 - t0)[:, None] - before  # time from the split to the last fix
    valid = (before >= min_us) & (after >= min_us) & (nl >= 2) & (nr >= 2)
    if not valid.any():
        return MoveResult(split, step, zval)
    with np.errstate(invalid="ignore", divide="ignore"):
        le, ln_ = se_[:, :-1] / nl, sn_[:, :-1] / nl
        re_, rn = (tot_e - se_[:, :-1]) / nr, (tot_n - sn_[:, :-1]) / nr
        d2 = (re_ - le) ** 2 + (rn - ln_) ** 2
        score = np.where(valid, d2 * nl * nr / (nl + nr), -1.0)
        k = np.argmax(score, axis=1)
        rows = np.arange(n_seg)
        any_valid = valid[rows, k]
        nl_k, nr_k = nl[rows, k], nr[rows, k]
        ss = (tot_q[:, 0] - nl_k * (le[rows, k] ** 2 + ln_[rows, k] ** 2)
              - nr_k * (re_[rows, k] ** 2 + rn[rows, k] ** 2))
        s2 = np.maximum(ss, 0.0) / (2 * np.maximum(nl_k + nr_k - 2, 1))
        se2 = s2 * (1 / nl_k + 1 / nr_k)
        dist = np.sqrt(d2[rows, k])
        z = dist / np.sqrt(np.maximum(se2, 1e-12))
    moved = any_valid & (dist >= params["move_step"]) & (z >= params["move_z"])
    split[moved] = t0[moved] + (k[moved] + 1) * block
    step[any_valid] = dist[any_valid]
    zval[any_valid] = z[any_valid]
    return MoveResult(split, step, zval)
