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
from matplotlib.image import AxesImage  # noqa: E402
from matplotlib.lines import Line2D  # noqa: E402
from matplotlib.patches import Patch  # noqa: E402
from matplotlib.patches import Polygon as MplPolygon  # noqa: E402
from matplotlib.ticker import FuncFormatter  # noqa: E402
from matplotlib.transforms import Affine2D  # noqa: E402
from matplotlib.tri import Triangulation  # noqa: E402

from overlay.outputs import palette  # noqa: E402

if TYPE_CHECKING:
    from overlay.job import RunResult
    from overlay.quantities import Defect
    from overlay.scan import ScanResult
    from overlay.zones.zone import Zone

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


def _triangulation(xy: np.ndarray, rc: np.ndarray | None = None, ok: np.ndarray | None = None) -> Triangulation:
    """Triangles over the points: two per grid cell whose four corners are usable (no Delaunay needed:
    a 50,000-point scan's triangulation cost most of its picture), else Delaunay without the long
    triangles that bridge gaps or the hull."""
    if rc is not None:
        use = np.ones(len(xy), dtype=bool) if ok is None else ok
        rows, cols = rc.max(axis=0) + 1
        node = np.full((rows + 1, cols + 1), -1, dtype=np.int64)
        have = (rc[:, 0] >= 0) & use
        node[rc[have, 0], rc[have, 1]] = np.nonzero(have)[0]
        a, b, c, d = node[:-1, :-1], node[:-1, 1:], node[1:, 1:], node[1:, :-1]
        full = (a >= 0) & (b >= 0) & (c >= 0) & (d >= 0)
        if full.any():
            tris = np.concatenate([np.column_stack([a[full], b[full], c[full]]),
                                   np.column_stack([a[full], c[full], d[full]])])
            return Triangulation(xy[:, 0], xy[:, 1], tris)
    pts = xy if ok is None else xy[ok]
    tri = Triangulation(pts[:, 0], pts[:, 1])
    t = tri.triangles
    edges = np.stack([np.hypot(*(pts[t[:, i]] - pts[t[:, (i + 1) % 3]]).T) for i in range(3)], axis=1).max(axis=1)
    tri.set_mask(edges > 3.0 * np.median(edges))
    return tri


def _map_values(scan: "ScanResult", values: np.ndarray, ok: np.ndarray) -> tuple[Triangulation, np.ndarray]:
    """A triangulation and the values it colours: on the grid (all points, unusable ones left out of the
    cells), or over the usable scattered points."""
    if scan.grid_rc is not None:
        return _triangulation(scan.point_xy, scan.grid_rc, ok), np.where(ok, values, 0.0)
    return _triangulation(scan.point_xy[ok]), values[ok]


GRID_SLACK = 0.1  # of a cell: a grid whose points sit this close to an affine lattice is drawn as an image


def _grid_image(scan: "ScanResult", values: np.ndarray, ok: np.ndarray) -> tuple[np.ndarray, Affine2D] | None:
    """The values as an image over the scan's grid cells and the affine map from (column, row) to the
    drawing — when the points lie on an affine lattice (a grid registered by a similarity or an affine
    fit).  An image draws in a fraction of a triangulation's time; a projective scan has no such map."""
    rc = scan.grid_rc
    if rc is None:
        return None
    have = (rc[:, 0] >= 0)
    if have.sum() < 4:
        return None
    design = np.column_stack([rc[have, 1], rc[have, 0], np.ones(int(have.sum()))]).astype(np.float64)
    coef, *_ = np.linalg.lstsq(design, scan.point_xy[have], rcond=None)
    cell = min(np.hypot(*coef[0]), np.hypot(*coef[1]))
    if cell <= 0 or np.abs(design @ coef - scan.point_xy[have]).max() > GRID_SLACK * cell:
        return None
    rows, cols = rc.max(axis=0) + 1
    image = np.full((rows, cols), np.nan)
    use = have & ok
    image[rc[use, 0], rc[use, 1]] = values[use]
    (a, d), (b, e), (c, f) = coef
    return np.ma.masked_invalid(image), Affine2D(np.array([[a, b, c], [d, e, f], [0.0, 0.0, 1.0]]))


