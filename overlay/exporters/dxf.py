"""DXF exporter: zones on layers of their own, in the drawing frame, legible on screen and on paper —
alone or on a copy of the owner's as-built drawing.

Per class three layers (outline, fill, text): each zone is a closed LWPOLYLINE per
ring, a HATCH (its holes as islands, colour and transparency by layer) and a tag
block reference whose attributes carry id, class, area, peak frequency and
confidence (hidden: a CAD program's attribute table lists them).  Each defect gets
one visible label (MTEXT: id, highest class, area, peak frequency) placed clear of
every other label and defect, with a leader when it cannot sit on its zone.  Defect
outlines (dashed), repair footprints (heavy), scan extents (dotted) and control
targets have layers of their own, told apart by linetype and lineweight as well
as colour, so a black-and-white print keeps them apart.  Every text is sized for
the plot scale (2.5 mm labels, 1.8 mm notes on paper); the legend and the note sit
below everything drawn; the drawing opens zoomed to its extents, and a paper-space
sheet (overlay.outputs.sheet) is ready to plot.  Every layer and layout we create and every
entity we draw is marked as ours, so a rerun onto its own output replaces exactly
our content and nothing else.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import ezdxf
import shapely
import shapely.affinity
from ezdxf import bbox, const, zoom
from ezdxf.document import Drawing
from ezdxf.fonts import fonts
from shapely.geometry import LineString, Polygon

from overlay.cautions import CAUTIONS
from overlay.errors import OutputConflictError, SiteFileError
from overlay.outputs import dxf_save, palette, sheet
from overlay.outputs.labels import Item, leader_end, place_labels
from overlay.quantities import defects
from overlay.units import LENGTH_TO_M

if TYPE_CHECKING:
    from overlay.job import RunResult
    from overlay.settings import DxfStyle
    from overlay.zones.zone import Zone

APPID = "OVERLAY_ZONES"
OURS = "owner=overlay"
TAG_BLOCK = "OVL_ZONE_TAG"
INSUNITS = {"m": 6, "mm": 4}  # DXF reference, header variable $INSUNITS
UNIT_OF_INSUNITS = {v: k for k, v in INSUNITS.items()}
TAG_FIELDS = ("ID", "CLASS", "AREA_M2", "PEAK_HZ", "CONF")
MAX_TEXT = 250
MIN_BASE_VERSION = "AC1018"  # R2004: hatch transparency, true colour
_CONTROL = re.compile(r"[\x00-\x1f\x7f]")
# linetype patterns on paper, mm (dash > 0, gap < 0, dot 0), scaled into the drawing with the plot scale
LINETYPES = {"DASH": ("dashed __ __", [2.5, -1.25]), "DASHDOT": ("dash dot __ . __", [3.0, -1.0, 0.0, -1.0]),
             "DOT": ("dotted . . .", [0.0, -1.0]), "LONGDASH": ("long dashed ____ ____", [6.0, -2.0])}
DASH_OF = {"-": None, "--": "DASH", "-.": "DASHDOT", ":": "DOT"}  # palette line style → our linetype
MTEXT_LINE = 5 / 3  # MTEXT line spacing in character heights (DXF reference, line spacing factor 1)
NAME_RINGS = 6  # how far (in label heights) a target or scan name may move from its symbol
LINEWEIGHT = {"outline": 35, "defect": 35, "repair": 70, "extent": 18, "control": 25, "text": 18, "note": 18}


def clean_text(value: object, limit: int = MAX_TEXT) -> str:
    """Text safe for a DXF string: no control characters, bounded length."""
    return _CONTROL.sub(" ", str(value))[:limit]


def layer_names(class_name: str, prefix: str = "OVL") -> dict[str, str]:
    """Our layer names for one class."""
    c = class_name.upper()
    return {"outline": f"{prefix}-{c}-OUTLINE", "fill": f"{prefix}-{c}-FILL", "text": f"{prefix}-{c}-TEXT"}


def fixed_layers(prefix: str = "OVL") -> dict[str, str]:
    return {k: f"{prefix}-{v}" for k, v in (("defect", "DEFECT-OUTLINE"), ("repair", "REPAIR-FOOTPRINT"),
                                              ("extent", "SCAN-EXTENT"), ("control", "CONTROL"),
                                              ("annotation", "ANNOTATION"), ("note", "NOTE"),
                                              ("detail", "DETAIL"), ("sheet", "SHEET"))}


def linetype_name(prefix: str, key: str) -> str:
    return f"{prefix}-{key}"


def is_ours(entry: Any) -> bool:
    return entry.has_xdata(APPID) and any(t.value == OURS for t in entry.get_xdata(APPID))


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
    return doc, LENGTH_TO_M[drawing_unit] / LENGTH_TO_M[unit]


def clear_ours(doc: Drawing) -> None:
    """Remove what an earlier run drew (a rerun onto its own output), nothing else: entities on our
    own layers and entities carrying our application's XDATA, and our paper-space sheets."""
    ours = {layer.dxf.name.upper() for layer in doc.layers if is_ours(layer)}
    msp = doc.modelspace()
    for e in list(msp):
        if e.dxf.layer.upper() in ours or e.has_xdata(APPID):
            msp.delete_entity(e)
    sheet.delete_sheets(doc, is_ours)


