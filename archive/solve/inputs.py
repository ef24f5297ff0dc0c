"""What a solve reads from the archive, and how it is cut into node partitions.

:func:`survey_inputs` gathers the current input versions (or, for a recompute, exactly the
objects a manifest names), the fix tables of the raw files of the selected nodes and the
exclude-span edits in force. :func:`partitions` groups the fix tables by node into
partitions of bounded size: nodes are independent in the solver (windows, clusters and moves
are per node), so solving partition by partition gives the same table as solving all at
once while memory stays bounded.
"""

from __future__ import annotations

import json
from collections.abc import Sequence
from dataclasses import dataclass, field
from datetime import UTC, timedelta
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from sqlalchemy import select

from archive.edits.log import exclude_spans_in_force
from archive.errors import UsageError
from archive.ingest.schema import conform_fixes
from archive.solve.fixarrays import FixArrays, empty_fixes, fix_arrays, read_fix_arrays
from archive.solve.parts import used_indices
from archive.store.archive import Archive
from archive.store.models import InputVersion, RawFile, Survey
from archive.survey.inputs import require_input
from archive.survey.occupations import EPOCH, with_occupations
from archive.times import us_array

PARTITION_FIXES = 1_000_000
"""Most fixes of one partition: its arrays and working copies take about 500 bytes a fix,
and :func:`solve_threads` partitions are in flight at once."""
MIN_PARTITION_FIXES = 200_000  # below this a partition's fixed costs dominate


def solve_threads() -> int:
    """Partitions solved at once in one process: the cores this process may use, at most
    2 (each partition in flight holds its fixes in memory), or ``NODEKEEP_SOLVE_THREADS``."""
    import os

    env = os.environ.get("NODEKEEP_SOLVE_THREADS", "").strip()
    if env.isdigit() and int(env) > 0:
        return int(env)
    cores = len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else \
        (os.cpu_count() or 1)
    return max(1, min(cores, 2))


