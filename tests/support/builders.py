"""Archives with hand-built runs for delivery tests (the invented Kestrel Flats 3D survey).

A run here is built the way the custody rules say a run is stored: positions table and
manifest as objects, then one transaction with the Run row and its ledger event. Raw files
are stored byte for byte with a parsed fixes table, as the loader stores them.
"""

from __future__ import annotations

from datetime import UTC, datetime, timedelta
from pathlib import Path

import numpy as np
import pyarrow as pa

from archive.ingest.schema import FIX_SCHEMA_V1, conform_fixes
from archive.solve.schema import POSITION_SCHEMA
from archive.store.archive import Archive
from archive.store.hashing import canonical_hash, canonical_json, table_digest
from archive.store.models import RawFile, Run, Survey, utcnow
from archive.survey.inputs import load_input
from tests.support.delivery_tables import final_table


def survey_id(arc: Archive) -> int:
    with arc.session() as s:
        return arc.survey(s).id


def load_stations(arc: Archive, tmp: Path, table: pa.Table) -> None:
    """Load the preplot, check points at the first two stations and the deployment log."""
    sid = survey_id(arc)
    d = table.to_pydict()
    lines = ["line,point,easting,northing,elevation"]
    lines += [f"{d['line'][i]:.0f},{d['point'][i]:.0f},{d['easting'][i] + 1.5:.2f},"
              f"{d['northing'][i] - 1.0:.2f},{d['height'][i] + 0.3:.2f}"
              for i in range(table.num_rows)]
    (tmp / "preplot.csv").write_text("\n".join(lines) + "\n")
    load_input(arc, sid, "stations", tmp / "preplot.csv")
    ctrl = ["line,point,easting,northing,height,sigma_e,sigma_n"]
    ctrl += [f"{d['line'][i]:.0f},{d['point'][i]:.0f},{d['easting'][i] + 0.4:.3f},"
             f"{d['northing'][i] - 0.2:.3f},{d['height'][i] - 0.1:.3f},0.02,0.02"
             for i in range(2)]
    (tmp / "control.csv").write_text("\n".join(ctrl) + "\n")
    load_input(arc, sid, "control", tmp / "control.csv")
    # node N5000+i at the i-th station, 2024-03-10 to 2024-03-14 (the last still deployed)
    dep = ["node,line,point,deployed_utc,retrieved_utc"]
    dep += [f"{d['node'][i]},{d['line'][i]:.0f},{d['point'][i]:.0f},2024-03-10T00:00:00Z,"
            + ("2024-03-14T12:00:00Z" if i < table.num_rows - 1 else "")
            for i in range(table.num_rows)]
    (tmp / "deployments.csv").write_text("\n".join(dep) + "\n")
    load_input(arc, sid, "deployments", tmp / "deployments.csv")


def add_raw_file(arc: Archive, sid: int, node: str, name: str, lat: float, lon: float) -> str:
    """Store a small raw NMEA-like log and its fixes table; returns the fixes object hash."""
    raw = (f"# node {node} log\n" + "".join(
        f"$GPGGA,0000{i:02d},...,{node}\n" for i in range(5))).encode()
    raw_hash, raw_size = arc.objects.put_bytes(raw)
    t0 = datetime(2024, 3, 10, tzinfo=UTC)
    n = 5
    fixes = conform_fixes(pa.table({
        "node": [node] * n, "time": [t0 + timedelta(seconds=30 * i) for i in range(n)],
        "lat": [lat] * n, "lon": [lon] * n, "h_ell": [400.0] * n, "h_msl": [420.0] * n,
        "geoid_sep": [-20.0] * n, "quality": [1] * n, "fix_type": [3] * n,
        "valid": [True] * n, "n_sats": [9] * n, "pdop": [1.5] * n, "hdop": [0.9] * n,
        "vdop": [1.2] * n, "raw_hash": [raw_hash] * n, "raw_line": list(range(2, 2 + n)),
    }, schema=FIX_SCHEMA_V1))
    fixes_hash, fixes_size = arc.objects.put_table(fixes)
    with arc.transaction() as tx:
        arc.register_object(tx, raw_hash, raw_size, "raw")
        arc.register_object(tx, fixes_hash, fixes_size, "fixes")
        row = RawFile(survey_id=sid, object_hash=raw_hash, original_name=name, node=node,
                      format="nmea", size=raw_size, received_at=utcnow(),
                      received_by=arc.actor, parser="test", n_lines=6, n_accepted=5,
                      n_rejected=0, n_ignored=1, n_fixes=n, n_valid=n, t_first=t0,
                      t_last=t0 + timedelta(seconds=120), fixes_hash=fixes_hash)
        tx.add(row)
        arc.log(tx, "load.fixes", {"raw": raw_hash}, survey_id=sid, rows=[row])
    return fixes_hash