def check_clashes(doc: Drawing, names: list[str], style: "DxfStyle") -> None:
    """Refuse (exit 5) to draw onto a layer of the owner's that happens to have one of our names."""
    clash = [n for n in names if doc.layers.has_entry(n) and not is_ours(doc.layers.get(n))]
    if clash and not style.reuse_layers:
        raise OutputConflictError(
            f"the base drawing already has layer(s) {', '.join(clash)}; set [dxf] prefix to another name, "
            "or reuse_layers = true to draw onto them", source=style.base, field="dxf.prefix")


@dataclass(frozen=True)
class LayerLook:
    aci: int
    rgb: palette.RGB
    linetype: str  # "" for continuous
    lineweight: int  # 1/100 mm


@dataclass(frozen=True)
class Lettering:
    """Text heights in the units of the drawing we write into, from heights on paper at the plot scale."""

    scale: int
    label: float
    note: float
    per_mm: float  # drawing units per millimetre of paper


class DxfExporter:
    name = "dxf"
    suffix = ".dxf"
    description = "zones, labels, defect outlines, repair footprints, extents, targets and a ready A-series sheet (DXF)"

    def write(self, result: "RunResult", path: Path) -> None:
        style = result.site.dxf
        if style.base is not None:
            doc, k = open_base(style, result.site.drawing_unit)
        else:
            doc, k = ezdxf.new("R2013", setup=True), 1.0
            doc.header["$INSUNITS"] = INSUNITS[result.site.drawing_unit]
            doc.header["$MEASUREMENT"] = 1  # metric
        looks = layer_plan(result, style)
        check_clashes(doc, list(looks), style)
        clear_ours(doc)
        if not doc.appids.has_entry(APPID):
            doc.appids.add(APPID)
        unit_m = result.unit_m / k  # metres per unit of the drawing we write into
        move = (lambda g: g) if k == 1.0 else (lambda g: shapely.affinity.scale(g, k, k, origin=(0, 0)))
        msp = doc.modelspace()
        before = {e.dxf.handle for e in msp}
        owners_box = bbox.extents(msp) if len(msp) else None
        owners_text = _text_boxes(msp)  # the owner's text and symbols: our labels keep off them
        drawn = [move(g) for g in _our_geometries(result)]
        plan = sheet.plan_sheet(style.sheet, _bounds(drawn, owners_box), unit_m, style.plot_scale, result, move)
        text = Lettering(plan.scale, style.label_height_mm * plan.per_mm, style.note_height_mm * plan.per_mm,
                         plan.per_mm)
        _linetypes(doc, style.prefix, text.per_mm)
        for name, look in looks.items():
            _layer(doc, name, look, style.prefix)
        if not doc.styles.has_entry(style.text_style):
            doc.styles.add(style.text_style, font=style.font)
        _tag_block(doc, text.note, style.text_style)
        for zone in result.zones:
            _zone(msp, zone, move, style, text.note)
        fixed = fixed_layers(style.prefix)
        for zone in result.zones:
            if zone.defect_id == zone.zone_id:
                _defect(msp, zone, move, fixed)
        _scans(msp, result, move, fixed, text, k)
        h = text.note  # our target symbols: a cross of half-size h (their boxes known without measuring)
        around = owners_text + [shapely.box(t.drawing[0] * k - h, t.drawing[1] * k - h, t.drawing[0] * k + h,
                                            t.drawing[1] * k + h) for sc in result.scans for t in sc.targets]
        placed = _labels(msp, result, move, style, text, around)
        zones = [move(z.contour) for z in result.zones] + [move(z.defect) for z in result.zones if not z.defect.is_empty]
        leaders = [LineString([p.anchor, leader_end(p.box, p.anchor)]) for p in placed if not p.inside]
        names = _names(msp, result, move, fixed, text, style, k, around + [p.box for p in placed] + leaders + zones)
        # the legend goes below everything drawn: bounds we know (measuring every entity again costs a second
        # on a campaign's drawing); the labels' boxes with a line's height to spare for the font's own measure
        spare = [p.box.buffer(text.label, join_style="mitre") for p in placed]
        legend_from = len(msp)
        _legend_and_note(msp, result, style, text, _bounds(drawn + around + spare + names, owners_box))
        sheet.callouts(msp, plan, fixed["detail"], text.note, style.text_style)
        for e in msp:  # mark everything we drew, so a rerun can take it away again
            if e.dxf.handle not in before and not e.has_xdata(APPID):
                e.set_xdata(APPID, [(1000, OURS)])
        # what is drawn spans what we know the bounds of, and the legend, note and callouts measured by
        # ezdxf (measuring every entity again took 4-5 s on an 800-scan campaign's 45,000 entities)
        extent = bbox.extents(list(msp)[legend_from:])
        x0, y0, x1, y1 = _bounds(drawn + around + [p.box for p in placed] + leaders + names, owners_box)
        extent.extend([(x0, y0), (x1, y1)])
        _open_at_extents(doc, extent)
        sheet.add_sheets(doc, result, plan, fixed["sheet"], style, (APPID, OURS), move)
        dxf_save.save(doc, path)


