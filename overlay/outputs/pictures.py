"""Pictures of one scan an engineer checks before trusting a number: the VER map with its zones
(full preview or campaign thumbnail), the sound field under it, a defect's spectrum and its sheet.

Each function returns PNG bytes (no file I/O here); site-wide pictures are in site_pictures.py,
what they share in plotting.py.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import matplotlib.pyplot as plt
import numpy as np
import shapely
from matplotlib.image import AxesImage
from matplotlib.ticker import FuncFormatter
from matplotlib.transforms import Affine2D
from matplotlib.tri import Triangulation

from overlay.outputs import plotting
from overlay.outputs.plotting import (
    MARGINS,
    PREVIEW_SIZE,
    SHEET_SIZE,
    TITLE_Y,
    VER_CMAP,
)

if TYPE_CHECKING:
    from overlay.job import RunResult
    from overlay.quantities import Defect
    from overlay.scan import ScanResult
    from overlay.zones.zone import Zone


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
    plotting.rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in zones_of(result, scan):
        colour, ls = plotting.class_style(result, z.class_name)
        plotting.rings(ax, z.contour, color=colour, lw=1.6, ls=ls)
        if z.defect_id == z.zone_id:
            p = z.contour.representative_point()
            ax.annotate(z.zone_id, (p.x, p.y), fontsize=7, ha="center", color="white",
                        bbox={"boxstyle": "round,pad=0.2", "fc": "black", "alpha": 0.6, "lw": 0})
    for c in result.site.zones.classes:
        colour, ls = plotting.class_style(result, c.name)
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
    plotting.scale_bar(ax, result.unit_m)
    plotting.north(ax, result)
    return plotting.png(fig)


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
    plotting.rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    bad = ~scan.valid
    if bad.any():
        ax.plot(xy[bad, 0], xy[bad, 1], "x", color="black", ms=3, mew=0.6)
    zones = zones_of(result, scan)
    for c in result.site.zones.classes:
        colour, ls = plotting.class_style(result, c.name)
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
    plotting.scale_bar(ax, result.unit_m)
    return plotting.png(fig)


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
    return plotting.png(fig)


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
    plotting.rings(ax, scan.extent, color="0.3", lw=0.8, ls=":")
    for z in zones_of(result, scan):
        if z.defect_id == z.zone_id:
            plotting.rings(ax, z.contour, color="white", lw=1.2)
    ax.set_aspect("equal")
    ax.margins(0.12)
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.set_title(f"scan {scan.scan_id} — sound field: spans {ref.field_span_db:.1f} dB, scatter "
                 f"{ref.field_scatter_db:.1f} dB; VER is measured against it", fontsize=10, y=TITLE_Y)
    plotting.scale_bar(ax, result.unit_m)
    plotting.north(ax, result)
    return plotting.png(fig)


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
    return plotting.png(fig)
