"""Independent partitions of a job, run here or on Dask distributed, results in order.

:func:`map_partitions` calls ``func(partition, shared)`` for every partition and returns the
results in partition order, whoever computed them: this process (the default), a local
cluster of ``workers`` processes, or an existing Dask scheduler (``tcp://host:port``). Work
is cut so that partitions are independent (for the solve: groups of nodes), so the results
do not depend on where or in which order they were computed, and a worker only ever holds
one partition's data at a time.

``shared`` (tables every partition needs, such as the preplot) is sent to the workers once.
Functions and partitions travel by pickle: ``func`` must be a module-level function, and
what a partition names (object hashes, a store URL) must be reachable from the workers —
objects on S3, or a folder every worker mounts at the same path.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable, Iterator, Sequence
from contextlib import contextmanager
from typing import Any, TypeVar

from archive.errors import UsageError
from archive.progress import NoProgress, Progress

P = TypeVar("P")
R = TypeVar("R")

ENV_SCHEDULER = "NODEKEEP_SCHEDULER"


def _require_distributed() -> None:
    try:
        import distributed  # noqa: F401
    except ImportError as exc:  # pragma: no cover - the scale extra is part of the test deps
        raise UsageError("distributed solving needs Dask distributed",
                         hint="pip install 'nodekeep[scale]'") from exc


@contextmanager
def dask_client(scheduler: str | None = None, workers: int | None = None,
                processes: bool = True) -> Iterator[Any]:
    """A Dask client on ``scheduler``, or on a new local cluster of ``workers`` workers.

    The local cluster (one thread per worker, ``processes`` False for threads in this
    process) is closed with the client.
    """
    _require_distributed()
    from distributed import Client, LocalCluster

    if scheduler and workers:
        raise UsageError("give either a scheduler address or a number of local workers, not both")
    if scheduler:
        try:
            # waits up to dask's distributed.comm.timeouts.connect (DASK_ env or config)
            client = Client(scheduler)
        except OSError as exc:
            raise UsageError(f"cannot reach the Dask scheduler at {scheduler}: {exc}",
                             hint="check the address (tcp://HOST:PORT) and that the scheduler "
                                  "is running ('dask scheduler')") from None
        try:
            yield client
        finally:
            client.close()
        return
    if not workers or workers < 1:
        raise UsageError("a local cluster needs at least one worker")
    where = {"host": "127.0.0.1"} if processes else {}  # threads talk in-process
    cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=processes,
                           dashboard_address=None, **where)
    client = Client(cluster)
    try:
        yield client
    finally:
        client.close()
        cluster.close()


def map_partitions(func: Callable[[P, Any], R], partitions: Sequence[P], *, shared: Any = None,
                   scheduler: str | None = None, workers: int | None = None,
                   processes: bool = True, weights: Sequence[int] | None = None,
                   progress: Progress | None = None, client: Any = None) -> list[R]:
    """``[func(p, shared) for p in partitions]``, computed here or on Dask; same order.

    ``scheduler``: address of a running Dask scheduler; ``workers``: size of a local cluster
    started for this call (``processes`` False keeps its workers as threads of this process);
    ``client``: an existing Dask client to use instead. With none of them the partitions run
    one after another in this process. ``weights`` (e.g. fixes per partition) drive
    ``progress``; an exception raised by ``func`` is raised here.
    """
    progress = progress or NoProgress()
    weights = list(weights) if weights is not None else [1] * len(partitions)
    if len(weights) != len(partitions):
        raise ValueError("one weight per partition")
    scheduler = scheduler or None
    if client is None and scheduler is None and not workers:
        out = []
        for p, w in zip(partitions, weights, strict=True):
            out.append(func(p, shared))
            progress.advance(w)
        return out
    if client is not None:
        return _run_on(client, func, partitions, shared, weights, progress)
    with dask_client(scheduler, workers, processes) as c:
        return _run_on(c, func, partitions, shared, weights, progress)


def _run_on(client: Any, func: Callable[[P, Any], R], partitions: Sequence[P], shared: Any,
            weights: list[int], progress: Progress) -> list[R]:
    from distributed import as_completed

    if not partitions:
        return []
    shared_f = client.scatter(shared, broadcast=True) if shared is not None else None
    tag = uuid.uuid4().hex[:12]
    futures = [client.submit(func, p, shared_f, pure=False, key=f"nodekeep-part-{tag}-{i}")
               for i, p in enumerate(partitions)]
    index = {f.key: i for i, f in enumerate(futures)}
    results: list[Any] = [None] * len(futures)
    try:
        for fut in as_completed(futures):
            i = index[fut.key]
            results[i] = fut.result()  # re-raises the worker's exception here
            progress.advance(weights[i])
            fut.release()
    finally:
        for fut in futures:
            fut.cancel()
    return results