def layer_plan(result: "RunResult", style: "DxfStyle") -> dict[str, LayerLook]:
    """Every layer we draw on and how it looks: class layers in the shared palette, the others by kind."""
    looks: dict[str, LayerLook] = {}
    for c in palette.for_site(result.site).values():
        names = layer_names(c.name, style.prefix)
        lt = DASH_OF.get(c.dash) or ""
        looks[names["outline"]] = LayerLook(c.aci, c.rgb, lt, LINEWEIGHT["outline"])
        looks[names["fill"]] = LayerLook(c.aci, c.rgb, "", 0)
        looks[names["text"]] = LayerLook(c.aci, c.rgb, "", LINEWEIGHT["text"])
    fixed = fixed_layers(style.prefix)
    for key, rgb, lt in (("defect", palette.DEFECT_RGB, "LONGDASH"), ("repair", palette.REPAIR_RGB, ""),
                         ("extent", palette.EXTENT_RGB, "DOT"), ("control", palette.TARGET_RGB, ""),
                         ("annotation", palette.EXTENT_RGB, ""),
                         ("note", palette.TARGET_RGB, ""), ("detail", palette.EXTENT_RGB, "DASH"),
                         ("sheet", palette.TARGET_RGB, "")):
        looks[fixed[key]] = LayerLook(palette.nearest_aci(rgb), rgb, lt, LINEWEIGHT.get(key, 25))
    return looks


def _our_geometries(result: "RunResult") -> list[Any]:
    out: list[Any] = [s.extent for s in result.scans if not s.extent.is_empty]
    for z in result.zones:
        out += [z.contour, z.footprint] + ([z.defect] if not z.defect.is_empty else [])
    return out


def _bounds(geoms: list[Any], extra: Any = None) -> tuple[float, float, float, float]:
    """(x0, y0, x1, y1) of our geometries and, if given, an ezdxf bounding box."""
    boxes = [g.bounds for g in geoms if not g.is_empty]
    if extra is not None and extra.has_data:
        boxes.append((extra.extmin.x, extra.extmin.y, extra.extmax.x, extra.extmax.y))
    if not boxes:
        return (0.0, 0.0, 1.0, 1.0)
    return (min(b[0] for b in boxes), min(b[1] for b in boxes), max(b[2] for b in boxes), max(b[3] for b in boxes))


