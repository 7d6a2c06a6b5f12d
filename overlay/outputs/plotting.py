"""What every picture shares: matplotlib without a display, sizes and margins, PNG bytes, outlines,
class colours and line styles (the palette of every output), a scale bar and a north arrow.

Colour maps are perceptually uniform and readable with colour-vision deficiency (cividis for VER;
classes by a blue–orange–vermillion set of the Okabe–Ito palette plus line styles, so they never rely
on colour alone).
"""

from __future__ import annotations

import io
import math
from typing import TYPE_CHECKING

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import shapely  # noqa: E402

from overlay.outputs import palette  # noqa: E402

if TYPE_CHECKING:
    from overlay.job import RunResult

VER_CMAP = "cividis"
TITLE_Y = 1.01  # a fixed title height: placed automatically, each title measured every tick label first
DPI = 110
PREVIEW_SIZE = (8.0, 6.0)  # inches → 880 × 660 pixels
SHEET_SIZE = (9.0, 3.6)
SITE_SIZE = (11.0, 5.0)
# Fixed margins (fractions of the figure) rather than a layout engine: constrained layout took half
# of each picture's drawing time, which counts over a campaign's thousands of pictures.
MARGINS = {
    "preview": {"left": 0.10, "right": 0.97, "bottom": 0.09, "top": 0.94},
    "sheet": {"left": 0.08, "right": 0.98, "bottom": 0.14, "top": 0.90, "wspace": 0.22},
    "site": {"left": 0.07, "right": 0.98, "bottom": 0.16, "top": 0.93},
}


def png(fig: plt.Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    plt.close(fig)
    return buf.getvalue()


def rings(ax: plt.Axes, geom: object, **kw: object) -> None:
    for part in shapely.get_parts(geom):
        if part.is_empty:
            continue
        for ring in [part.exterior, *part.interiors]:
            xy = np.asarray(ring.coords)
            ax.plot(xy[:, 0], xy[:, 1], **kw)


def class_style(result: "RunResult", name: str) -> tuple[str, str]:
    """(colour, line style) of a class: the palette every output shares."""
    style = palette.for_site(result.site)[name]
    return style.hex, style.dash


def scale_bar(ax: plt.Axes, unit_m: float) -> None:
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    span_m = (x1 - x0) * unit_m
    nice = 10 ** math.floor(math.log10(span_m / 4))
    for k in (5, 2, 1):
        if k * nice <= span_m / 4:
            nice *= k
            break
    length = nice / unit_m
    xs, ys = x1 - 0.04 * (x1 - x0) - length, y0 + 0.05 * (y1 - y0)
    ax.plot([xs, xs + length], [ys, ys], color="black", lw=3, solid_capstyle="butt", zorder=5)
    ax.text(xs + length / 2, ys + 0.015 * (y1 - y0), f"{nice:g} m", ha="center", va="bottom", fontsize=8, zorder=5,
            bbox={"fc": "white", "ec": "none", "alpha": 0.8, "pad": 1})


def north(ax: plt.Axes, result: "RunResult") -> None:
    """An arrow to grid north in the drawing frame (from the map placement), or the drawing's +y axis."""
    if result.to_map is not None:
        rot = math.radians(result.to_map.rotation_deg)  # drawing +x → map, counter-clockwise
        dx, dy = -math.sin(-rot), math.cos(-rot)  # map north (0, 1) seen in the drawing frame
        label = "N"
    else:
        dx, dy, label = 0.0, 1.0, "+y"
    ax.annotate(label, xy=(0.95 + 0.035 * dx, 0.86 + 0.07 * dy), xytext=(0.95, 0.86), xycoords="axes fraction",
                textcoords="axes fraction", ha="center", va="center", fontsize=9, zorder=5,
                bbox={"fc": "white", "ec": "none", "alpha": 0.8, "pad": 1},
                arrowprops={"arrowstyle": "-|>", "color": "black"})


def fit_height(fig: plt.Figure, ax: plt.Axes, below_in: float = 1.0, above_in: float = 0.45) -> None:
    """Figure height to the data's aspect (equal axes), so a long structure is not a thin strip in white."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    width_in = fig.get_figwidth() * (MARGINS["site"]["right"] - MARGINS["site"]["left"])
    axes_in = width_in * abs(y1 - y0) / max(abs(x1 - x0), 1e-12)
    height = float(np.clip(axes_in + below_in + above_in, 3.0, 10.0))
    fig.set_figheight(height)
    fig.subplots_adjust(bottom=below_in / height, top=1.0 - above_in / height)
