"""One rule for fixes of one node at the same time in several raw files (overlapping logs).

A node's log is often downloaded more than once, so two raw files can hold the same epoch.
Exactly one fix per (node, time) is kept: the one from the earliest loaded raw file (the
lowest ``raw_files.id``), and within that file the one on the lowest raw line. Reading a
node's fixes (:func:`archive.ingest.read.node_fixes`) and the solver
(:func:`archive.solve.fixarrays.fix_arrays`) both call :func:`first_epochs`, so an export
and a solution always see the same fixes.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np


def first_epochs(code: np.ndarray, t_us: np.ndarray, raw_line: np.ndarray,
                 file_rank: Callable[[np.ndarray], np.ndarray]
                 ) -> tuple[np.ndarray | None, int]:
    """Row order sorting fixes by (node, time) with one fix per epoch kept (see module doc).

    ``code`` is an integer node code per row, ``t_us`` the time in microseconds and
    ``raw_line`` the line in its raw file. ``file_rank(rows)`` gives the load rank of the
    raw file of the given input rows (smaller = loaded earlier); it is only called for the
    rows of repeated epochs. Returns ``(src, n_dropped)``: ``src`` indexes the input rows in
    output order, or is None when the input is already sorted with no repeat.
    """
    code = np.asarray(code, dtype=np.int64)
    t_us = np.asarray(t_us, dtype=np.int64)
    raw_line = np.asarray(raw_line, dtype=np.int64)
    n = len(code)
    src = None
    if n > 1:
        dc, dt = np.diff(code), np.diff(t_us)
        if not bool(np.all((dc > 0) | ((dc == 0) & (dt >= 0)))):
            src = np.lexsort((raw_line, t_us, code))
    sc = code if src is None else code[src]
    st = t_us if src is None else t_us[src]
    dup = np.zeros(n, dtype=bool)
    if n > 1:
        dup[1:] = (sc[1:] == sc[:-1]) & (st[1:] == st[:-1])
    n_dup = int(dup.sum())
    if n_dup == 0:
        return src, 0
    order = np.arange(n) if src is None else src
    # the rows of every repeated epoch: a repeat and the row before it
    member = dup.copy()
    member[:-1] |= dup[1:]
    pos = np.flatnonzero(member)  # positions in sorted order
    group = np.cumsum(~dup[pos]) - 1
    rows = order[pos]
    rank = np.asarray(file_rank(rows), dtype=np.int64)
    pick = np.lexsort((raw_line[rows], rank, group))
    first = np.ones(len(pick), dtype=bool)
    first[1:] = group[pick][1:] != group[pick][:-1]
    winners = pos[pick[first]]  # one sorted position per epoch, in group order
    keep = ~member
    keep[winners] = True
    kept = np.flatnonzero(keep)
    return order[kept], n_dup