def _linetypes(doc: Drawing, prefix: str, per_mm: float) -> None:
    """Our dashed linetypes in the LTYPE table, patterns sized to print at their paper lengths."""
    for key, (description, mm) in LINETYPES.items():
        name = linetype_name(prefix, key)
        pattern = [sum(abs(v) for v in mm) * per_mm] + [v * per_mm for v in mm]
        if doc.linetypes.has_entry(name):
            doc.linetypes.remove(name)
        doc.linetypes.add(name, pattern=pattern, description=description)


def _layer(doc: Drawing, name: str, look: LayerLook, prefix: str) -> None:
    if doc.layers.has_entry(name):
        layer = doc.layers.get(name)
        if not is_ours(layer):  # an owner's layer we were told to reuse: drawn onto, left as it is
            return
    else:
        layer = doc.layers.add(name)
        layer.set_xdata(APPID, [(1000, OURS)])
    layer.color = look.aci
    layer.rgb = look.rgb  # true colour (group 420); programs without it use the nearest ACI
    layer.dxf.linetype = linetype_name(prefix, look.linetype) if look.linetype else "Continuous"
    layer.dxf.lineweight = look.lineweight


def _zone(msp: Any, zone: "Zone", move: Any, style: "DxfStyle", h: float) -> None:
    names = layer_names(zone.class_name, style.prefix)
    contour = move(zone.contour)
    outline = None
    for ring in [contour.exterior, *contour.interiors]:
        pl = msp.add_lwpolyline(list(ring.coords)[:-1], close=True, dxfattribs={"layer": names["outline"]})
        outline = outline or pl
    assert outline is not None
    outline.set_xdata(APPID, [(1000, clean_text(f"{k}={_fmt(v)}")) for k, v in zone.record().items()])
    hatch = msp.add_hatch(color=const.BYLAYER, dxfattribs={"layer": names["fill"]})
    if style.fill.upper() != "SOLID":
        hatch.set_pattern_fill(style.fill.upper(), color=const.BYLAYER, scale=h * 4)
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
    for attrib in ref.attribs:  # data for the attribute table; the visible label is the MTEXT
        attrib.dxf.layer = names["text"]
        attrib.dxf.flags = const.ATTRIB_INVISIBLE


def _defect(msp: Any, zone: "Zone", move: Any, fixed: dict[str, str]) -> None:
    if not zone.defect.is_empty:
        for part in shapely.get_parts(move(zone.defect)):
            msp.add_lwpolyline(list(part.exterior.coords)[:-1], close=True, dxfattribs={"layer": fixed["defect"]})
    fp = msp.add_lwpolyline(list(move(zone.footprint).exterior.coords)[:-1], close=True,
                            dxfattribs={"layer": fixed["repair"]})
    fp.set_xdata(APPID, [(1000, clean_text(f"defect_id={zone.defect_id}")),
                         (1000, f"footprint_area_m2={zone.footprint_area_m2:.4f}"),
                         (1000, f"footprint_length_m={zone.footprint_length_m:.3f}"),
                         (1000, f"footprint_width_m={zone.footprint_width_m:.3f}")])


def _scans(msp: Any, result: "RunResult", move: Any, fixed: dict[str, str], text: Lettering, k: float) -> None:
    """Scan extents and target symbols; their names are placed after the defect labels (_names)."""
    h = text.note
    for scan in result.scans:
        if not scan.extent.is_empty:
            ext = move(scan.extent)
            msp.add_lwpolyline(list(ext.exterior.coords)[:-1], close=True, dxfattribs={"layer": fixed["extent"]})
        for t in scan.targets:
            p = (t.drawing[0] * k, t.drawing[1] * k)
            msp.add_circle(p, radius=h * 0.6, dxfattribs={"layer": fixed["control"]})
            msp.add_line((p[0] - h, p[1]), (p[0] + h, p[1]), dxfattribs={"layer": fixed["control"]})
            msp.add_line((p[0], p[1] - h), (p[0], p[1] + h), dxfattribs={"layer": fixed["control"]})