def _draw_map(ax: plt.Axes, scan: "ScanResult", values: np.ndarray, ok: np.ndarray, **style: object) -> object:
    """The scan's values coloured over the drawing: an image on a regular grid, else a triangulation."""
    grid = _grid_image(scan, values, ok)
    if grid is None:
        tri, shown = _map_values(scan, values, ok)
        return ax.tripcolor(tri, shown, shading="gouraud", **style)
    image, to_drawing = grid
    rows, cols = image.shape
    im = AxesImage(ax, interpolation="bilinear", origin="lower", extent=(-0.5, cols - 0.5, -0.5, rows - 0.5),
                   cmap=style.get("cmap"))
    im.set_data(image)
    if "vmin" in style:
        im.set_clim(style["vmin"], style["vmax"])
    im.set_transform(to_drawing + ax.transData)
    ax.add_image(im)  # not imshow: its limits would be set in grid indices
    return im


def scan_preview(result: "RunResult", scan: "ScanResult") -> bytes:
    """The VER map of one scan in the drawing frame: class contours, zone ids, dropouts, targets with
    residual arrows (drawn 50× enlarged), scale bar, north arrow, colour bar in dB."""
    fig, ax = plt.subplots(figsize=PREVIEW_SIZE)
    fig.subplots_adjust(**MARGINS["preview"])
    xy = scan.point_xy
    ok = scan.valid & np.isfinite(scan.ver_db)
    lo, hi = np.nanpercentile(scan.ver_db[ok], [1, 99.5]) if ok.any() else (0.0, 1.0)
    sc = _draw_map(ax, scan, scan.ver_db, ok, cmap=VER_CMAP, vmin=min(lo, 0.0), vmax=max(hi, 1.0))
    fig.colorbar(sc, ax=ax, label="vibration energy ratio (dB)", shrink=0.85)
    bad = ~scan.valid
    if bad.any():
        ax.scatter(xy[bad, 0], xy[bad, 1], marker="x", color="black", s=14, linewidths=0.8, label="invalid point")
    _rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in zones_of(result, scan):
        colour, ls = _class_style(result, z.class_name)
        _rings(ax, z.contour, color=colour, lw=1.6, ls=ls)
        if z.defect_id == z.zone_id:
            p = z.contour.representative_point()
            ax.annotate(z.zone_id, (p.x, p.y), fontsize=7, ha="center", color="white",
                        bbox={"boxstyle": "round,pad=0.2", "fc": "black", "alpha": 0.6, "lw": 0})
    for c in result.site.zones.classes:
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
                 fontsize=10, y=TITLE_Y)
    ax.legend(loc="upper left", fontsize=7, framealpha=0.85)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


THUMB_SIZE = (5.0, 3.6)  # inches → 550 × 396 pixels
SPECTRUM_SIZE = (5.0, 2.4)


def ver_scale(result: "RunResult") -> tuple[float, float]:
    """The one VER colour scale of a campaign's compact pictures: 0 dB to 5 dB above the top class."""
    return 0.0, max(c.threshold_db for c in result.site.zones.classes) + 5.0


