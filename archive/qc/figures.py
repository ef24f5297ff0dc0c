"""The report's map and chart figures: overview, error vectors, distributions.

Each function takes arrays, draws one figure in the visual language of
:mod:`archive.qc.style` and returns ``(data_uri, caption)``. Coordinates are grid metres
in the survey CRS.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from matplotlib.ticker import MaxNLocator

from archive.qc import style

OVERVIEW_MAX = 4000
"""Stations drawn on the overview before it is decimated along each line."""


@dataclass
class MapData:
    """Delivered stations and the checked subset, as plain arrays."""

    line: np.ndarray
    point: np.ndarray
    east: np.ndarray
    north: np.ndarray
    pre_e: np.ndarray
    pre_n: np.ndarray
    flagged: np.ndarray  # bool per station
    chk_e: np.ndarray  # check points matched to a delivered station
    chk_n: np.ndarray
    crs: str


def decimate(line: np.ndarray, point: np.ndarray, keep: np.ndarray, max_n: int) -> np.ndarray:
    """Indices of every k-th station along each line (plus all ``keep``), about ``max_n``.

    Taking every k-th point of each line keeps the geometry of the spread readable, unlike
    a random sample. Returns sorted indices into the input arrays.
    """
    n = line.size
    if n <= max_n:
        return np.arange(n)
    k = math.ceil(n / max_n)
    order = np.lexsort((point, line))
    sorted_line = line[order]
    starts = np.r_[0, np.flatnonzero(sorted_line[1:] != sorted_line[:-1]) + 1]
    group_start = np.repeat(starts, np.diff(np.r_[starts, n]))
    rank = np.arange(n) - group_start
    chosen = np.zeros(n, dtype=bool)
    chosen[order[rank % k == 0]] = True
    return np.flatnonzero(chosen | keep)


def density(count: int, comfortable: int, floor: float) -> float:
    """Marker area factor: 1 up to ``comfortable`` markers, then shrinking with their number
    (never below ``floor``), so a crowded map stays readable."""
    return float(np.clip(comfortable / max(count, 1), floor, 1.0))


def _map_axes(ax, crs: str) -> None:
    ax.set_aspect("equal", adjustable="datalim")
    ax.set_xlabel(f"Easting (m, {crs})")
    ax.set_ylabel(f"Northing (m, {crs})")
    ax.ticklabel_format(useOffset=False, style="plain")
    ax.grid(True, lw=0.3, color="#DDDDDD")


def overview(m: MapData) -> tuple[str, str]:
    """Map of the spread: preplot, solved, check points and flagged stations."""
    n = m.east.size
    idx = decimate(m.line, m.point, m.flagged, OVERVIEW_MAX)
    dx = max(float(np.nanmax(m.pre_e) - np.nanmin(m.pre_e)), 1.0) if n else 1.0
    dy = max(float(np.nanmax(m.pre_n) - np.nanmin(m.pre_n)), 1.0) if n else 1.0
    fig = style.new_figure(10.0, float(np.clip(7.6 * dy / dx + 1.2, 4.0, 7.5)))
    ax = fig.add_subplot()
    style.preplot(ax, m.pre_e[idx], m.pre_n[idx], size=40 * density(idx.size, 300, 0.1))
    style.solved(ax, m.east[idx], m.north[idx], size=20 * density(idx.size, 300, 0.1))
    if m.chk_e.size:
        style.check(ax, m.chk_e, m.chk_n, size=45 * density(m.chk_e.size, 100, 0.15))
    if m.flagged.any():
        style.flagged(ax, m.east[m.flagged], m.north[m.flagged],
                      size=150 * density(int(m.flagged.sum()), 40, 0.2))
    _map_axes(ax, m.crs)
    ax.set_title("Overview of the spread")
    style.legend(ax, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    style.scale_bar(ax)
    shown = (f"every {math.ceil(n / OVERVIEW_MAX)}th station along each line of {n:,} "
             f"(all {int(m.flagged.sum()):,} flagged stations shown)"
             if idx.size < n else f"all {n:,} delivered stations")
    caption = (f"Overview: {shown}; {m.chk_e.size:,} check points matched to a station. "
               "At this scale a solved position and its preplot overlap; the vector figure "
               "below shows their differences to the check points.")
    return style.to_data_uri(fig), caption


def exaggeration(lengths: np.ndarray, extent: float) -> float:
    """A round factor that draws the 95th-percentile vector at about 8 % of the map extent."""
    lengths = lengths[np.isfinite(lengths) & (lengths > 0)]
    if lengths.size == 0 or not extent > 0:
        return 1.0
    raw = 0.08 * extent / float(np.percentile(lengths, 95))
    if raw <= 1:
        return 1.0
    power = 10 ** math.floor(math.log10(raw))
    return max(m * power for m in (1, 2, 5) if m * power <= raw)


def vectors(check_e: np.ndarray, check_n: np.ndarray, de: np.ndarray, dn: np.ndarray,
            pre_de: np.ndarray, pre_dn: np.ndarray, crs: str) -> tuple[str, str, float]:
    """Error vectors from each check point to the solved position and to the preplot."""
    extent = max(float(np.ptp(check_e)) if check_e.size else 0.0,
                 float(np.ptp(check_n)) if check_n.size else 0.0, 50.0)
    both = np.r_[np.hypot(de, dn), np.hypot(pre_de, pre_dn)]
    scale = exaggeration(both, extent)
    key_m = style.nice_length(5.0 * float(np.nanpercentile(both, 95))) if both.size else 1.0
    fig = style.new_figure(10.5, 5.2)
    axes = fig.subplots(1, 2)
    panels = [(axes[0], de, dn, style.VERMILLION, "solved position", "solved minus check point"),
              (axes[1], pre_de, pre_dn, style.BLACK, "preplot", "preplot minus check point")]
    for ax, u, v, colour, what, title in panels:
        style.check(ax, check_e, check_n, size=20 * density(check_e.size, 100, 0.2))
        q = ax.quiver(check_e, check_n, u * scale, v * scale, angles="xy", scale_units="xy",
                      scale=1.0, color=colour, width=0.0028, headwidth=4, headlength=5,
                      label=f"check point to {what} (x{scale:g})", zorder=5)
        ax.quiverkey(q, 0.80, 1.04, key_m * scale, f"{key_m:g} m of difference",
                     labelpos="W", coordinates="axes", fontproperties={"size": 7.5})
        _map_axes(ax, crs)
        ax.set_title(title, loc="left")
        style.legend(ax, loc="lower left", fontsize=7, framealpha=0.85)
    for ax in axes:
        style.scale_bar(ax, extent)
    caption = (f"Differences at the check points, drawn {scale:g} times their true length "
               f"(the arrow key gives {key_m:g} m of difference; the scale bar measures the "
               "ground). Left: solved positions; right: the preplot, i.e. what stake-out at "
               "the planned position would have delivered. Same exaggeration on both sides.")
    return style.to_data_uri(fig), caption, scale


def _ecdf(ax, values: np.ndarray, colour: str, ls: str, label: str) -> None:
    v = np.sort(values[np.isfinite(values)])
    if v.size:
        ax.step(np.r_[0.0, v], np.r_[0.0, np.arange(1, v.size + 1) / v.size], where="post",
                color=colour, ls=ls, lw=1.4, label=label)


def distributions(dist: np.ndarray, pre_dist: np.ndarray, dh: np.ndarray, pre_dh: np.ndarray,
                  tolerance: float) -> tuple[str, str]:
    """Histograms and cumulative distributions of horizontal and vertical differences."""
    fig = style.new_figure(10.5, 6.4)
    (h1, c1), (h2, c2) = fig.subplots(2, 2)
    sources = [(style.VERMILLION, "-", "solved", 0.45), (style.BLACK, "--", "preplot", 0.0)]
    for (hist_ax, cdf_ax, a, b, what) in [(h1, c1, dist, pre_dist, "horizontal distance"),
                                          (h2, c2, dh, pre_dh, "vertical difference dH")]:
        finite = np.r_[a[np.isfinite(a)], b[np.isfinite(b)]]
        lo = float(finite.min()) if finite.size and what.startswith("vertical") else 0.0
        hi = float(finite.max()) if finite.size else 1.0
        bins = np.linspace(lo, hi if hi > lo else lo + 1.0, 31)
        for (colour, ls, label, alpha), vals in zip(sources, (a, b), strict=True):
            vals = vals[np.isfinite(vals)]
            if not vals.size:
                continue
            if alpha:
                hist_ax.hist(vals, bins=bins, histtype="stepfilled", color=colour, alpha=alpha)
            hist_ax.hist(vals, bins=bins, histtype="step", color=colour, ls=ls, lw=1.3,
                         label=f"{label} (n = {vals.size:,})")
            _ecdf(cdf_ax, np.abs(vals) if what.startswith("vertical") else vals, colour, ls,
                  label)
        unit = "(m)" if what.startswith("horizontal") else "(m, position minus check)"
        hist_ax.set_xlabel(f"{what.capitalize()} {unit}")
        hist_ax.set_ylabel("Stations (count)")
        hist_ax.yaxis.set_major_locator(MaxNLocator(integer=True))
        cdf_ax.set_xlabel(f"{'|dH|' if what.startswith('vertical') else 'Horizontal distance'} (m)")
        cdf_ax.set_ylabel("Fraction of stations at or below")
        cdf_ax.set_ylim(0, 1.02)
        cdf_ax.axhline(0.95, color="#999999", lw=0.7, ls=":", label="95 %")
        if what.startswith("horizontal"):
            for ax in (hist_ax, cdf_ax):
                ax.axvline(tolerance, color="#444444", lw=1.1, ls="-.",
                           label=f"tolerance {tolerance:g} m")
        hist_ax.set_title(f"Histogram of the {what}", loc="left")
        cdf_ax.set_title(f"Cumulative distribution of the {'|dH|' if 'vertical' in what else what}",
                         loc="left")
        for ax in (hist_ax, cdf_ax):
            ax.grid(True, lw=0.3, color="#DDDDDD")
            ax.legend(loc="upper right", fontsize=7, framealpha=0.85)
            style.scale_bar(ax, loc="center right" if ax is hist_ax else "upper left")
    caption = ("Solved positions (vermillion, solid, filled) and the preplot (black, dashed) "
               "against the same check points. The scale bar of each chart measures metres "
               "of difference along its horizontal axis.")
    return style.to_data_uri(fig), caption
