"""DXF exporter: zones on layers per class, in the drawing frame and unit, for CAD.

Per class three layers (outline, fill, text); each zone is a closed
LWPOLYLINE per ring, a solid HATCH with its holes as islands, and a tag block
reference whose attributes carry id, class, area, peak frequency and
confidence.  The full attribute set rides on the outline as XDATA under the
application name ``OVERLAY_ZONES``.  Scan extents, control targets and a note
with the cautions have layers of their own.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import TYPE_CHECKING

import ezdxf
from ezdxf import const
from shapely.geometry import Polygon

from ..cautions import CAUTIONS

if TYPE_CHECKING:
    from ..pipeline import RunResult

APPID = "OVERLAY_ZONES"
TAG_BLOCK = "OVL_ZONE_TAG"
PREFIX = "OVL"
CLASS_COLOURS = (2, 30, 1, 6, 5)  # ACI: yellow, orange, red, magenta, blue
INSUNITS = {"m": 6, "mm": 4}  # DXF reference, header variable $INSUNITS
TAG_FIELDS = ("ID", "CLASS", "AREA_M2", "PEAK_HZ", "CONF")
MAX_TEXT = 250
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def clean_text(value: object, limit: int = MAX_TEXT) -> str:
    """Text safe for a DXF string: no control characters, bounded length."""
    return _CONTROL.sub(" ", str(value))[:limit]


def layer_names(class_name: str) -> dict[str, str]:
    """Our layer names for one class."""
    c = class_name.upper()
    return {"outline": f"{PREFIX}-{c}-OUTLINE", "fill": f"{PREFIX}-{c}-FILL", "text": f"{PREFIX}-{c}-TEXT"}


EXTENT_LAYER = f"{PREFIX}-SCAN-EXTENT"
DEFECT_LAYER = f"{PREFIX}-DEFECT-OUTLINE"
REPAIR_LAYER = f"{PREFIX}-REPAIR-FOOTPRINT"
TARGET_LAYER = f"{PREFIX}-CONTROL"
NOTE_LAYER = f"{PREFIX}-NOTE"


class DxfExporter:
    name = "dxf"
    suffix = ".dxf"
    description = "zones, scan extents and control targets on layers of their own (DXF R2013, drawing frame)"

    def write(self, result: "RunResult", path: Path) -> None:
        doc = ezdxf.new("R2013", setup=True)
        doc.header["$INSUNITS"] = INSUNITS[result.site.drawing_unit]
        doc.header["$MEASUREMENT"] = 1  # metric
        doc.appids.add(APPID)
        text_h = 0.06 / result.unit_m  # 60 mm tall text, in drawing units
        _layers(doc, result)
        _tag_block(doc, text_h)
        msp = doc.modelspace()
        for zone in result.zones:
            names = layer_names(zone.class_name)
            rings = [zone.contour.exterior, *zone.contour.interiors]
            outline = None
            for ring in rings:
                pl = msp.add_lwpolyline(list(ring.coords)[:-1], close=True, dxfattribs={"layer": names["outline"]})
                outline = outline or pl
            assert outline is not None
            outline.set_xdata(APPID, [(1000, clean_text(f"{k}={_fmt(v)}")) for k, v in zone.record().items()])
            hatch = msp.add_hatch(dxfattribs={"layer": names["fill"]})
            hatch.paths.add_polyline_path(list(zone.contour.exterior.coords)[:-1], is_closed=True,
                                          flags=const.BOUNDARY_PATH_EXTERNAL | const.BOUNDARY_PATH_OUTERMOST)
            for hole in zone.contour.interiors:
                hatch.paths.add_polyline_path(list(hole.coords)[:-1], is_closed=True, flags=const.BOUNDARY_PATH_DEFAULT)
            hatch.transparency = 0.6
            p = _label_point(zone.contour)
            ref = msp.add_blockref(TAG_BLOCK, p, dxfattribs={"layer": names["text"]})
            ref.add_auto_attribs({
                "ID": clean_text(zone.zone_id),
                "CLASS": clean_text(zone.class_name),
                "AREA_M2": f"{zone.area_m2:.3f}",
                "PEAK_HZ": f"{zone.peak_hz:.0f}" if zone.peak_hz == zone.peak_hz else "",
                "CONF": f"{zone.confidence:.2f}",
            })
        for zone in result.zones:
            if zone.defect_id != zone.zone_id:
                continue
            if not zone.defect.is_empty:
                msp.add_lwpolyline(list(zone.defect.exterior.coords)[:-1], close=True, dxfattribs={"layer": DEFECT_LAYER})
            fp = msp.add_lwpolyline(list(zone.footprint.exterior.coords)[:-1], close=True, dxfattribs={"layer": REPAIR_LAYER})
            fp.set_xdata(APPID, [(1000, clean_text(f"defect_id={zone.defect_id}")),
                                 (1000, f"footprint_area_m2={zone.footprint_area_m2:.4f}"),
                                 (1000, f"footprint_length_m={zone.footprint_length_m:.3f}"),
                                 (1000, f"footprint_width_m={zone.footprint_width_m:.3f}")])
        for scan in result.scans:
            if not scan.extent.is_empty:
                msp.add_lwpolyline(list(scan.extent.exterior.coords)[:-1], close=True, dxfattribs={"layer": EXTENT_LAYER})
                x0, y0, _, y1 = scan.extent.bounds
                msp.add_text(clean_text(f"scan {scan.scan_id}"), height=text_h,
                             dxfattribs={"layer": EXTENT_LAYER}).set_placement((x0, y1 + text_h * 0.5))
            for t in scan.targets:
                msp.add_circle(t.drawing, radius=text_h * 0.6, dxfattribs={"layer": TARGET_LAYER})
                msp.add_point(t.drawing, dxfattribs={"layer": TARGET_LAYER})
                msp.add_text(clean_text(t.name), height=text_h * 0.8, dxfattribs={"layer": TARGET_LAYER}).set_placement(
                    (t.drawing[0] + text_h, t.drawing[1] + text_h)
                )
        _note(msp, result, text_h)
        doc.saveas(path)


def _fmt(v: object) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)


def _layers(doc: ezdxf.document.Drawing, result: "RunResult") -> None:
    for i, zc in enumerate(result.site.classes):
        colour = CLASS_COLOURS[i % len(CLASS_COLOURS)]
        for kind, name in layer_names(zc.name).items():
            doc.layers.add(name, color=colour)
    doc.layers.add(EXTENT_LAYER, color=8, linetype="DASHED")
    doc.layers.add(DEFECT_LAYER, color=1, linetype="DASHED")
    doc.layers.add(REPAIR_LAYER, color=3)
    doc.layers.add(TARGET_LAYER, color=4)
    doc.layers.add(NOTE_LAYER, color=7)


def _tag_block(doc: ezdxf.document.Drawing, h: float) -> None:
    blk = doc.blocks.new(TAG_BLOCK)
    for i, tag in enumerate(TAG_FIELDS):
        blk.add_attdef(tag, (0, -i * h * 1.3), dxfattribs={"height": h, "invisible": 0 if i < 3 else 1})


def _label_point(poly: Polygon) -> tuple[float, float]:
    p = poly.representative_point()
    return (p.x, p.y)


def _note(msp: ezdxf.layouts.Modelspace, result: "RunResult", h: float) -> None:
    site = result.site
    boxes = [s.extent.bounds for s in result.scans if not s.extent.is_empty]
    x = min(b[0] for b in boxes) if boxes else 0.0
    y = min(b[1] for b in boxes) - 4 * h if boxes else 0.0
    classes = ", ".join(f"{c.name} >= {c.threshold_db:g} dB" for c in site.classes)
    lines = [
        f"{site.name} {site.structure}".strip(),
        f"Suspect zones from acoustic scans, run {result.started}, overlay {result.tool_version}",
        f"Classes (vibration energy ratio): {classes}",
        *CAUTIONS,
    ]
    msp.add_mtext("\\P".join(clean_text(line) for line in lines), dxfattribs={"layer": NOTE_LAYER, "char_height": h}).set_location(
        (x, y)
    )