def scan_thumbnail(result: "RunResult", scan: "ScanResult") -> bytes:
    """A campaign's picture of one scan: the VER map on the campaign's one colour scale (its key is on
    the report's pages), class contours, defect ids, dropouts and targets, a scale bar — no axes, no
    colour bar, one collection per kind: a tenth of the full preview's drawing time, which counts
    over thousands of scans.  (A site of a few scans gets the full preview, scan_preview.)"""
    from matplotlib.collections import LineCollection

    fig = plt.figure(figsize=THUMB_SIZE)
    ax = fig.add_axes((0.01, 0.01, 0.98, 0.88))
    ax.set_axis_off()
    xy = scan.point_xy
    ok = scan.valid & np.isfinite(scan.ver_db)
    lo, hi = ver_scale(result)
    _draw_map(ax, scan, scan.ver_db, ok, cmap=VER_CMAP, vmin=lo, vmax=hi)
    _rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    bad = ~scan.valid
    if bad.any():
        ax.plot(xy[bad, 0], xy[bad, 1], "x", color="black", ms=3, mew=0.6)
    zones = zones_of(result, scan)
    for c in result.site.zones.classes:
        colour, ls = _class_style(result, c.name)
        rings = [np.asarray(r.coords) for z in zones if z.class_name == c.name
                 for part in shapely.get_parts(z.contour) for r in (part.exterior, *part.interiors)]
        if rings:
            ax.add_collection(LineCollection(rings, colors=colour, linewidths=1.3, linestyles=ls))
    for z in zones:
        if z.defect_id == z.zone_id:
            p = z.contour.representative_point()
            ax.text(p.x, p.y, z.zone_id, fontsize=6, ha="center", va="bottom", color="white")
    if scan.targets:
        t = np.array([t.drawing for t in scan.targets])
        ax.plot(t[:, 0], t[:, 1], "^", color="#009E73", ms=5, mec="black", mew=0.5)
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.margins(0.06)
    fig.text(0.01, 0.97, f"scan {scan.scan_id} — {scan.element}   fit RMS {scan.fit.rms * 1000 * result.unit_m:.1f} mm",
             fontsize=8, va="top")
    _scale_bar(ax, result.unit_m)
    return _png(fig)


def defect_spectrum(result: "RunResult", defect: "Defect") -> bytes:
    """A campaign's picture of one defect: its zone's averaged spectrum against sound concrete and
    the peak, titled with the defect's numbers as the tables print them (defect_sheet, the full
    version with the per-point peak histogram, is drawn for small sites)."""
    fig = plt.figure(figsize=SPECTRUM_SIZE)
    ax = fig.add_axes((0.13, 0.2, 0.84, 0.6))
    top, low = defect.top, defect.lowest
    scan = next(s for s in result.scans if s.scan_id == low.scan_id.split(";")[0])
    zone = top if top.spectrum is not None else low
    if zone.spectrum is not None and scan.band_freqs is not None:
        f = scan.band_freqs
        ax.semilogy(f, zone.spectrum, color="#D55E00", lw=1.2)
        if scan.healthy_spectrum is not None:
            ax.semilogy(f, scan.healthy_spectrum, color="#0072B2", lw=1.0, ls="--")
        ax.set_xlim(f[0], f[-1])
        ax.minorticks_off()
        ax.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}"))
    else:
        ax.text(0.5, 0.5, "ready VER: no spectra in the bundle", ha="center", va="center", transform=ax.transAxes)
    if top.peak_hz == top.peak_hz:
        ax.axvline(top.peak_hz, color="black", lw=0.8, ls=":")
    ax.tick_params(labelsize=6)
    ax.set_xlabel("Hz (solid: zone average, dashed: sound concrete)", fontsize=6)
    fig.text(0.01, 0.98, f"defect {defect.defect_id}: contours {_contour_areas(result, defect)} m²; outline "
             f"{low.outline_area_m2:.4f} m² ({low.outline_basis})\n{top.zone_id}: peak {top.peak_hz:.0f} Hz, "
             f"confidence {top.confidence:.2f}", fontsize=7, va="top")
    return _png(fig)


def _contour_areas(result: "RunResult", defect: "Defect") -> str:
    """Each class contour area of a defect, at the tables' precision, so pictures and tables read the same."""
    return ", ".join(f"{c.name} {defect.contour_area_m2(c.name):.4f}" for c in result.site.zones.classes
                     if defect.contour_area_m2(c.name) > 0)