def positions_table(final: pa.Table, flags: list[str] | None = None,
                    shift: float = 0.0) -> pa.Table:
    """A POSITION_SCHEMA table with one delivered row per station of ``final``."""
    n = final.num_rows
    d = final.to_pydict()
    nan = [None] * n
    cols = {
        "line": d["line"], "point": d["point"], "index": d["index"], "node": d["node"],
        "kind": ["logged"] * n, "part": [0] * n, "delivered": [True] * n,
        "t_start": [t - timedelta(days=3) for t in d["t_end"]], "t_end": d["t_end"],
        "easting": list(np.array(d["easting"]) + shift), "northing": d["northing"],
        "lat": nan, "lon": nan, "height": d["height"], "height_source": d["height_source"],
        "h_gnss": nan, "h_model": d["height"], "dh": nan, "sigma_e": d["sigma_e"],
        "sigma_n": d["sigma_n"], "corr_en": [0.0] * n, "ell_major": nan, "ell_minor": nan,
        "ell_bearing": nan, "r95": d["r95"], "sigma_h": nan, "n_total": d["n_used"],
        "n_used": d["n_used"], "n_rejected": d["n_rejected"], "n_eff": nan, "span_s": nan,
        "spread": nan, "preplot_e": nan, "preplot_n": nan, "dist_preplot": nan,
        "nearest_line": nan, "nearest_point": nan, "dist_nearest": nan,
        "estimator": ["huber"] * n, "flags": flags or [""] * n,
        "occupation": d["index"], "deployed": d["deployed"], "retrieved": d["retrieved"],
        "from_margins": [False] * n, "point_index": d["index"], "held_from": d["deployed"],
        "held_to": d["retrieved"], "dof": nan,
    }
    cols["n_no_quality"] = [0] * n
    return pa.table(cols, schema=POSITION_SCHEMA)


def make_run(arc: Archive, positions: pa.Table, fixes: list[str], *, label: str = "",
             params: dict | None = None, input_versions: dict | None = None,
             edits: list | None = None) -> Run:
    """Store a run the way runs are stored (objects, then one ledgered transaction)."""
    sid = survey_id(arc)
    manifest = {"inputs": {"fixes": sorted(fixes), "stations": None, "deployments": None,
                           "dem": None},
                "params": params or {"estimate": {"method": "huber", "k": 1.345}},
                "code_version": "0.1.0", "survey": sid}
    if input_versions is not None:
        manifest["input_versions"] = input_versions
    if edits is not None:
        manifest["edits"] = edits
    mh, ms = arc.objects.put_bytes(canonical_json(manifest))
    ph, ps = arc.objects.put_table(positions)
    flagged = sum(1 for f in positions.column("flags").to_pylist() if f)
    with arc.transaction() as tx:
        arc.register_object(tx, mh, ms, "manifest")
        arc.register_object(tx, ph, ps, "table")
        run = Run(id=canonical_hash(manifest), survey_id=sid, label=label, manifest_hash=mh,
                  positions_hash=ph, positions_digest=table_digest(positions),
                  code_version="0.1.0", n_positions=positions.num_rows, n_flagged=flagged,
                  summary="{}", created_at=utcnow(), created_by=arc.actor)
        tx.add(run)
        arc.log(tx, "solve", {"run": run.id}, survey_id=sid, rows=[run])
    return run


def delivery_archive(arc: Archive, tmp: Path, n: int = 8,
                     flags: list[str] | None = None) -> tuple[int, pa.Table, Run, list[str]]:
    """Survey + preplot + check points + two raw files + one run. Returns (sid, final, run,
    names of the raw files)."""
    sid = survey_id(arc)
    final = final_table(n)
    load_stations(arc, tmp, final)
    f1 = add_raw_file(arc, sid, "N5000", "N5000_harvest1.nmea", 31.7, -97.8)
    f2 = add_raw_file(arc, sid, "N5001", "N5001_harvest1.nmea", 31.7, -97.8)
    run = make_run(arc, positions_table(final, flags), [f1, f2])
    return sid, final, run, ["N5000_harvest1.nmea", "N5001_harvest1.nmea"]


def survey_row(arc: Archive) -> Survey:
    with arc.session() as s:
        return arc.survey(s)
