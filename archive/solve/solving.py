"""Solving a run's inputs: node partitions in turn (or on Dask), then one finished table.

Each partition of nodes (:func:`archive.solve.inputs.partitions`) is solved by
:func:`archive.solve.engine.solve_fixes` without finishing; the partitions' rows, with
any rows reused from earlier runs (:mod:`archive.solve.reuse`), are put in the run's sort
order and finished together: the pooled error model is fitted on every row of the run at
once (:mod:`archive.solve.pooled`). So the positions do not depend on how the nodes were
partitioned, where they were solved, or which of them were solved in an earlier run.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from types import SimpleNamespace
from typing import Any

import pyarrow as pa
import pyarrow.compute as pc

from archive.edits.spans import manifest_spans
from archive.progress import Progress
from archive.solve.inputs import (
    Partition,
    SolveInputs,
    load_fix_arrays,
    partitions,
    solve_threads,
)
from archive.solve.schema import SORT_KEYS as RUN_ORDER
from archive.store.archive import Archive

SORT_KEYS = RUN_ORDER


def solve_inputs(arc: Archive, manifest: dict[str, Any], inp: SolveInputs,
                 progress: Progress, *, scheduler: str | None = None,
                 workers: int | None = None, skip: set[str] | None = None,
                 reused: pa.Table | None = None
                 ) -> tuple[pa.Table, dict[str, Any], pa.Table]:
    """Solve the manifest's inputs partition by partition (nodes): the finished positions,
    the run's counts, and the unfinished rows in the run's order (what a later run reuses).

    The nodes of ``skip`` are not solved: their unfinished rows are ``reused``. With a Dask
    ``scheduler`` address or a number of local ``workers``, the partitions are solved on
    Dask by :func:`solve_partition` (see :mod:`archive.scale.distributed`).
    """
    parts = partitions(arc, inp, skip=skip)
    progress.start(sum(p.n_fixes for p in parts), "fixes", "solving")
    try:
        if scheduler or workers:
            results = _map_distributed(arc, manifest, inp, parts, progress, scheduler, workers)
        else:
            results = _map_local(arc, manifest, inp, parts, progress)
    finally:
        progress.close()
    stats: dict[str, Any] = {}
    for _, st in results:
        _add_stats(stats, st)
    unfinished = unfinished_rows([pos for pos, _ in results], manifest, reused)
    table, more = finish_rows(unfinished, manifest)
    return table, stats | more, unfinished


def _engine_loader() -> Callable[..., None]:
    """Start importing the engine (numba, scipy, pyproj) and loading its compiled kernels
    on a thread of its own; returns a function that waits until that is done. The
    partitions' fixes are read meanwhile: reading mostly runs outside the interpreter's
    lock, importing inside it, so on two cores the two overlap. A thread solving waits
    for the loader before it imports the engine itself (no two threads import it at
    once). ``wait(check=False)`` only waits, without raising the loader's error."""
    failed: list[BaseException] = []

    def load() -> None:
        try:
            from archive.solve.engine import warm_up

            warm_up()
        except Exception as exc:  # noqa: BLE001 - re-raised where the engine is needed
            failed.append(exc)

    thread = threading.Thread(target=load, name="nodekeep-engine-loader", daemon=True)
    thread.start()

    def wait(check: bool = True) -> None:
        thread.join()
        if failed and check:
            raise failed[0]

    return wait


def _map_local(arc: Archive, manifest: dict[str, Any], inp: SolveInputs,
               parts: list[Partition], progress: Progress
               ) -> list[tuple[pa.Table, dict[str, Any]]]:
    """Solve the partitions in this process, on up to :func:`solve_threads` threads at
    once (the kernels, numpy and Parquet decoding release the GIL; each thread opens the
    elevation model for itself, a raster handle is not shared between threads). The
    engine is loaded while the first partitions are read (:func:`_engine_loader`)."""
    epsg = manifest["survey"]["crs_epsg"]
    if not parts:  # nothing to solve (every node reused): no engine to load
        return []
    engine_ready = _engine_loader()
    try:
        return _solve_parts(arc, parts, inp, manifest, progress, epsg, engine_ready)
    finally:
        # never leave the loader importing compiled code when the command ends (an error,
        # or nothing solved): a process exiting under it can abort in the compiler's
        # library ("terminate called without an active exception")
        engine_ready(check=False)


def _solve_parts(arc: Archive, parts: list[Partition], inp: SolveInputs,
                 manifest: dict[str, Any], progress: Progress, epsg: int,
                 engine_ready: Callable[..., None]) -> list[tuple[pa.Table, dict[str, Any]]]:
    """The partitions solved on up to :func:`solve_threads` threads (see :func:`_map_local`)."""

    def one(part: Partition) -> tuple[pa.Table, dict[str, Any]]:
        dem = inp.open_dem(arc)
        try:
            return _solve_part(arc, part, inp, manifest, _height_sampler(dem, epsg),
                               engine_ready)
        finally:
            if dem is not None:
                dem.close()

    threads = min(solve_threads(), len(parts))
    if threads <= 1:
        out = []
        for part in parts:
            out.append(one(part))
            progress.advance(part.n_fixes, f"{len(part.nodes)} nodes")
        return out
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=threads) as pool:
        futures = [pool.submit(one, part) for part in parts]
        out = []
        for part, fut in zip(parts, futures, strict=True):  # in partition order
            out.append(fut.result())
            progress.advance(part.n_fixes, f"{len(part.nodes)} nodes")
    return out