def partition_limit(total: int, threads: int | None = None) -> int:
    """Fixes per partition for a solve of ``total`` fixes: enough partitions to keep
    every thread busy (two per thread), none above :data:`PARTITION_FIXES`."""
    threads = threads or solve_threads()
    share = -(-total // (2 * threads)) if total else 0
    return min(PARTITION_FIXES, max(MIN_PARTITION_FIXES, share))


@dataclass
class Partition:
    """Nodes solved together, their fix objects and deployments."""

    nodes: list[str]
    fix_hashes: list[str]
    n_fixes: int
    deployments: pa.Table


@dataclass
class SolveInputs:
    """Everything a solve reads, with the hashes the manifest records."""

    survey: dict[str, Any]
    stations: pa.Table
    stations_hash: str
    deployments: pa.Table
    deployments_hash: str
    dem_hash: str | None
    dem_datum: str
    versions: dict[str, int | None]
    fix_files: list[tuple[str, str, int]]  # (node, fixes hash, n_fixes)
    edits: list[dict[str, Any]]
    station_keys: set[tuple[float, float]] | None = None
    detect_unlogged: bool = True
    extra: dict[str, Any] = field(default_factory=dict)
    used: pa.Table | None = None  # point indices in use per line/point (archive.solve.parts)

    @property
    def fix_hashes(self) -> list[str]:
        """Distinct fix object hashes read."""
        return sorted({h for _, h, _ in self.fix_files})

    def keep_selected(self, pos: pa.Table) -> pa.Table:
        """Rows of the selected stations only."""
        if self.station_keys is None:
            return pos
        lines, points = pos["line"].to_pylist(), pos["point"].to_pylist()
        mask = [(a, b) in self.station_keys for a, b in zip(lines, points, strict=True)]
        return pos.filter(pa.array(mask, pa.bool_()))

    def open_dem(self, arc: Archive):
        """A sampler over the elevation model named by hash, or None."""
        if self.dem_hash is None:
            return None
        from archive.survey.dem import sampler_for

        return sampler_for(arc, self.dem_hash, self.dem_datum)


def _current(arc: Archive, survey_id: int, kind: str) -> InputVersion | None:
    with arc.session() as s:
        return s.scalars(select(InputVersion).where(
            InputVersion.survey_id == survey_id, InputVersion.kind == kind)
            .order_by(InputVersion.version.desc()).limit(1)).first()


def _by_hash(arc: Archive, survey_id: int, kind: str, h: str | None,
             version: int | None = None) -> InputVersion | None:
    """The input version a run read: the ``version`` its manifest names when that version
    holds the hash (two versions may hold the same table with different notes kept beside
    it, such as the point indices later parts keep), else the oldest that holds it."""
    if h is None:
        return None
    with arc.session() as s:
        if version is not None:
            v = s.scalars(select(InputVersion).where(
                InputVersion.survey_id == survey_id, InputVersion.kind == kind,
                InputVersion.version == int(version))).first()
            if v is not None and h in (v.table_hash, v.source_hash):
                return v
        return s.scalars(select(InputVersion).where(
            InputVersion.survey_id == survey_id, InputVersion.kind == kind,
            (InputVersion.table_hash == h) | (InputVersion.source_hash == h))
            .order_by(InputVersion.version).limit(1)).first()


def _survey_dict(s: Survey) -> dict[str, Any]:
    return {"id": s.id, "name": s.name, "crs_epsg": s.crs_epsg,
            "height_mode": s.height_mode or "gga", "height_param": s.height_param or "",
            "vertical_datum": s.vertical_datum or ""}


def _select(dep: pa.Table, selection: dict[str, Any]) -> tuple[pa.Table, set | None]:
    keys = None
    if selection.get("stations"):
        keys = {(float(a), float(b)) for a, b in selection["stations"]}
        mask = [(a, b) in keys for a, b in zip(dep["line"].to_pylist(),
                                               dep["point"].to_pylist(), strict=True)]
        dep = dep.filter(pa.array(mask, pa.bool_()))
    if selection.get("nodes"):
        dep = dep.filter(pc.is_in(dep["node"], value_set=pa.array(selection["nodes"])))
    return dep, keys


def _names(items: list[str], limit: int = 8) -> str:
    more = f" and {len(items) - limit} more" if len(items) > limit else ""
    return ", ".join(items[:limit]) + more


def check_selection(deployments: pa.Table, stations: pa.Table,
                    selection: dict[str, Any]) -> None:
    """Refuse a selection that names a station or a node the deployment log does not have,
    or whose stations and nodes never met: :class:`UsageError` names every one, so a typo
    never records an empty run."""
    from archive.survey.keys import station_text

    logged = set(zip(deployments["line"].to_pylist(), deployments["point"].to_pylist(),
                     strict=True))
    planned = set(zip(stations["line"].to_pylist(), stations["point"].to_pylist(),
                      strict=True))
    wanted = [(float(a), float(b)) for a, b in selection.get("stations") or []]
    unknown = [k for k in wanted if k not in logged]
    if unknown:
        not_planned = [station_text(*k) for k in unknown if k not in planned]
        not_laid = [station_text(*k) for k in unknown if k in planned]
        what = "; ".join(
            [f"not in the preplot: {_names(not_planned)}"] * bool(not_planned)
            + [f"in the preplot but never deployed: {_names(not_laid)}"] * bool(not_laid))
        raise UsageError(f"--stations: {len(unknown)} of {len(wanted)} station(s) cannot be "
                         f"solved ({what})",
                         hint="give stations of the deployment log as LINE:POINT "
                              "('nodekeep inputs' shows the current deployment log)")
    nodes = list(selection.get("nodes") or [])
    known_nodes = set(deployments["node"].to_pylist())
    missing = [n for n in nodes if n not in known_nodes]
    if missing:
        raise UsageError(f"--nodes: {len(missing)} of {len(nodes)} serial(s) are not in the "
                         f"deployment log: {_names(missing)}",
                         hint="give serials exactly as the deployment log has them "
                              "('nodekeep logs' lists the nodes with logs)")
    if wanted and nodes:
        both = [(float(a), float(b)) in set(wanted) and n in set(nodes) for a, b, n in
                zip(deployments["line"].to_pylist(), deployments["point"].to_pylist(),
                    deployments["node"].to_pylist(), strict=True)]
        if not any(both):
            raise UsageError("--stations and --nodes select nothing together: none of these "
                             "nodes was deployed at any of these stations",
                             hint="give one of the two, or a node deployed at the station")


def survey_inputs(arc: Archive, survey_id: int, selection: dict[str, Any], *,
                  manifest: dict[str, Any] | None = None) -> SolveInputs:
    """The inputs of a solve: current versions, or those a ``manifest`` names."""
    with arc.session() as s:
        survey = s.get(Survey, survey_id)
        if survey is None:
            raise UsageError(f"no survey with id {survey_id}")
        sdict = _survey_dict(survey)
    if manifest is None:
        st_v = require_input(arc, survey_id, "stations", "there is nothing to solve for")[0]
        dep_v = require_input(arc, survey_id, "deployments", "no fix belongs to a station")[0]
        dem_v = _current(arc, survey_id, "dem")
        st_hash, dep_hash = st_v.table_hash, dep_v.table_hash
        dem_hash = dem_v.source_hash if dem_v is not None else None
        edits = exclude_spans_in_force(arc, survey_id)
    else:
        sdict = manifest["survey"]
        ins = manifest["inputs"]
        st_hash, dep_hash, dem_hash = ins["stations"], ins["deployments"], ins["dem"]
        recorded = manifest.get("input_versions") or {}
        st_v, dep_v = (_by_hash(arc, survey_id, "stations", st_hash, recorded.get("stations")),
                       _by_hash(arc, survey_id, "deployments", dep_hash,
                                recorded.get("deployments")))
        dem_v = _by_hash(arc, survey_id, "dem", dem_hash, recorded.get("dem"))
        edits = manifest["edits"]
    stations = arc.objects.read_table(st_hash)
    # occupations are numbered over the whole log, before any selection or partition
    dep_all = with_occupations(arc.objects.read_table(dep_hash))
    if manifest is None:  # a recompute reads the selection its run recorded, as it was
        check_selection(dep_all, stations, selection)
    deployments, keys = _select(dep_all, selection)
    if keys is not None and deployments.num_rows == 0:
        raise UsageError("none of the selected stations is in the deployment log",
                         hint="give stations as LINE:POINT, e.g. 1001:2001")
    nodes = set(deployments["node"].to_pylist()) | set(selection.get("nodes") or [])
    with arc.session() as s:
        q = select(RawFile.node, RawFile.fixes_hash, RawFile.n_fixes, RawFile.t_first,
                   RawFile.t_last).where(RawFile.survey_id == survey_id,
                                         RawFile.fixes_hash.is_not(None))
        rows = s.execute(q.order_by(RawFile.node, RawFile.id)).all()
    if manifest is not None:
        wanted = set(manifest["inputs"]["fixes"])
        rows = [r for r in rows if r[1] in wanted]
        files = [(n, h, c) for n, h, c, _, _ in rows]
        missing = wanted - {h for _, h, _ in files}
        files += [("", h, 0) for h in sorted(missing)]  # read them anyway: same result
    else:
        restrict = keys is not None or bool(selection.get("nodes"))
        rows = [r for r in rows if not restrict or r[0] in nodes]
        files = [(n, h, c) for n, h, c, _, _ in rows]
    deployments = with_coverage(deployments, rows)
    datum = json.loads(dem_v.meta or "{}").get("vertical_datum", "") if dem_v else ""
    occupations = (json.loads(dep_v.meta or "{}").get("occupations") or {}) if dep_v else {}
    retired = occupations.get("retired") or []
    later_parts = _later_parts(dep_v, occupations, st_v)
    return SolveInputs(
        survey=sdict, stations=stations, stations_hash=st_hash, deployments=deployments,
        deployments_hash=dep_hash, dem_hash=dem_hash, dem_datum=datum,
        versions={"stations": st_v.version if st_v else None,
                  "deployments": dep_v.version if dep_v else None,
                  "dem": dem_v.version if dem_v else None},
        fix_files=files, edits=edits, station_keys=keys,
        used=used_indices(dep_all, stations, retired, later_parts))


def _later_parts(dep_v: InputVersion | None, occupations: dict[str, Any],
                 st_v: InputVersion | None) -> list[dict[str, Any]]:
    """The indices moved nodes' later parts keep (as delivered), as the deployment log's and
    the preplot's versions keep them (each read them from the deliveries when it was
    loaded); where both name a part, the version loaded later says."""
    got = [(v, parts) for v, parts in (
        (dep_v, occupations.get("later_parts") or []),
        (st_v, json.loads(st_v.meta or "{}").get("later_parts") or [] if st_v else []))
        if v is not None and parts]
    got.sort(key=lambda vp: (vp[0].created_at, vp[0].id))
    kept: dict[tuple[float, float, int], dict[str, Any]] = {}
    for _, parts in got:
        kept.update({(p["line"], p["point"], p["occupation"]): p for p in parts})
    return [kept[k] for k in sorted(kept)]


def with_coverage(deployments: pa.Table, logs: Sequence[Any]) -> pa.Table:
    """``deployments`` with a ``covered`` column: a loaded log of the node overlaps the
    deployment's window (:func:`archive.survey.harvest.covered`; ``logs`` are catalog rows
    (node, fixes hash, fixes, first fix time, last fix time) of the raw files solved)."""
    from archive.survey.harvest import OPEN, covered

    def us(t: Any) -> int:
        return OPEN if t is None else _utc_us(t)

    flag = covered(np.array(deployments["node"].to_pylist(), dtype=object),
                   us_array(deployments["deployed"], OPEN),
                   us_array(deployments["retrieved"], OPEN),
                   np.array([r[0] for r in logs], dtype=object),
                   np.array([us(r[3]) for r in logs], dtype=np.int64),
                   np.array([us(r[4]) for r in logs], dtype=np.int64))
    if "covered" in deployments.column_names:
        deployments = deployments.drop_columns(["covered"])
    return deployments.append_column("covered", pa.array(flag, pa.bool_()))


def _utc_us(t: Any) -> int:
    """A catalog time (aware, or naive UTC from SQLite) as integer microseconds."""
    if t.tzinfo is None:
        t = t.replace(tzinfo=UTC)
    return (t - EPOCH) // timedelta(microseconds=1)


def partitions(arc: Archive, inp: SolveInputs, limit: int | None = None, *,
               skip: set[str] | None = None) -> list[Partition]:
    """Node partitions of at most about ``limit`` fixes (a node is never split; by default
    :func:`partition_limit` of the fixes to solve); the nodes of ``skip`` (solved in an
    earlier run, :mod:`archive.solve.reuse`) are left out."""
    skip = skip or set()
    if limit is None:
        limit = partition_limit(sum(n or 0 for node, _, n in inp.fix_files
                                    if node not in skip))
    by_node: dict[str, list[tuple[str, int]]] = {}
    for node, h, n in inp.fix_files:
        if node not in skip:
            by_node.setdefault(node, []).append((h, n))
    dep_nodes = np.array(inp.deployments["node"].to_pylist(), dtype=object)
    skipped = np.array([n in skip for n in dep_nodes], dtype=bool)  # one per record
    out: list[Partition] = []
    cur_nodes: list[str] = []
    cur_h: list[str] = []
    cur_n = 0

    def flush() -> None:
        nonlocal cur_nodes, cur_h, cur_n
        mask = np.isin(dep_nodes, np.array(cur_nodes, dtype=object)) if cur_nodes else \
            np.zeros(len(dep_nodes), dtype=bool)
        # fix objects in load order (raw_files.id within each node): the overlap rule of
        # archive.ingest.overlap reads the load order from the order of the tables
        out.append(Partition(cur_nodes, list(dict.fromkeys(cur_h)), cur_n,
                             inp.deployments.filter(pa.array(mask, pa.bool_()))))
        cur_nodes, cur_h, cur_n = [], [], 0

    for node in sorted(by_node):
        files = by_node[node]
        cur_nodes.append(node)
        cur_h += [h for h, _ in files]
        cur_n += sum(n or 0 for _, n in files)
        if cur_n >= limit:
            flush()
    if cur_nodes or not out:
        flush()
    solved = set(by_node)
    lonely = np.array([n not in solved for n in dep_nodes], dtype=bool) & ~skipped
    if lonely.any():  # deployments whose node has no fixes: unoccupied rows
        out.append(Partition([], [], 0, inp.deployments.filter(pa.array(lonely, pa.bool_()))))
    return out


def load_fix_tables(arc: Archive, hashes: list[str]) -> pa.Table:
    """The fix tables of these objects, concatenated in the order given (schema of the
    ingest contract, ``raw_hash`` dictionary-encoded: a 64-character hash repeated on every
    fix of a raw file would be most of the table's memory). Give them in load order:
    repeated epochs keep the earlier file's fix."""
    if not hashes:
        return empty_fixes()
    tables = []
    for h in hashes:
        t = conform_fixes(arc.objects.read_table(h))  # tables of every version read alike
        i = t.schema.get_field_index("raw_hash")
        tables.append(t.set_column(i, "raw_hash", pc.dictionary_encode(t["raw_hash"])))
    return pa.concat_tables(tables, promote_options="default")


def load_fix_arrays(arc: Any, hashes: list[str]) -> FixArrays:
    """The solver's arrays of these fix tables (in load order,
    :func:`archive.solve.fixarrays.read_fix_arrays`); ``arc`` has the ``objects`` store.
    Each object is read once into memory and checked against its hash on those bytes,
    several at once."""
    if not hashes:
        return fix_arrays(empty_fixes())
    from archive.solve.fixarrays import DICTIONARY_COLUMNS, READERS

    def opened(h: str) -> Any:  # hashed as read (custody), GIL released
        return arc.objects.parquet_in_memory(h, read_dictionary=DICTIONARY_COLUMNS)

    if len(hashes) < 2:
        return read_fix_arrays([opened(h) for h in hashes])
    from concurrent.futures import ThreadPoolExecutor

    with ThreadPoolExecutor(max_workers=min(READERS, len(hashes))) as pool:
        files = list(pool.map(opened, hashes))
    return read_fix_arrays(files)


def check_objects(arc: Archive, manifest: dict[str, Any], *, rehash: bool = True) -> None:
    """Every input object of a manifest exists (and, with ``rehash``, its bytes still match
    its hash); :class:`~archive.errors.ObjectDamaged` names the first that does not and what
    it belongs to (node and file, or survey input and version)."""
    ins = manifest["inputs"]
    hashes = [ins.get("stations"), ins.get("deployments"), ins.get("dem"),
              *(ins.get("fixes") or [])]
    for h in hashes:
        if h:
            arc.objects.require(h, rehash=rehash)