def _names(msp: Any, result: "RunResult", move: Any, fixed: dict[str, str], text: Lettering, style: "DxfStyle",
           k: float, obstacles: list[Polygon]) -> list[Polygon]:
    """Scan and target names, placed like the defect labels: clear of each other, of every label and
    leader, of the defects' zones and of the symbols; a thin leader where a name had to move away.
    A name with no clear place within NAME_RINGS rings of its symbol is left out: at a scale where
    the names would crowd the drawing they are noise (the scan pictures and fit reports name them)."""
    h = text.note
    font = fonts.make_font(style.font, h)
    items: list[Item] = []
    for scan in result.scans:
        if not scan.extent.is_empty:
            x0, _, _, y1 = move(scan.extent).bounds
            items.append(Item(f"scan {scan.scan_id}", shapely.box(x0, y1, x0 + h, y1 + h),
                              font.text_width(f"scan {scan.scan_id}"), h * 1.35))
        for t in scan.targets:
            x, y = t.drawing[0] * k, t.drawing[1] * k
            items.append(Item(t.name, shapely.box(x - h, y - h, x + h, y + h), font.text_width(t.name), h * 1.35))
    unique = list({it.key: it for it in items}.values())  # a target seen by two scans is named once
    placed = place_labels(unique, gap=h * 0.4, obstacles=obstacles, rings=NAME_RINGS, optional=True)
    for p in placed:
        x0, y0, _, _ = p.box.bounds
        msp.add_text(clean_text(p.key), height=h, dxfattribs={"layer": fixed["annotation"], "style": style.text_style}
                     ).set_placement((x0, y0 + 0.35 * h))
        end = leader_end(p.box, p.anchor)
        if not p.inside and shapely.Point(p.anchor).distance(shapely.Point(end)) > h:
            msp.add_line(p.anchor, end, dxfattribs={"layer": fixed["annotation"]})
    return [p.box for p in placed]


def label_lines(result: "RunResult", d: Any) -> list[str]:
    """A defect's label: its id, then its highest class, affected area and peak frequency.

    Plain ASCII ("m2"): GDAL 3.6's DXF reader decodes R2013 text by the $DWGCODEPAGE of the
    header and garbles a UTF-8 "²"."""
    z, top = d.lowest, d.top
    area = z.outline_area_m2 if result.site.repair.basis == "outline" else z.area_m2
    peak = f" {top.peak_hz:.0f} Hz" if top.peak_hz == top.peak_hz else ""
    return [clean_text(d.defect_id), clean_text(f"{d.highest_class} {area:.2f} m2{peak}")]


def _text_boxes(msp: Any) -> list[Polygon]:
    """Boxes of the text and symbols in model space (measured by ezdxf, one by one: call it before we draw)."""
    out = []
    for e in msp.query("TEXT MTEXT CIRCLE"):
        b = bbox.extents([e], fast=True)
        if b.has_data:
            out.append(shapely.box(b.extmin.x, b.extmin.y, b.extmax.x, b.extmax.y))
    return out


def _labels(msp: Any, result: "RunResult", move: Any, style: "DxfStyle", text: Lettering,
            obstacles: list[Polygon]) -> list[Any]:
    """One label per defect, placed by overlay.outputs.labels, in its highest class's colour (that class's text layer)."""
    found = defects(result.zones, result.site.zones.classes)
    font = fonts.make_font(style.font, text.label)
    items, lines = [], {}
    for d in found:
        body = label_lines(result, d)
        w = max(font.text_width(line) for line in body) * 1.05  # MTEXT measures a little wider than its words
        lines[d.defect_id] = (d, body)
        zone = move(d.lowest.defect if not d.lowest.defect.is_empty else d.lowest.contour)
        # MTEXT: cap height per line, lines 5/3 of it apart, plus the last line's descenders
        items.append(Item(d.defect_id, zone.union(move(d.lowest.contour)), w,
                          text.label * (1.35 + MTEXT_LINE * (len(body) - 1))))
    placed = place_labels(items, gap=text.label * 0.6, obstacles=obstacles)
    for p in placed:
        d, body = lines[p.key]
        layer = layer_names(d.highest_class, style.prefix)["text"]
        x0, _, _, y1 = p.box.bounds
        m = msp.add_mtext("\\P".join(body), dxfattribs={"layer": layer, "char_height": text.label,
                                                        "style": style.text_style, "line_spacing_factor": 1.0})
        m.set_location((x0, y1), attachment_point=const.MTEXT_TOP_LEFT)
        if not p.inside:
            msp.add_line(p.anchor, leader_end(p.box, p.anchor), dxfattribs={"layer": layer})
    return placed


