"""The visual language of every qc figure: one symbol per kind of thing, the same everywhere.

Colours are from the Okabe-Ito palette (Okabe & Ito, *Color Universal Design*, 2008), which
stays distinguishable with the common colour-vision deficiencies; every symbol also differs
in shape, fill or size, so nothing relies on colour alone:

- fixes used: small translucent grey dots;
- rejected fixes: small hollow grey rings;
- solved position: filled vermillion diamond, its 95 % ellipse a thin vermillion line;
- preplot: thin black plus;
- RTK check point: hollow reddish-purple circle;
- flagged station: large, thick, dashed orange ring around it.

Figures are drawn with matplotlib's object API on the Agg canvas (no pyplot state, no
display) and embedded in the report as base64 PNG.
"""

from __future__ import annotations

import base64
import io
import math

import numpy as np
from matplotlib.axes import Axes
from matplotlib.figure import Figure
from matplotlib.patches import Ellipse
from mpl_toolkits.axes_grid1.anchored_artists import AnchoredSizeBar

VERMILLION = "#D55E00"
REDDISH_PURPLE = "#CC79A7"
ORANGE = "#E69F00"
GREY = "#6E6E6E"
BLACK = "#000000"

LABELS = {
    "used": "fix used", "rejected": "fix rejected", "solved": "solved position",
    "ellipse": "95 % ellipse", "preplot": "preplot", "check": "RTK check point",
    "flagged": "flagged station",
}

RC = {"font.size": 8.5, "axes.titlesize": 9.5, "axes.labelsize": 8.5, "legend.fontsize": 7.5,
      "xtick.labelsize": 7.5, "ytick.labelsize": 7.5, "axes.spines.top": False,
      "axes.spines.right": False, "font.family": "DejaVu Sans"}


def new_figure(width_in: float, height_in: float, constrained: bool = True) -> Figure:
    """A figure on the Agg canvas with the report's fonts. Small repeated figures pass
    ``constrained=False`` and set fixed margins: the layout engine costs a second draw."""
    import matplotlib

    matplotlib.rcParams.update(RC)
    return Figure(figsize=(width_in, height_in), layout="constrained" if constrained else None)


def used(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 3.0) -> None:
    """Fixes used by the estimate."""
    ax.scatter(x, y, s=size, c=GREY, alpha=0.35, linewidths=0, label=LABELS["used"],
               rasterized=True, zorder=1)


def rejected(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 9.0) -> None:
    """Fixes screened or rejected."""
    ax.scatter(x, y, s=size, facecolors="none", edgecolors=GREY, linewidths=0.6,
               label=LABELS["rejected"], zorder=2)


def solved(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 30.0, **kw) -> None:
    """Solved positions."""
    ax.scatter(x, y, s=size, marker="D", c=VERMILLION, edgecolors="none",
               label=kw.pop("label", LABELS["solved"]), zorder=5, **kw)


def ellipse(ax: Axes, x: float, y: float, major: float, minor: float, bearing_deg: float,
            label: bool = True) -> None:
    """A 95 % ellipse: semi-axes in metres, bearing of the major axis from grid north."""
    if not all(math.isfinite(v) for v in (major, minor, bearing_deg)):
        return
    ax.add_patch(Ellipse((x, y), 2 * major, 2 * minor, angle=90.0 - bearing_deg, fill=False,
                         ec=VERMILLION, lw=0.9, zorder=4))
    if label:  # a line in the legend, as drawn (a patch would show as a box)
        ax.plot([], [], color=VERMILLION, lw=0.9, label=LABELS["ellipse"])


def preplot(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 40.0, **kw) -> None:
    """Planned stations."""
    ax.scatter(x, y, s=size, marker="+", c=BLACK, linewidths=0.7,
               label=kw.pop("label", LABELS["preplot"]), zorder=3, **kw)


def check(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 45.0) -> None:
    """RTK check points."""
    ax.scatter(x, y, s=size, facecolors="none", edgecolors=REDDISH_PURPLE, linewidths=1.3,
               label=LABELS["check"], zorder=6)


def flagged(ax: Axes, x: np.ndarray, y: np.ndarray, size: float = 150.0) -> None:
    """Rings around flagged stations."""
    ax.scatter(x, y, s=size, facecolors="none", edgecolors=ORANGE, linewidths=1.8,
               linestyles=(0, (2.5, 1.5)), label=LABELS["flagged"], zorder=7)


LEGEND_SIZES = {LABELS["used"]: 14.0, LABELS["rejected"]: 18.0, LABELS["solved"]: 30.0,
                LABELS["preplot"]: 40.0, LABELS["check"]: 40.0, LABELS["flagged"]: 90.0}


def legend(ax: Axes, **kw):
    """The axes' legend with every symbol at a readable size, however small on the map."""
    handles, labels = ax.get_legend_handles_labels()
    order = list(LABELS.values())
    ranked = sorted(zip(handles, labels, strict=True),
                    key=lambda hl: order.index(hl[1]) if hl[1] in order else len(order))
    leg = ax.legend([h for h, _ in ranked], [lab for _, lab in ranked], **kw)
    for handle, text in zip(leg.legend_handles, leg.get_texts(), strict=True):
        size = LEGEND_SIZES.get(text.get_text())
        if size is not None and hasattr(handle, "set_sizes"):
            handle.set_sizes([size])
            handle.set_alpha(max(handle.get_alpha() or 1.0, 0.6))
    return leg


def nice_length(span: float) -> float:
    """A round length (1, 2 or 5 times a power of ten) of about a fifth of ``span``."""
    if not span > 0 or not math.isfinite(span):
        return 1.0
    target = span / 5.0
    power = 10 ** math.floor(math.log10(target))
    for m in (5, 2, 1):
        if m * power <= target:
            return m * power
    return power


def format_length(metres: float) -> str:
    """'500 m', '2 km', '0.5 m'."""
    if metres >= 1000:
        return f"{metres / 1000:g} km"
    return f"{metres:g} m"


def scale_bar(ax: Axes, span: float | None = None, loc: str = "lower right") -> float:
    """A horizontal scale bar of a round length in data metres; returns the length."""
    x0, x1 = ax.get_xlim()
    length = nice_length(span if span is not None else abs(x1 - x0))
    bar = AnchoredSizeBar(ax.transData, length, format_length(length), loc, pad=0.4,
                          borderpad=0.5, sep=3, frameon=True, size_vertical=0,
                          fontproperties={"size": 7.5})
    bar.patch.set_alpha(0.8)
    bar.patch.set_edgecolor("#BBBBBB")
    ax.add_artist(bar)
    return length


def to_data_uri(fig: Figure, dpi: int = 110) -> str:
    """The figure as a base64 PNG data URI (nothing leaves the page)."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=dpi, facecolor="white")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")
