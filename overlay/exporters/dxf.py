"""DXF exporter: zones on layers of their own, in the drawing frame, for CAD — alone or on a copy
of the owner's as-built drawing.

Per class three layers (outline, fill, text); each zone is a closed
LWPOLYLINE per ring, a HATCH with its holes as islands, and a tag block
reference whose attributes carry id, class, area, peak frequency and
confidence.  The full attribute set rides on the outline as XDATA under the
application name ``OVERLAY_ZONES``.  Defect outlines, repair footprints, scan
extents, control targets, a legend and a note with the cautions have layers of
their own.  Every layer we create is marked as ours (XDATA on the layer), so a
rerun onto its own output replaces exactly our content and nothing else.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import TYPE_CHECKING, Any

import ezdxf
import shapely
import shapely.affinity
from ezdxf import const
from ezdxf.document import Drawing
from shapely.geometry import Polygon

from ..cautions import CAUTIONS
from ..errors import OutputConflictError, SiteFileError
from ..frames import UNIT_TO_M

if TYPE_CHECKING:
    from ..pipeline import RunResult
    from ..site import DxfStyle

APPID = "OVERLAY_ZONES"
OURS = "owner=overlay"
TAG_BLOCK = "OVL_ZONE_TAG"
CLASS_COLOURS = (2, 30, 1, 6, 5)  # ACI: yellow, orange, red, magenta, blue
INSUNITS = {"m": 6, "mm": 4}  # DXF reference, header variable $INSUNITS
UNIT_OF_INSUNITS = {v: k for k, v in INSUNITS.items()}
TAG_FIELDS = ("ID", "CLASS", "AREA_M2", "PEAK_HZ", "CONF")
MAX_TEXT = 250
MIN_BASE_VERSION = "AC1018"  # R2004: hatch transparency
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")


def clean_text(value: object, limit: int = MAX_TEXT) -> str:
    """Text safe for a DXF string: no control characters, bounded length."""
    return _CONTROL.sub(" ", str(value))[:limit]


def layer_names(class_name: str, prefix: str = "OVL") -> dict[str, str]:
    """Our layer names for one class."""
    c = class_name.upper()
    return {"outline": f"{prefix}-{c}-OUTLINE", "fill": f"{prefix}-{c}-FILL", "text": f"{prefix}-{c}-TEXT"}


def fixed_layers(prefix: str = "OVL") -> dict[str, str]:
    return {k: f"{prefix}-{v}" for k, v in (("defect", "DEFECT-OUTLINE"), ("repair", "REPAIR-FOOTPRINT"),
                                              ("extent", "SCAN-EXTENT"), ("control", "CONTROL"), ("note", "NOTE"))}


EXTENT_LAYER = fixed_layers()["extent"]
DEFECT_LAYER = fixed_layers()["defect"]
REPAIR_LAYER = fixed_layers()["repair"]
TARGET_LAYER = fixed_layers()["control"]
NOTE_LAYER = fixed_layers()["note"]


def is_ours(layer: Any) -> bool:
    return layer.has_xdata(APPID) and any(t.value == OURS for t in layer.get_xdata(APPID))


def read_base_dxf(path: Path) -> Drawing:
    """The owner's drawing, read; any failure is a site-file error naming it (exit 3), not a crash."""
    try:
        return ezdxf.readfile(path)
    except Exception as exc:  # ezdxf raises DXFError, but a truncated file can end in any exception
        raise SiteFileError(f"cannot read the base drawing ({type(exc).__name__}: {exc})", source=path,
                            field="dxf.base") from exc


def open_base(style: "DxfStyle", drawing_unit: str) -> tuple[Drawing, float]:
    """The owner's drawing and the factor from our drawing unit to its unit; refuses what cannot be converted."""
    assert style.base is not None
    src = str(style.base)
    doc = read_base_dxf(style.base)
    if doc.dxfversion < MIN_BASE_VERSION:
        raise SiteFileError(f"base drawing is DXF {doc.acad_release}; R2004 or newer is needed for fills",
                            source=src, field="dxf.base")
    code = int(doc.header.get("$INSUNITS", 0))
    unit = UNIT_OF_INSUNITS.get(code)
    if unit is None and code == 0 and style.base_unit:
        unit = style.base_unit
    if unit is None:
        hint = "unitless ($INSUNITS 0): say its unit with [dxf] base_unit" if code == 0 else f"$INSUNITS {code} is neither m nor mm"
        raise SiteFileError(f"base drawing unit unknown — {hint}", source=src, field="dxf.base")
    return doc, UNIT_TO_M[drawing_unit] / UNIT_TO_M[unit]


