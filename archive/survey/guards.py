"""Guards on a new survey input version: what a file says about itself must agree with the
survey, and a new preplot must not silently drop most of the old one.

- **Header CRS**: an SPS file's header records may name its coordinate reference system
  (``EPSG:NNNN`` anywhere in an H record, else a "UTM zone NN N/S" phrase in the projection
  records). When that differs from the survey's CRS, the coordinates are most likely in
  another CRS and would be read as the survey's: the file is refused, unless the user states
  that the coordinates are in the survey's CRS (``crs_from_survey`` with a reason, kept with
  the version and in the ledger).
- **Dropped stations**: a preplot version replaces the whole preplot. A new version that
  lacks more than :data:`DROP_SHARE` of the current version's stations (line, point, index)
  is refused unless ``replace`` is given (a partial file loaded by mistake would otherwise
  leave every missing station without a preplot position).
"""

from __future__ import annotations

import re
from typing import Any

import pyarrow as pa

from archive.errors import Refused

DROP_SHARE = 0.05
"""Share of the current preplot's stations a new version may lack without ``replace``."""

_EPSG = re.compile(r"EPSG\s*:{1,2}\s*(\d{4,6})", re.IGNORECASE)
_UTM = re.compile(r"UTM\s*(?:zone)?\s*(\d{1,2})\s*([NS])\b", re.IGNORECASE)


def header_crs(headers: list[list[str]] | list[tuple[str, str, str]]) -> tuple[str, str] | None:
    """(what the header names, record id) of the CRS an SPS header states, or None.

    What it names is ``EPSG:NNNN`` for a projected CRS code found in any H record (codes of
    other kinds, such as a datum's, are skipped), else ``UTM zone NNX`` from the projection
    records (H13, H18, H19)."""
    from pyproj import CRS
    from pyproj.exceptions import CRSError

    for rid, desc, data in headers:
        for code in _EPSG.findall(f"{desc} {data}"):
            try:
                if CRS.from_epsg(int(code)).is_projected:
                    return f"EPSG:{int(code)}", rid
            except CRSError:
                continue
    for rid, _desc, data in headers:
        if rid.rstrip() in ("H13", "H18", "H19"):
            m = _UTM.search(data)
            if m:
                return f"UTM zone {int(m.group(1))}{m.group(2).upper()}", rid
    return None


def _same(named: str, survey_epsg: int) -> bool:
    if named.startswith("EPSG:"):
        return int(named[5:]) == survey_epsg
    from pyproj import CRS

    name = CRS.from_epsg(survey_epsg).name.replace(" ", "").lower()
    return named.replace(" ", "").lower().removeprefix("utm") in name


def check_header_crs(meta: dict[str, Any], survey_epsg: int, path: str,
                     reason: str | None) -> None:
    """Refuse an SPS file whose header names another CRS than the survey's, unless a reason
    says its coordinates are in the survey's CRS (recorded in ``meta['overrides']``)."""
    found = header_crs(meta.get("headers") or [])
    if found is None or _same(found[0], survey_epsg):
        return
    named, rid = found
    reason = (reason or "").strip()
    if not reason:
        raise Refused(
            f"{path}: its header ({rid}) names {named}, but the survey's CRS is "
            f"EPSG:{survey_epsg}: its coordinates would be read as EPSG:{survey_epsg}",
            hint="convert the file to the survey's CRS, or, if its coordinates are in the "
                 "survey's CRS and only the header is wrong, load it with "
                 "--crs-from-survey REASON (the reason is kept in the ledger)")
    meta.setdefault("overrides", []).append(
        {"option": "crs_from_survey", "reason": reason,
         "detail": f"header {rid} names {named}; coordinates taken as EPSG:{survey_epsg}"})


def check_dropped(new: pa.Table, current: pa.Table | None, current_version: int | None,
                  path: str, replace: bool, meta: dict[str, Any]) -> None:
    """Refuse a preplot lacking more than :data:`DROP_SHARE` of the current one's stations,
    unless ``replace`` (then recorded in ``meta['overrides']``)."""
    if current is None or current.num_rows == 0:
        return
    old_keys = _keys(current)
    lacking = len(old_keys - _keys(new))
    share = lacking / len(old_keys)
    if share <= DROP_SHARE:
        return
    detail = (f"{new.num_rows} station(s), lacking {lacking} of the {len(old_keys)} of the "
              f"current preplot (version {current_version}, {share:.1%})")
    if not replace:
        raise Refused(
            f"{path}: {detail}; a new version replaces the whole preplot",
            hint="load the complete preplot, or pass --replace if the survey really lost "
                 "those stations")
    meta.setdefault("overrides", []).append(
        {"option": "replace", "reason": "--replace given", "detail": detail})


def _keys(table: pa.Table) -> set[tuple[Any, ...]]:
    """(kind, line, point, index) of each station (kind and index where the table has them)."""
    n = table.num_rows
    cols = [table.column(c).to_numpy(zero_copy_only=False).tolist()
            if c in table.column_names else [d] * n
            for c, d in (("kind", "R"), ("line", None), ("point", None), ("index", 1))]
    return set(zip(*cols, strict=True))