def _fmt(v: object) -> str:
    return f"{v:.6g}" if isinstance(v, float) else str(v)


def _tag_block(doc: Drawing, h: float, text_style: str) -> None:
    if TAG_BLOCK in doc.blocks:
        doc.blocks.delete_block(TAG_BLOCK, safe=False)
    blk = doc.blocks.new(TAG_BLOCK)
    for i, tag in enumerate(TAG_FIELDS):
        blk.add_attdef(tag, (0, -i * h * 1.3), dxfattribs={"height": h, "style": text_style,
                                                           "flags": const.ATTRIB_INVISIBLE})


def _legend_and_note(msp: Any, result: "RunResult", style: "DxfStyle", text: Lettering,
                     box: tuple[float, float, float, float]) -> None:
    """Legend and note below everything drawn (the owner's drawing and ours), never over the structure."""
    site = result.site
    note = fixed_layers(style.prefix)["note"]
    h = text.note
    x, y = box[0], box[1] - 4 * h
    cls = palette.for_site(site)
    for i, zc in enumerate(site.zones.classes):
        yy = y - i * 2 * h
        sq = Polygon([(x, yy), (x + 1.5 * h, yy), (x + 1.5 * h, yy + 1.5 * h), (x, yy + 1.5 * h)])
        hatch = msp.add_hatch(color=cls[zc.name].aci, dxfattribs={"layer": note})
        hatch.rgb = cls[zc.name].rgb
        hatch.paths.add_polyline_path(list(sq.exterior.coords)[:-1], is_closed=True)
        msp.add_text(clean_text(f"{zc.name}: vibration energy ratio >= {zc.threshold_db:g} dB"), height=h,
                     dxfattribs={"layer": note, "style": style.text_style}).set_placement((x + 2.5 * h, yy))
    lines = [
        f"{site.name} {site.structure}".strip(),
        f"Screening zones from acoustic scans, run {result.started}, overlay {result.tool_version}, "
        f"plot scale 1:{text.scale}",
        "Long dashes: estimated defect outline. Heavy rectangles: repair footprint "
        f"(margin {site.repair.margin_m:g} m, basis {site.repair.basis}). Dotted: scan extent.",
        *CAUTIONS,
    ]
    top = y - len(site.zones.classes) * 2 * h - h
    width = max(box[2] - box[0], 120 * text.per_mm)
    # half a text height in from the swatches: LibreCAD draws MTEXT's first glyph a little left of its
    # insertion point, and its fitted print cut it at the drawing's edge
    msp.add_mtext("\\P".join(clean_text(line) for line in lines),
                  dxfattribs={"layer": note, "char_height": h, "style": style.text_style,
                              "width": width}).set_location((x + 0.5 * h, top))


def _open_at_extents(doc: Drawing, extent: Any) -> None:
    """$EXTMIN/$EXTMAX from what is drawn, and the active viewport zoomed to it (a drawing that opens
    as a speck at the origin is the first thing a CAD user meets otherwise)."""
    if not extent.has_data:
        return
    lo, hi = (extent.extmin.x, extent.extmin.y, 0.0), (extent.extmax.x, extent.extmax.y, 0.0)
    msp = doc.modelspace()
    msp.dxf.extmin, msp.dxf.extmax = lo, hi  # ezdxf writes the layout's extents into the header on saving
    doc.header["$EXTMIN"], doc.header["$EXTMAX"] = lo, hi
    zoom.center(msp, (extent.center.x, extent.center.y), (extent.size.x * 1.05, extent.size.y * 1.05))
