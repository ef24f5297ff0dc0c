"""A small plot of one station's fix cloud, for the flagged stations of the report.

The plot is centred on the solved position (offsets in metres, east and north), so clouds
of any station read the same way. Fixes come from the solver's cloud table (columns
``east``, ``north`` in the survey CRS and ``status`` used / rejected / screened).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
from matplotlib.ticker import MaxNLocator

from archive.qc import style
from archive.survey.keys import station_text

FAR = 60.0
"""A preplot or check point farther than this (metres) from the solved position is named
in the caption instead of drawn, so a far mark does not shrink the cloud to a dot."""


@dataclass
class Station:
    """What the cloud plot shows of one station besides its fixes."""

    line: float
    point: float
    index: int
    easting: float
    northing: float
    ell_major: float
    ell_minor: float
    ell_bearing: float
    preplot_e: float
    preplot_n: float
    check_e: float
    check_n: float
    flags: str


def _finite(*v: float) -> bool:
    return all(x is not None and math.isfinite(x) for x in v)


def _bearing_text(de: float, dn: float) -> str:
    return f"{math.hypot(de, dn):.0f} m away, bearing {math.degrees(math.atan2(de, dn)) % 360:.0f} deg"


def cloud_figure(st: Station, cloud: pa.Table | None) -> tuple[str, str]:
    """Draw one station's cloud; returns (data_uri, caption)."""
    fig = style.new_figure(3.7, 3.8, constrained=False)
    fig.subplots_adjust(left=0.17, right=0.97, top=0.93, bottom=0.27)
    ax = fig.add_subplot()
    ax.xaxis.set_major_locator(MaxNLocator(5))
    ax.yaxis.set_major_locator(MaxNLocator(5))
    notes: list[str] = []
    pts_x: list[np.ndarray] = [np.zeros(1)]
    pts_y: list[np.ndarray] = [np.zeros(1)]
    n_used = n_rej = 0
    if cloud is not None and cloud.num_rows:
        e = cloud["east"].to_numpy(zero_copy_only=False).astype(float) - st.easting
        n = cloud["north"].to_numpy(zero_copy_only=False).astype(float) - st.northing
        use = pc.fill_null(pc.equal(cloud["status"], "used"), False).to_numpy(
            zero_copy_only=False)
        parts = pc.unique(cloud["part"]).drop_null().to_pylist() if "part" in cloud.column_names else []
        if len(parts) > 1:
            notes.append(f"fixes of {len(parts)} parts (the node moved); the diamond is the "
                         "delivered part")
        n_used, n_rej = int(use.sum()), int((~use).sum())
        if n_used:
            style.used(ax, e[use], n[use])
            lo_e, hi_e = np.percentile(e[use], [1, 99])
            lo_n, hi_n = np.percentile(n[use], [1, 99])
            pts_x.append(np.array([lo_e, hi_e]))
            pts_y.append(np.array([lo_n, hi_n]))
        if n_rej:
            style.rejected(ax, e[~use], n[~use])
    else:
        notes.append("no fixes available for this station")
    if _finite(st.ell_major, st.ell_minor, st.ell_bearing):
        style.ellipse(ax, 0.0, 0.0, st.ell_major, st.ell_minor, st.ell_bearing)
        pts_x.append(np.array([-st.ell_major, st.ell_major]))
        pts_y.append(np.array([-st.ell_major, st.ell_major]))
    style.solved(ax, np.zeros(1), np.zeros(1), size=36)
    for what, ex, ny, draw in (("preplot", st.preplot_e, st.preplot_n, style.preplot),
                               ("check point", st.check_e, st.check_n, style.check)):
        if not _finite(ex, ny):
            continue
        de, dn = ex - st.easting, ny - st.northing
        if math.hypot(de, dn) <= FAR:
            draw(ax, np.array([de]), np.array([dn]))
            pts_x.append(np.array([de]))
            pts_y.append(np.array([dn]))
        else:
            notes.append(f"{what} {_bearing_text(de, dn)} (outside the frame)")
    x = np.concatenate(pts_x)
    y = np.concatenate(pts_y)
    half = max(float(np.max(np.abs(x))), float(np.max(np.abs(y))), 1.0) * 1.15
    ax.set_xlim(-half, half)
    ax.set_ylim(-half, half)
    ax.set_aspect("equal")
    ax.set_xlabel("East of solved position (m)")
    ax.set_ylabel("North of solved position (m)")
    ax.axhline(0, color="#E5E5E5", lw=0.5, zorder=0)
    ax.axvline(0, color="#E5E5E5", lw=0.5, zorder=0)
    ax.set_title(station_text(st.line, st.point, st.index if st.index != 1 else None),
                 loc="left")
    style.legend(ax, loc="upper center", bbox_to_anchor=(0.5, -0.15), ncol=2, fontsize=7.5,
                 frameon=False, handletextpad=0.3, columnspacing=1.0)
    style.scale_bar(ax, 2 * half)
    if n_rej and cloud is not None:
        outside = int(np.sum((np.abs(e[~use]) > half) | (np.abs(n[~use]) > half)))
        if outside:
            notes.append(f"{outside} rejected fix(es) outside the frame")
    caption = (f"{n_used:,} fixes used, {n_rej:,} rejected or screened"
               + ("; " + "; ".join(notes) if notes else ""))
    return style.to_data_uri(fig, dpi=100), caption
