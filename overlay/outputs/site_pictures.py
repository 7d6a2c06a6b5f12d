"""Pictures of the whole site: the site map, one picture per element at a readable scale, the written
DXF rendered back as CAD shows it, and the calibration's ROC curve and agreement map.

Each function returns PNG bytes; reading the base drawing's lines is the only file access.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

import matplotlib.pyplot as plt
import numpy as np
import shapely
from matplotlib.lines import Line2D
from matplotlib.patches import Patch
from matplotlib.patches import Polygon as MplPolygon

from overlay.outputs import palette, plotting
from overlay.outputs.plotting import MARGINS, PREVIEW_SIZE, SITE_SIZE, TITLE_Y

if TYPE_CHECKING:
    from overlay.job import RunResult

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
        plotting.rings(ax, s.extent, color="0.35", lw=0.8, ls=":")
        x0, _, _, y1 = s.extent.bounds
        ax.text(x0, y1, s.scan_id, fontsize=7, va="bottom", color="0.35")
    for z in zones:
        colour, ls = plotting.class_style(result, z.class_name)
        ax.add_patch(MplPolygon(np.asarray(z.contour.exterior.coords), closed=True, fc=colour, ec=colour, alpha=0.45,
                                lw=0.8))
        if z.defect_id == z.zone_id:
            plotting.rings(ax, z.defect, color=palette.hex_of(palette.DEFECT_RGB), lw=1.0, ls="--")
            plotting.rings(ax, z.footprint, color=palette.hex_of(palette.REPAIR_RGB), lw=1.2)
            x0, _, x1, y1 = z.footprint.bounds
            ax.annotate(z.zone_id, ((x0 + x1) / 2, y1), fontsize=7, ha="center", va="bottom")
    handles = [Patch(color=plotting.class_style(result, c.name)[0], alpha=0.45, label=f"{c.name} >= {c.threshold_db:g} dB")
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
    plotting.scale_bar(ax, result.unit_m)
    plotting.north(ax, result)
    return plotting.png(fig)


def site_map(result: "RunResult", drawing_lines: list[np.ndarray] | None = None) -> bytes:
    """All scans and zones on the drawing outline (the base drawing's lines in grey, when given)."""
    fig, ax = plt.subplots(figsize=SITE_SIZE)
    fig.subplots_adjust(**MARGINS["site"])
    for line in drawing_lines or []:
        ax.plot(line[:, 0], line[:, 1], color="0.65", lw=0.6)
    for s in result.scans:
        plotting.rings(ax, s.extent, color="0.35", lw=0.8, ls=":")
        if not s.extent.is_empty:
            x0, _, _, y1 = s.extent.bounds
            ax.text(x0, y1, s.scan_id, fontsize=7, va="bottom")
    for z in result.zones:
        colour, ls = plotting.class_style(result, z.class_name)
        ax.add_patch(MplPolygon(np.asarray(z.contour.exterior.coords), closed=True, fc=colour, ec=colour, alpha=0.5, lw=0.8))
        if z.defect_id == z.zone_id:
            plotting.rings(ax, z.footprint, color=palette.hex_of(palette.REPAIR_RGB), lw=0.8)
    handles = [Patch(color=plotting.class_style(result, c.name)[0], alpha=0.5, label=f"{c.name} >= {c.threshold_db:g} dB")
               for c in result.site.zones.classes] + [Line2D([], [], color=palette.hex_of(palette.REPAIR_RGB), label="repair footprint")]
    ax.set_aspect("equal")
    ax.autoscale_view()
    ax.set_xlabel(f"drawing x ({result.site.drawing_unit})")
    ax.set_ylabel(f"drawing y ({result.site.drawing_unit})")
    ax.margins(0.04)
    fig.legend(handles=handles, loc="lower center", ncol=4, fontsize=8, frameon=False)
    ax.set_title(f"{result.site.name} {result.site.structure} — screening zones (element pictures show them "
                 "at a readable scale)", fontsize=10, y=TITLE_Y)
    plotting.fit_height(fig, ax)
    plotting.scale_bar(ax, result.unit_m)
    plotting.north(ax, result)
    return plotting.png(fig)


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
    return plotting.png(fig)


def agreement_map(result: "RunResult", scan_hollow: object, traced: object, points: np.ndarray,
                  agree: np.ndarray | None, level_db: float) -> bytes:
    """Where the scans (at ``level_db``) and the sounding agree and disagree, on the drawing."""
    fig, ax = plt.subplots(figsize=SITE_SIZE)
    fig.subplots_adjust(**MARGINS["site"])
    for s in result.scans:
        plotting.rings(ax, s.extent, color="0.55", lw=0.7, ls=":")
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
    plotting.fit_height(fig, ax)
    plotting.scale_bar(ax, result.unit_m)
    return plotting.png(fig)


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
    return plotting.png(fig)