def clear_ours(doc: Drawing) -> None:
    """Remove what an earlier run drew (a rerun onto its own output), nothing else: entities on our
    own layers and entities carrying our application's XDATA."""
    ours = {layer.dxf.name.upper() for layer in doc.layers if is_ours(layer)}
    msp = doc.modelspace()
    for e in list(msp):
        if e.dxf.layer.upper() in ours or e.has_xdata(APPID):
            msp.delete_entity(e)


def check_clashes(doc: Drawing, names: list[str], style: "DxfStyle") -> None:
    """Refuse (exit 5) to draw onto a layer of the owner's that happens to have one of our names."""
    clash = [n for n in names if doc.layers.has_entry(n) and not is_ours(doc.layers.get(n))]
    if clash and not style.reuse_layers:
        raise OutputConflictError(
            f"the base drawing already has layer(s) {', '.join(clash)}; set [dxf] prefix to another name, "
            "or reuse_layers = true to draw onto them", source=style.base, field="dxf.prefix")


class DxfExporter:
    name = "dxf"
    suffix = ".dxf"
    description = "zones, defect outlines, repair footprints, extents and targets on our own layers (DXF, drawing frame)"

    def write(self, result: "RunResult", path: Path) -> None:
        style = result.site.dxf
        if style.base is not None:
            doc, k = open_base(style, result.site.drawing_unit)
        else:
            doc, k = ezdxf.new("R2013", setup=True), 1.0
            doc.header["$INSUNITS"] = INSUNITS[result.site.drawing_unit]
            doc.header["$MEASUREMENT"] = 1  # metric
        names = _layer_plan(result, style)
        check_clashes(doc, list(names), style)
        clear_ours(doc)
        if not doc.appids.has_entry(APPID):
            doc.appids.add(APPID)
        unit_m = result.unit_m / k  # metres per unit of the drawing we write into
        h = style.text_height_m / unit_m
        for name, colour in names.items():
            if not doc.layers.has_entry(name):  # only layers we create are marked ours
                doc.layers.add(name, color=colour).set_xdata(APPID, [(1000, OURS)])
        if not doc.styles.has_entry(style.text_style):
            doc.styles.add(style.text_style, font=style.font)
        _tag_block(doc, h, style.text_style)
        move = (lambda g: g) if k == 1.0 else (lambda g: shapely.affinity.scale(g, k, k, origin=(0, 0)))
        msp = doc.modelspace()
        before = {e.dxf.handle for e in msp}
        for zone in result.zones:
            _zone(msp, zone, move, style, h)
        fixed = fixed_layers(style.prefix)
        for zone in result.zones:
            if zone.defect_id != zone.zone_id:
                continue
            if not zone.defect.is_empty:
                for part in shapely.get_parts(move(zone.defect)):
                    msp.add_lwpolyline(list(part.exterior.coords)[:-1], close=True, dxfattribs={"layer": fixed["defect"]})
            fp = msp.add_lwpolyline(list(move(zone.footprint).exterior.coords)[:-1], close=True,
                                    dxfattribs={"layer": fixed["repair"]})
            fp.set_xdata(APPID, [(1000, clean_text(f"defect_id={zone.defect_id}")),
                                 (1000, f"footprint_area_m2={zone.footprint_area_m2:.4f}"),
                                 (1000, f"footprint_length_m={zone.footprint_length_m:.3f}"),
                                 (1000, f"footprint_width_m={zone.footprint_width_m:.3f}")])
        for scan in result.scans:
            if not scan.extent.is_empty:
                ext = move(scan.extent)
                msp.add_lwpolyline(list(ext.exterior.coords)[:-1], close=True, dxfattribs={"layer": fixed["extent"]})
                x0, _, _, y1 = ext.bounds
                msp.add_text(clean_text(f"scan {scan.scan_id}"), height=h,
                             dxfattribs={"layer": fixed["extent"], "style": style.text_style}).set_placement((x0, y1 + h * 0.5))
            for t in scan.targets:
                p = (t.drawing[0] * k, t.drawing[1] * k)
                msp.add_circle(p, radius=h * 0.6, dxfattribs={"layer": fixed["control"]})
                msp.add_line((p[0] - h, p[1]), (p[0] + h, p[1]), dxfattribs={"layer": fixed["control"]})
                msp.add_line((p[0], p[1] - h), (p[0], p[1] + h), dxfattribs={"layer": fixed["control"]})
                msp.add_text(clean_text(t.name), height=h * 0.8,
                             dxfattribs={"layer": fixed["control"], "style": style.text_style}).set_placement((p[0] + h, p[1] + h))
        _legend_and_note(msp, result, style, move, h)
        for e in msp:  # mark everything we drew, so a rerun can take it away again
            if e.dxf.handle not in before and not e.has_xdata(APPID):
                e.set_xdata(APPID, [(1000, OURS)])
        doc.saveas(path)