def _height_sampler(dem: Any, epsg: int):
    """The elevation model sampled at survey-CRS coordinates (None without a model)."""
    if dem is None:
        return None

    def sampler(x, y):
        return dem.sample(x, y, epsg)

    return sampler


def _solve_part(holder: Any, part: Partition, inp: SolveInputs, manifest: dict[str, Any],
                sampler: Any, engine_ready: Callable[[], None] | None = None
                ) -> tuple[pa.Table, dict[str, Any]]:
    """Solve one node partition; ``holder`` has the ``objects`` store to read fixes from.
    ``engine_ready`` waits for the engine being loaded meanwhile (:func:`_engine_loader`)."""
    survey = manifest["survey"]
    fixes = load_fix_arrays(holder, part.fix_hashes)
    if engine_ready is not None:
        engine_ready()
    from archive.solve.engine import solve_fixes

    out = solve_fixes(fixes, part.deployments, inp.stations, manifest["params"],
                      survey["crs_epsg"], excludes=manifest_spans(manifest["edits"]),
                      sampler=sampler, orthometric=_orthometric(survey),
                      detect_unlogged=inp.detect_unlogged, used=inp.used, finish=False)
    del fixes
    pos = out.positions
    if inp.station_keys is not None:
        pos = inp.keep_selected(pos)
    return pos, out.stats


def _add_stats(total: dict[str, Any], more: dict[str, Any]) -> None:
    for k, v in more.items():
        total[k] = total.get(k, 0) + v


def unfinished_rows(tables: list[pa.Table], manifest: dict[str, Any],
                    reused: pa.Table | None = None) -> pa.Table:
    """The partitions' rows (and rows ``reused`` from earlier runs) as one table in the
    run's sort order, without the columns the manifest's parameters predate
    (:func:`~archive.solve.schema.conform_positions`), still with the pooled model's
    working columns when it has them."""
    from archive.solve.schema import POSITION_SCHEMA, conform_positions

    tables = [t for t in tables if t.num_rows] or tables[:1]
    if reused is not None and reused.num_rows:
        if tables:
            schema = tables[0].schema
            reused = reused.select(schema.names).cast(schema)
        tables = [*tables, reused]
    table = pa.concat_tables(tables) if tables else POSITION_SCHEMA.empty_table()
    table = conform_positions(table, manifest["params"])
    return table.take(pc.sort_indices(table, sort_keys=SORT_KEYS)).combine_chunks()


def finish_rows(table: pa.Table, manifest: dict[str, Any]) -> tuple[pa.Table, dict[str, Any]]:
    """The run's positions from its unfinished rows, in the schema of the manifest's format
    (format 1 runs have no occupation columns, format 2 runs none of the part and
    uncertainty columns of format 3). With the pooled uncertainty the error model is
    fitted here, on every row of the run at once (:mod:`archive.solve.pooled`); it goes to
    the run summary."""
    from archive.solve.pooled import WORK, finish
    from archive.solve.schema import POSITION_SCHEMA_V1, POSITION_SCHEMA_V2

    more: dict[str, Any] = {}
    if all(c in table.column_names for c in WORK):
        table, model = finish(table, manifest["params"], manifest["survey"]["crs_epsg"])
        more["noise_model"] = model.as_dict()
    fmt = manifest.get("format", 1)
    if fmt < 3:
        schema = POSITION_SCHEMA_V1 if fmt < 2 else POSITION_SCHEMA_V2
        table = table.select(schema.names).cast(schema)
    return table, more


def solve_partition(part: Partition, shared: tuple[str, SolveInputs, dict[str, Any]]
                    ) -> tuple[pa.Table, dict[str, Any]]:
    """Solve one node partition anywhere (a Dask worker): ``shared`` is (object store URL,
    inputs, manifest). Reads the store read-only and opens the elevation model by hash."""
    from archive.store.objects import ObjectStore

    objects_url, inp, manifest = shared
    holder = SimpleNamespace(objects=ObjectStore(objects_url, read_only=True))
    dem = inp.open_dem(holder)
    try:
        return _solve_part(holder, part, inp, manifest,
                           _height_sampler(dem, manifest["survey"]["crs_epsg"]))
    finally:
        if dem is not None:
            dem.close()


def _map_distributed(arc: Archive, manifest: dict[str, Any], inp: SolveInputs,
                     parts: list[Partition], progress: Progress, scheduler: str | None,
                     workers: int | None) -> list[tuple[pa.Table, dict[str, Any]]]:
    from archive.scale.distributed import map_partitions

    return map_partitions(solve_partition, parts, shared=(arc.objects_url, inp, manifest),
                          scheduler=scheduler, workers=workers,
                          weights=[p.n_fixes for p in parts], progress=progress)


def _orthometric(survey: dict[str, Any]):
    try:
        from archive.survey.heights import gnss_orthometric
    except ImportError:
        return None
    conv = SimpleNamespace(height_mode=survey.get("height_mode", "gga"),
                           height_param=survey.get("height_param", ""))

    def orth(lon, lat, h_ell, h_msl, sep):
        return gnss_orthometric(lon, lat, h_ell, h_msl, sep, conv)

    return orth


def combine(tables: list[pa.Table], manifest: dict[str, Any]
            ) -> tuple[pa.Table, dict[str, Any]]:
    """Partitions' unfinished rows as the run's finished positions (:func:`unfinished_rows`
    then :func:`finish_rows`)."""
    return finish_rows(unfinished_rows(tables, manifest), manifest)