def field_map(result: "RunResult", scan: "ScanResult") -> bytes:
    """The sound field a scan's VER is measured against (its reference, dB), beside which the VER map
    reads: where the incident level was strong or weak, and how much it varied."""
    ref = scan.reference
    assert ref is not None and ref.level_db is not None
    fig, ax = plt.subplots(figsize=PREVIEW_SIZE)
    fig.subplots_adjust(**MARGINS["preview"])
    ok = scan.valid & np.isfinite(ref.level_db)
    level = ref.level_db - np.nanmedian(ref.level_db[ok])
    tri, values = _map_values(scan, level, ok)
    sc = ax.tripcolor(tri, values, cmap="magma", shading="gouraud")
    fig.colorbar(sc, ax=ax, label="reference level against its median (dB)", shrink=0.85)
    cs = ax.tricontour(tri, values, levels=np.arange(np.floor(level[ok].min()), level[ok].max() + 1, 1.0),
                       colors="white", linewidths=0.6)
    ax.clabel(cs, fmt="%g dB", fontsize=6)
    _rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in zones_of(result, scan):
        if z.defect_id == z.zone_id:
            _rings(ax, z.contour, color="white", lw=1.2)
    ax.set_aspect("equal")
    ax.margins(0.12)
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.set_title(f"scan {scan.scan_id} — sound field: spans {ref.field_span_db:.1f} dB, scatter "
                 f"{ref.field_scatter_db:.1f} dB; VER is measured against it", fontsize=10, y=TITLE_Y)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


def zones_of(result: "RunResult", scan: "ScanResult") -> list["Zone"]:
    """The site's final zones (after the mosaic) that this scan contributed to: what the tables list."""
    return [z for z in result.zones if scan.scan_id in z.scan_id.split(";")]


