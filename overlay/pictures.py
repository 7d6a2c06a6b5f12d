"""Pictures an engineer checks before trusting a number: scan previews, zone sheets, a site map,
and the written DXF rendered back.

Each function returns PNG bytes (no file I/O here).  Colour maps are
perceptually uniform and readable with colour-vision deficiency (cividis for
VER; classes by a blue–orange–vermillion set of the Okabe–Ito palette plus
line styles, so they never rely on colour alone).
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
from matplotlib.patches import Polygon as MplPolygon  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.tri import Triangulation  # noqa: E402

from . import palette  # noqa: E402

if TYPE_CHECKING:
    from .pipeline import RunResult, ScanResult
    from .zones import Zone

VER_CMAP = "cividis"
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


def _png(fig: plt.Figure) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI)
    plt.close(fig)
    return buf.getvalue()


def _rings(ax: plt.Axes, geom: object, **kw: object) -> None:
    for part in shapely.get_parts(geom):
        if part.is_empty:
            continue
        for ring in [part.exterior, *part.interiors]:
            xy = np.asarray(ring.coords)
            ax.plot(xy[:, 0], xy[:, 1], **kw)


def _class_style(result: "RunResult", name: str) -> tuple[str, str]:
    """(colour, line style) of a class: the palette every output shares."""
    style = palette.for_site(result.site)[name]
    return style.hex, style.dash


def _scale_bar(ax: plt.Axes, unit_m: float) -> None:
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


def _north(ax: plt.Axes, result: "RunResult") -> None:
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


def _triangulation(xy: np.ndarray) -> Triangulation:
    """Delaunay triangles of the points, without the long ones that bridge gaps or the hull."""
    tri = Triangulation(xy[:, 0], xy[:, 1])
    t = tri.triangles
    edges = np.stack([np.hypot(*(xy[t[:, i]] - xy[t[:, (i + 1) % 3]]).T) for i in range(3)], axis=1).max(axis=1)
    tri.set_mask(edges > 3.0 * np.median(edges))
    return tri


def scan_preview(result: "RunResult", scan: "ScanResult") -> bytes:
    """The VER map of one scan in the drawing frame: class contours, zone ids, dropouts, targets with
    residual arrows (drawn 50× enlarged), scale bar, north arrow, colour bar in dB."""
    fig, ax = plt.subplots(figsize=PREVIEW_SIZE)
    fig.subplots_adjust(**MARGINS["preview"])
    xy = scan.point_xy
    ok = scan.valid & np.isfinite(scan.ver_db)
    lo, hi = np.nanpercentile(scan.ver_db[ok], [1, 99.5]) if ok.any() else (0.0, 1.0)
    tri = _triangulation(xy[ok])
    sc = ax.tripcolor(tri, scan.ver_db[ok], cmap=VER_CMAP, vmin=min(lo, 0.0), vmax=max(hi, 1.0), shading="gouraud")
    fig.colorbar(sc, ax=ax, label="vibration energy ratio (dB)", shrink=0.85)
    bad = ~scan.valid
    if bad.any():
        ax.scatter(xy[bad, 0], xy[bad, 1], marker="x", color="black", s=14, linewidths=0.8, label="invalid point")
    _rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in scan.zones:
        colour, ls = _class_style(result, z.class_name)
        _rings(ax, z.contour, color=colour, lw=1.6, ls=ls)
        if z.defect_id == z.zone_id:
            p = z.contour.representative_point()
            ax.annotate(z.zone_id, (p.x, p.y), fontsize=7, ha="center", color="white",
                        bbox={"boxstyle": "round,pad=0.2", "fc": "black", "alpha": 0.6, "lw": 0})
    for c in result.site.classes:
        colour, ls = _class_style(result, c.name)
        ax.plot([], [], color=colour, ls=ls, label=f"{c.name} >= {c.threshold_db:g} dB")
    for t in scan.targets:
        ax.plot(*t.drawing, marker="^", color="#009E73", ms=7, mec="black")
        ax.annotate("", xy=(t.drawing[0] + 50 * t.residual[0], t.drawing[1] + 50 * t.residual[1]), xytext=t.drawing,
                    arrowprops={"arrowstyle": "->", "color": "#009E73", "lw": 1.2})
        ax.annotate(t.name, t.drawing, xytext=(4, 4), textcoords="offset points", fontsize=7)
    ax.set_aspect("equal")
    ax.margins(0.12)
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.set_title(f"scan {scan.scan_id} — {scan.element}   (target residual arrows ×50, RMS {scan.fit.rms * 1000 * result.unit_m:.1f} mm)",
                 fontsize=10)
    ax.legend(loc="upper left", fontsize=7, framealpha=0.85)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


def field_map(result: "RunResult", scan: "ScanResult") -> bytes:
    """The sound field a scan's VER is measured against (its reference, dB), beside which the VER map
    reads: where the incident level was strong or weak, and how much it varied."""
    ref = scan.reference
    assert ref is not None and ref.level_db is not None
    fig, ax = plt.subplots(figsize=PREVIEW_SIZE)
    fig.subplots_adjust(**MARGINS["preview"])
    xy = scan.point_xy
    ok = scan.valid & np.isfinite(ref.level_db)
    level = ref.level_db[ok] - np.nanmedian(ref.level_db[ok])
    sc = ax.tripcolor(_triangulation(xy[ok]), level, cmap="magma", shading="gouraud")
    fig.colorbar(sc, ax=ax, label="reference level against its median (dB)", shrink=0.85)
    cs = ax.tricontour(_triangulation(xy[ok]), level, levels=np.arange(np.floor(level.min()), level.max() + 1, 1.0),
                       colors="white", linewidths=0.6)
    ax.clabel(cs, fmt="%g dB", fontsize=6)
    _rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in scan.zones:
        if z.defect_id == z.zone_id:
            _rings(ax, z.contour, color="white", lw=1.2)
    ax.set_aspect("equal")
    ax.margins(0.12)
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.set_title(f"scan {scan.scan_id} — sound field: spans {ref.field_span_db:.1f} dB, scatter "
                 f"{ref.field_scatter_db:.1f} dB; VER is measured against it", fontsize=10)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


def zone_sheet(result: "RunResult", scan: "ScanResult", zone: "Zone") -> bytes:
    """One zone: its averaged spectrum against the healthy reference, the band and the peak; and the
    histogram of per-point peak frequencies."""
    fig, (a1, a2) = plt.subplots(1, 2, figsize=SHEET_SIZE, width_ratios=[1.6, 1])
    fig.subplots_adjust(**MARGINS["sheet"])
    if zone.spectrum is not None and scan.band_freqs is not None:
        f = scan.band_freqs
        a1.semilogy(f, zone.spectrum, color="#D55E00", lw=1.4, label="zone average")
        if scan.healthy_spectrum is not None:
            a1.semilogy(f, scan.healthy_spectrum, color="#0072B2", lw=1.2, ls="--", label="sound concrete (|VER| < 1 dB)")
        a1.set_xlim(f[0], f[-1])
    else:
        a1.text(0.5, 0.5, "ready VER: no spectra in the bundle", ha="center", va="center", transform=a1.transAxes)
    if zone.peak_hz == zone.peak_hz:
        a1.axvline(zone.peak_hz, color="black", lw=0.8, ls=":", label=f"peak {zone.peak_hz:.0f} Hz")
    a1.set_xlabel("frequency (Hz), analysis band")
    a1.set_ylabel("PSD ((m/s)²/Hz)")
    a1.legend(fontsize=7)
    a1.set_title(f"{zone.zone_id}: {zone.class_name}, contour {zone.area_m2:.3f} m², outline {zone.outline_area_m2:.3f} m²",
                 fontsize=9)
    inside = shapely.contains_xy(zone.contour, scan.point_xy[:, 0], scan.point_xy[:, 1]) & scan.valid
    peaks = scan.peak_hz[inside & np.isfinite(scan.peak_hz)]
    if peaks.size:
        a2.hist(peaks, bins=min(30, max(5, peaks.size // 3)), color="#E69F00", edgecolor="black", lw=0.4)
    a2.ticklabel_format(axis="x", useOffset=False, style="plain")  # whole hertz, no "+2.6e3" offset
    a2.set_xlabel("per-point peak frequency (Hz)")
    a2.set_ylabel("points")
    a2.set_title(f"spread {zone.peak_spread:.3f}, confidence {zone.confidence:.2f}", fontsize=9)
    return _png(fig)


def site_map(result: "RunResult", drawing_lines: list[np.ndarray] | None = None) -> bytes:
    """All scans and zones on the drawing outline (the base drawing's lines in grey, when given)."""
    fig, ax = plt.subplots(figsize=SITE_SIZE)
    fig.subplots_adjust(**MARGINS["site"])
    for line in drawing_lines or []:
        ax.plot(line[:, 0], line[:, 1], color="0.65", lw=0.6)
    for s in result.scans:
        _rings(ax, s.extent, color="0.35", lw=0.8, ls=":")
        if not s.extent.is_empty:
            x0, _, _, y1 = s.extent.bounds
            ax.text(x0, y1, s.scan_id, fontsize=7, va="bottom")
    for z in result.zones:
        colour, ls = _class_style(result, z.class_name)
        ax.add_patch(MplPolygon(np.asarray(z.contour.exterior.coords), closed=True, fc=colour, ec=colour, alpha=0.5, lw=0.8))
        if z.defect_id == z.zone_id:
            _rings(ax, z.footprint, color=palette.hex_of(palette.REPAIR_RGB), lw=0.8)
    handles = [Patch(color=_class_style(result, c.name)[0], alpha=0.5, label=f"{c.name} >= {c.threshold_db:g} dB")
               for c in result.site.classes] + [Line2D([], [], color=palette.hex_of(palette.REPAIR_RGB), label="repair footprint")]
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.margins(0.04)
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=8, frameon=False)
    ax.set_title(f"{result.site.name} {result.site.structure} — suspect zones", fontsize=10)
    _fit_height(fig, ax)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


