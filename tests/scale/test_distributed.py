"""``map_partitions``: the same results, in the same order, wherever they are computed."""

from __future__ import annotations

import numpy as np
import pytest

from archive.errors import InputError, UsageError
from archive.scale.distributed import map_partitions
from tests.support.scale import free_port

pytest.importorskip("distributed")


def _weighted_sum(part: tuple[int, int], shared: np.ndarray) -> tuple[int, float]:
    """A partition's reduction over a shared array (stand-in for one node group)."""
    seed, n = part
    x = np.random.default_rng(seed).normal(size=n)
    return seed, float(np.dot(x, shared[:n]))


def _fails_on_three(part: int, _shared: object) -> int:
    if part == 3:
        raise InputError("node-3.nmea", "not a fix log", line=7)
    return part


def _where(part: int, _shared: object) -> tuple[int, str]:
    from distributed import get_worker

    return part, get_worker().address


PARTS = [(seed, 1000 + 37 * seed) for seed in range(9)]
SHARED = np.linspace(0.0, 1.0, 2000)


class _Count:
    def __init__(self) -> None:
        self.total = 0

    def start(self, total: int, unit: str, label: str = "") -> None:
        pass

    def advance(self, n: int = 1, item: str = "") -> None:
        self.total += n

    def close(self) -> None:
        pass


def test_in_process_is_a_plain_ordered_map():
    expected = [_weighted_sum(p, SHARED) for p in PARTS]
    progress = _Count()
    got = map_partitions(_weighted_sum, PARTS, shared=SHARED, weights=[n for _, n in PARTS],
                         progress=progress)
    assert got == expected
    assert progress.total == sum(n for _, n in PARTS)


def test_local_cluster_gives_identical_results_in_partition_order():
    from distributed import Client, LocalCluster

    expected = [_weighted_sum(p, SHARED) for p in PARTS]
    # Results are floats from numpy: identical bits, not merely close.
    assert map_partitions(_weighted_sum, PARTS, shared=SHARED, workers=2,
                          processes=False) == expected
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False, protocol="tcp://",
                      host="127.0.0.1", dashboard_address=None) as cluster, Client(cluster) as client:
        # The scheduler path, by address (what --scheduler tcp://HOST:PORT does).
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
        assert map_partitions(_weighted_sum, PARTS, shared=SHARED,
                              scheduler=cluster.scheduler_address) == expected
        where = map_partitions(_where, list(range(12)), client=client)
        assert [p for p, _ in where] == list(range(12))
        assert {a for _, a in where} <= set(cluster.workers[k].address for k in cluster.workers)
        # A worker's error reaches the caller as the same error, with its message.
        with pytest.raises(InputError, match="node-3.nmea:7: not a fix log"):
            map_partitions(_fails_on_three, list(range(6)), client=client)


def test_unreachable_scheduler_and_conflicting_options_are_usage_errors():
    import dask

    with (dask.config.set({"distributed.comm.timeouts.connect": "1s"}),
          pytest.raises(UsageError, match="cannot reach the Dask scheduler")):
        map_partitions(_weighted_sum, PARTS, shared=SHARED,
                       scheduler=f"tcp://127.0.0.1:{free_port()}")
    with pytest.raises(UsageError, match="not both"):
        map_partitions(_weighted_sum, PARTS, scheduler="tcp://127.0.0.1:1", workers=2)