def defect_sheet(result: "RunResult", defect: "Defect") -> bytes:
    """One defect: its zone's averaged spectrum against sound concrete, the band and the peak; the
    histogram of per-point peak frequencies; its class contour areas, outline and confidence — the
    numbers of the zone and defect tables."""
    fig, (a1, a2) = plt.subplots(1, 2, figsize=SHEET_SIZE, width_ratios=[1.6, 1])
    fig.subplots_adjust(**MARGINS["sheet"])
    top, low = defect.top, defect.lowest
    scans = {s.scan_id: s for s in result.scans}
    scan = scans[low.scan_id.split(";")[0]]
    zone = top if top.spectrum is not None else low
    if zone.spectrum is not None and scan.band_freqs is not None:
        f = scan.band_freqs
        a1.semilogy(f, zone.spectrum, color="#D55E00", lw=1.4, label=f"{zone.class_name} zone average")
        if scan.healthy_spectrum is not None:
            a1.semilogy(f, scan.healthy_spectrum, color="#0072B2", lw=1.2, ls="--", label="sound concrete (|VER| < 1 dB)")
        a1.set_xlim(f[0], f[-1])
        a1.minorticks_off()  # a log axis's minor ticks were half the sheet's drawing time
        a1.yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:.0e}"))  # no mathtext to typeset
    else:
        a1.text(0.5, 0.5, "ready VER: no spectra in the bundle", ha="center", va="center", transform=a1.transAxes)
    if top.peak_hz == top.peak_hz:
        a1.axvline(top.peak_hz, color="black", lw=0.8, ls=":", label=f"peak {top.peak_hz:.0f} Hz")
    a1.set_xlabel("frequency (Hz), analysis band")
    a1.set_ylabel("PSD ((m/s)²/Hz)")
    if a1.get_legend_handles_labels()[0]:
        a1.legend(fontsize=7)
    a1.set_title(f"defect {defect.defect_id}: contours {_contour_areas(result, defect)} m²; outline {low.outline_area_m2:.4f} m² "
                 f"({low.outline_basis})", fontsize=8, y=TITLE_Y)
    peaks = []
    for sid in low.scan_id.split(";"):
        s = scans[sid]
        inside = shapely.contains_xy(low.contour, s.point_xy[:, 0], s.point_xy[:, 1]) & s.valid
        peaks.append(s.peak_hz[inside & np.isfinite(s.peak_hz)])
    p = np.concatenate(peaks) if peaks else np.zeros(0)
    if p.size:
        a2.hist(p, bins=min(30, max(5, p.size // 3)), color="#E69F00", edgecolor="black", lw=0.4)
    a2.ticklabel_format(axis="x", useOffset=False, style="plain")  # whole hertz, no "+2.6e3" offset
    a2.set_xlabel("per-point peak frequency (Hz)")
    a2.set_ylabel("points")
    a2.set_title(f"{top.zone_id}: peak {top.peak_hz:.0f} Hz, confidence {top.confidence:.2f}", fontsize=8, y=TITLE_Y)
    return _png(fig)


def element_map(result: "RunResult", element: str, drawing_lines: list[np.ndarray] | None = None) -> bytes:
    """One element at a readable scale: its scans, zones by class with their defect ids, outlines and
    repair footprints — the site map's zones are dots on a long structure, here they are not."""
    fig, ax = plt.subplots(figsize=PREVIEW_SIZE)
    fig.subplots_adjust(**MARGINS["preview"])
    scans = [s for s in result.scans if s.element == element and not s.extent.is_empty]
    zones = [z for z in result.zones if z.element == element]
    box = shapely.union_all([s.extent for s in scans] + [z.footprint for z in zones]).bounds
    pad = 0.08 * max(box[2] - box[0], box[3] - box[1])
    window = shapely.box(box[0] - pad, box[1] - pad, box[2] + pad, box[3] + pad)
    for line in drawing_lines or []:
        clipped = shapely.intersection(shapely.LineString(line), window) if len(line) > 1 else None
        if clipped is not None and not clipped.is_empty:
            for part in shapely.get_parts(clipped):
                xy = np.asarray(part.coords)
                ax.plot(xy[:, 0], xy[:, 1], color="0.7", lw=0.6)
    for s in scans:
        _rings(ax, s.extent, color="0.35", lw=0.8, ls=":")
        x0, _, _, y1 = s.extent.bounds
        ax.text(x0, y1, s.scan_id, fontsize=7, va="bottom", color="0.35")
    for z in zones:
        colour, ls = _class_style(result, z.class_name)
        ax.add_patch(MplPolygon(np.asarray(z.contour.exterior.coords), closed=True, fc=colour, ec=colour, alpha=0.45,
                                lw=0.8))
        if z.defect_id == z.zone_id:
            _rings(ax, z.defect, color=palette.hex_of(palette.DEFECT_RGB), lw=1.0, ls="--")
            _rings(ax, z.footprint, color=palette.hex_of(palette.REPAIR_RGB), lw=1.2)
            x0, _, x1, y1 = z.footprint.bounds
            ax.annotate(z.zone_id, ((x0 + x1) / 2, y1), fontsize=7, ha="center", va="bottom")
    handles = [Patch(color=_class_style(result, c.name)[0], alpha=0.45, label=f"{c.name} >= {c.threshold_db:g} dB")
               for c in result.site.zones.classes] + [
        Line2D([], [], color=palette.hex_of(palette.DEFECT_RGB), ls="--", label="defect outline"),
        Line2D([], [], color=palette.hex_of(palette.REPAIR_RGB), label="repair footprint")]
    ax.legend(handles=handles, loc="upper left", fontsize=7, framealpha=0.85)
    ax.set_xlim(window.bounds[0], window.bounds[2])
    ax.set_ylim(window.bounds[1], window.bounds[3])
    ax.set_aspect("equal")
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.set_title(f"element {element}: {len({z.defect_id for z in zones})} defect(s), {len(scans)} scan(s)", fontsize=10, y=TITLE_Y)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
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
               for c in result.site.zones.classes] + [Line2D([], [], color=palette.hex_of(palette.REPAIR_RGB), label="repair footprint")]
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.margins(0.04)
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=8, frameon=False)
    ax.set_title(f"{result.site.name} {result.site.structure} — screening zones (element pictures show them "
                 "at a readable scale)", fontsize=10, y=TITLE_Y)
    _fit_height(fig, ax)
    _scale_bar(ax, result.unit_m)
    _north(ax, result)
    return _png(fig)


def roc_curve(fpr: list[float], tpr: list[float], auc_value: float | None,
              marks: list[tuple[float, float, str]] = ()) -> bytes:
    """The ROC curve of VER against the sounding verdicts, the chance line, the AUC and marked levels."""
    fig = plt.figure(figsize=(5.0, 4.4))
    ax = fig.add_axes((0.14, 0.12, 0.8, 0.78))
    ax.plot([0, 1], [0, 1], color="0.6", lw=0.8, ls="--", label="chance")
    ax.plot(fpr, tpr, color="#D55E00", lw=1.6, drawstyle="default",
            label=f"VER against sounding (AUC {auc_value:.3f})" if auc_value is not None else "VER against sounding")
    for x, y, label in marks:
        ax.plot([x], [y], "o", color="#0072B2", ms=5)
        ax.annotate(label, (x, y), xytext=(6, -10), textcoords="offset points", fontsize=7)
    ax.set_xlim(-0.01, 1.01)
    ax.set_ylim(-0.01, 1.01)
    ax.set_aspect("equal")
    ax.set_xlabel("1 - specificity (sound points called hollow)")
    ax.set_ylabel("sensitivity (hollow points found)")
    ax.legend(loc="lower right", fontsize=7)
    ax.set_title("scans against hammer sounding, over the VER levels", fontsize=9, y=TITLE_Y)
    return _png(fig)


def agreement_map(result: "RunResult", scan_hollow: object, traced: object, points: np.ndarray,
                  agree: np.ndarray | None, level_db: float) -> bytes:
    """Where the scans (at ``level_db``) and the sounding agree and disagree, on the drawing."""
    fig, ax = plt.subplots(figsize=SITE_SIZE)
    fig.subplots_adjust(**MARGINS["site"])
    for s in result.scans:
        _rings(ax, s.extent, color="0.55", lw=0.7, ls=":")
    both = shapely.intersection(scan_hollow, traced)
    for geom, colour, label in ((shapely.difference(scan_hollow, traced), "#E69F00", "scans only"),
                                (shapely.difference(traced, scan_hollow), "#0072B2", "sounding only"),
                                (both, "#009E73", "both")):
        for part in shapely.get_parts(geom):
            if part.geom_type == "Polygon" and not part.is_empty:
                ax.add_patch(MplPolygon(np.asarray(part.exterior.coords), closed=True, fc=colour, ec=colour,
                                        alpha=0.6, lw=0.6))
    handles = [Patch(color=c, alpha=0.6, label=f"hollow: {t}") for c, t in
               (("#009E73", "both"), ("#E69F00", "scans only"), ("#0072B2", "sounding only"))]
    if len(points) and agree is not None:
        ax.plot(points[agree, 0], points[agree, 1], "o", ms=2.5, color="0.2", label="point: agree")
        ax.plot(points[~agree, 0], points[~agree, 1], "x", ms=4, color="#D55E00", label="point: disagree")
        handles += [Line2D([], [], marker="o", ls="", color="0.2", ms=3, label="point: agree"),
                    Line2D([], [], marker="x", ls="", color="#D55E00", ms=4, label="point: disagree")]
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.margins(0.04)
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    fig.legend(handles=handles, loc="lower center", ncol=5, fontsize=8, frameon=False)
    ax.set_title(f"scans at {level_db:g} dB against the sounding", fontsize=10, y=TITLE_Y)
    _fit_height(fig, ax)
    _scale_bar(ax, result.unit_m)
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
    from overlay.exporters.dxf import read_base_dxf

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