def _fit_height(fig: plt.Figure, ax: plt.Axes, below_in: float = 1.0, above_in: float = 0.45) -> None:
    """Figure height to the data's aspect (equal axes), so a long structure is not a thin strip in white."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    width_in = fig.get_figwidth() * (MARGINS["site"]["right"] - MARGINS["site"]["left"])
    axes_in = width_in * abs(y1 - y0) / max(abs(x1 - x0), 1e-12)
    height = float(np.clip(axes_in + below_in + above_in, 3.0, 10.0))
    fig.set_figheight(height)
    fig.subplots_adjust(bottom=below_in / height, top=1.0 - above_in / height)


def drawing_lines(path: object) -> list[np.ndarray]:
    """Lines and polylines of a DXF's model space (for the site map's background)."""
    from .exporters.dxf import read_base_dxf

    doc = read_base_dxf(path)
    out = []
    for e in doc.modelspace().query("LINE LWPOLYLINE"):
        if e.dxftype() == "LINE":
            out.append(np.array([(e.dxf.start.x, e.dxf.start.y), (e.dxf.end.x, e.dxf.end.y)]))
        else:
            pts = np.array([p[:2] for p in e.get_points()])
            out.append(np.vstack([pts, pts[:1]]) if e.closed else pts)
    return out


def dxf_preview(path: object) -> bytes:
    """The written DXF rendered back with ezdxf's drawing add-on, as CAD would show it."""
    import ezdxf
    from ezdxf.addons.drawing import Frontend, RenderContext
    from ezdxf.addons.drawing.config import BackgroundPolicy, Configuration
    from ezdxf.addons.drawing.matplotlib import MatplotlibBackend

    doc = ezdxf.readfile(path)
    fig = plt.figure(figsize=SITE_SIZE)
    ax = fig.add_axes((0, 0, 1, 1))
    ctx = RenderContext(doc)
    Frontend(ctx, MatplotlibBackend(ax), config=Configuration(background_policy=BackgroundPolicy.WHITE)).draw_layout(
        doc.modelspace(), finalize=True)
    return _png(fig)