def _layer_plan(result: "RunResult", style: "DxfStyle") -> dict[str, int]:
    """Every layer we draw on, with its colour."""
    chosen = dict(style.colours)
    plan: dict[str, int] = {}
    for i, zc in enumerate(result.site.classes):
        colour = chosen.get(zc.name, CLASS_COLOURS[i % len(CLASS_COLOURS)])
        for name in layer_names(zc.name, style.prefix).values():
            plan[name] = colour
    fixed = fixed_layers(style.prefix)
    plan.update({fixed["defect"]: 1, fixed["repair"]: 3, fixed["extent"]: 8, fixed["control"]: 4, fixed["note"]: 7})
    return plan


def _zone(msp: Any, zone: Any, move: Any, style: "DxfStyle", h: float) -> None:
    names = layer_names(zone.class_name, style.prefix)
    contour = move(zone.contour)
    outline = None
    for ring in [contour.exterior, *contour.interiors]:
        pl = msp.add_lwpolyline(list(ring.coords)[:-1], close=True, dxfattribs={"layer": names["outline"]})
        outline = outline or pl
    assert outline is not None
    outline.set_xdata(APPID, [(1000, clean_text(f"{k}={_fmt(v)}")) for k, v in zone.record().items()])
    hatch = msp.add_hatch(dxfattribs={"layer": names["fill"]})
    if style.fill.upper() != "SOLID":
        hatch.set_pattern_fill(style.fill.upper(), scale=h * 4)
    hatch.paths.add_polyline_path(list(contour.exterior.coords)[:-1], is_closed=True,
                                  flags=const.BOUNDARY_PATH_EXTERNAL | const.BOUNDARY_PATH_OUTERMOST)
    for hole in contour.interiors:
        hatch.paths.add_polyline_path(list(hole.coords)[:-1], is_closed=True, flags=const.BOUNDARY_PATH_DEFAULT)
    hatch.transparency = style.fill_transparency
    p = contour.representative_point()
    ref = msp.add_blockref(TAG_BLOCK, (p.x, p.y), dxfattribs={"layer": names["text"]})
    ref.add_auto_attribs({
        "ID": clean_text(zone.zone_id),
        "CLASS": clean_text(zone.class_name),
        "AREA_M2": f"{zone.area_m2:.3f}",
        "PEAK_HZ": f"{zone.peak_hz:.0f}" if zone.peak_hz == zone.peak_hz else "",
        "CONF": f"{zone.confidence:.2f}",
    })


def _fmt(v: object) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)


def _tag_block(doc: Drawing, h: float, text_style: str) -> None:
    if TAG_BLOCK in doc.blocks:
        doc.blocks.delete_block(TAG_BLOCK, safe=False)
    blk = doc.blocks.new(TAG_BLOCK)
    for i, tag in enumerate(TAG_FIELDS):
        blk.add_attdef(tag, (0, -i * h * 1.3), dxfattribs={"height": h, "invisible": 0 if i < 3 else 1, "style": text_style})


def _legend_and_note(msp: Any, result: "RunResult", style: "DxfStyle", move: Any, h: float) -> None:
    site = result.site
    note = fixed_layers(style.prefix)["note"]
    boxes = [move(s.extent).bounds for s in result.scans if not s.extent.is_empty]
    x = min(b[0] for b in boxes) if boxes else 0.0
    y = min(b[1] for b in boxes) - 4 * h if boxes else 0.0
    plan = _layer_plan(result, style)
    for i, zc in enumerate(site.classes):
        yy = y - i * 2 * h
        fill = layer_names(zc.name, style.prefix)["fill"]
        sq = Polygon([(x, yy), (x + 1.5 * h, yy), (x + 1.5 * h, yy + 1.5 * h), (x, yy + 1.5 * h)])
        hatch = msp.add_hatch(color=plan[fill], dxfattribs={"layer": note})
        hatch.paths.add_polyline_path(list(sq.exterior.coords)[:-1], is_closed=True)
        msp.add_text(clean_text(f"{zc.name}: vibration energy ratio >= {zc.threshold_db:g} dB"), height=h,
                     dxfattribs={"layer": note, "style": style.text_style}).set_placement((x + 2.5 * h, yy))
    lines = [
        f"{site.name} {site.structure}".strip(),
        f"Suspect zones from acoustic scans, run {result.started}, overlay {result.tool_version}",
        "Dashed: estimated defect outline. Rectangles: repair footprint "
        f"(margin {site.margin_m:g} m, basis {site.basis}).",
        *CAUTIONS,
    ]
    top = y - len(site.classes) * 2 * h - h
    msp.add_mtext("\\P".join(clean_text(line) for line in lines),
                  dxfattribs={"layer": note, "char_height": h, "style": style.text_style}).set_location((x, top))
