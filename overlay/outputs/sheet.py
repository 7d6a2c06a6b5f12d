"""A ready-to-plot paper-space sheet: the structure at a usual plot scale, details where zones are
small, a zone schedule, the legend, the cautions and a title block of our own.

``plan_sheet`` is pure: it chooses the plot scale (the smallest usual 1:N at which the
whole drawing fits the overview), the detail views and where everything goes on an
ISO A-series sheet (landscape, ISO 216 sizes).  ``add_sheets`` draws the plan into
paper-space layouts of the DXF, on our own layer; the owner's layouts are never touched.
Sizes on paper are millimetres; model space is in the units of the drawing written into.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable, Sequence

import numpy as np
import shapely
from ezdxf import const
from ezdxf.enums import TextEntityAlignment
from ezdxf.fonts import fonts

from overlay.cautions import CAUTIONS
from overlay.outputs import palette
from overlay.outputs.labels import Item, leader_end, place_labels
from overlay.quantities import defect_rows, defects

if TYPE_CHECKING:
    from ezdxf.document import Drawing

    from overlay.job import RunResult
    from overlay.settings import DxfStyle

SHEET_MM = {"A0": (1189.0, 841.0), "A1": (841.0, 594.0), "A2": (594.0, 420.0), "A3": (420.0, 297.0),
            "A4": (297.0, 210.0)}  # ISO 216, landscape
USUAL_SCALES = (1, 2, 5, 10, 20, 25, 50, 100, 200, 250, 500, 1000, 2000, 2500, 5000, 10000, 20000, 25000, 50000,
                100000)  # common drafting practice for metric drawings
FRAME_MM = (20.0, 10.0, 10.0, 10.0)  # left, bottom, right, top: a filing margin on the left (common practice)
TITLE_W_MM = 180.0  # a title block 180 mm wide fits every A-series sheet (common practice)
TITLE_H_MM = 40.0
NOTE_MM = 1.8  # paper text heights (overlay.io.site: ISO 3098-1 nominal heights, from memory)
LABEL_MM = 2.5
LINE_MM = NOTE_MM * 5 / 3  # MTEXT line spacing
DETAIL_MIN_MM = 8.0  # defects smaller than this on paper at the overview scale get detail views
DETAILS_PER_EXTRA_SHEET = 8
MAX_EXTRA_SHEETS = 10
GAP = 5.0


@dataclass(frozen=True)
class Region:
    x0: float
    y0: float
    x1: float
    y1: float

    @property
    def w(self) -> float:
        return self.x1 - self.x0

    @property
    def h(self) -> float:
        return self.y1 - self.y0

    @property
    def centre(self) -> tuple[float, float]:
        return (self.x0 + self.x1) / 2, (self.y0 + self.y1) / 2


@dataclass(frozen=True)
class Detail:
    """A detail view: a part of model space (the drawing's units) shown at a larger scale."""

    name: str
    scan_id: str
    model: Region
    scale: int
    sheet: int  # 1: the main sheet; 2…: extra detail sheets
    paper: Region


@dataclass(frozen=True)
class SheetPlan:
    size: str
    width_mm: float
    height_mm: float
    scale: int
    unit_m: float
    model: Region  # everything drawn, model units
    overview: Region
    schedule: Region
    side: Region
    title: Region
    details: tuple[Detail, ...]
    left_out: int  # detail views there was no room for

    @property
    def per_mm(self) -> float:
        """Model units per millimetre of paper at the plot scale."""
        return self.scale / 1000.0 / self.unit_m


def usual_scale(need: float) -> int:
    """The smallest usual scale 1:N with N ≥ ``need``."""
    for n in USUAL_SCALES:
        if n >= need * (1 - 1e-9):
            return n
    return USUAL_SCALES[-1]


def fit_scale(model: Region, region: Region, unit_m: float) -> float:
    """The N at which ``model`` (model units) exactly fits ``region`` (paper mm)."""
    return max(model.w * unit_m * 1000 / region.w, model.h * unit_m * 1000 / region.h, 1e-9)


def plan_sheet(size: str, bounds: tuple[float, float, float, float], unit_m: float, plot_scale: int | None,
               result: "RunResult", move: Callable[[Any], Any]) -> SheetPlan:
    """Where everything goes on the sheet, and at which scales."""
    width, height = SHEET_MM[size]
    left, bottom, right, top = FRAME_MM
    frame = Region(left, bottom, width - right, height - top)
    pad = (bounds[2] - bounds[0] + bounds[3] - bounds[1]) * 0.01 or 1.0
    model = Region(bounds[0] - pad, bounds[1] - pad, bounds[2] + pad, bounds[3] + pad)
    title_w = min(TITLE_W_MM, 0.45 * frame.w)
    band = max(0.30 * height, TITLE_H_MM + side_height(result, title_w) + 3 * GAP)
    schedule = Region(frame.x0 + GAP, frame.y0 + GAP, frame.x1 - title_w - 2 * GAP, frame.y0 + band)
    title = Region(frame.x1 - title_w - GAP, frame.y0 + GAP, frame.x1 - GAP, frame.y0 + GAP + TITLE_H_MM)
    side = Region(title.x0, title.y1 + GAP, title.x1, frame.y0 + band)
    full = Region(frame.x0 + GAP, schedule.y1 + GAP, frame.x1 - GAP, frame.y1 - GAP)
    scale = plot_scale or usual_scale(fit_scale(model, full, unit_m))
    small = _needs_details(result, scale, unit_m, move)
    if not small:
        return SheetPlan(size, width, height, scale, unit_m, model, full, schedule, side, title, (), 0)
    band_d = max(0.18 * height, 45.0)
    overview = Region(full.x0, full.y0 + band_d + GAP, full.x1, full.y1)
    if plot_scale is None:
        scale = usual_scale(fit_scale(model, overview, unit_m))
    details, left_out = _details(result, scale, unit_m, move, Region(full.x0, full.y0, full.x1, full.y0 + band_d),
                                 Region(frame.x0 + GAP, frame.y0 + GAP, frame.x1 - GAP, frame.y1 - GAP))
    return SheetPlan(size, width, height, scale, unit_m, model, overview, schedule, side, title, details, left_out)


def _caution_lines(width_mm: float) -> int:
    font = fonts.make_font("DejaVuSans.ttf", NOTE_MM)
    return sum(max(1, math.ceil(font.text_width(c) * 1.05 / width_mm)) for c in CAUTIONS)


def side_height(result: "RunResult", width_mm: float) -> float:
    """Paper height the legend (two columns) and the cautions need above the title block."""
    legend = 5.0 + 4.0 * max(len(result.site.zones.classes), 3)
    return legend + GAP + 4.0 + LINE_MM * _caution_lines(width_mm)


def _needs_details(result: "RunResult", scale: int, unit_m: float, move: Callable[[Any], Any]) -> bool:
    sizes = sorted(math.sqrt(max(move(z.defect if not z.defect.is_empty else z.contour).area, 0.0)) * unit_m
                   for z in result.zones if z.defect_id == z.zone_id)
    return bool(sizes) and sizes[len(sizes) // 2] * 1000 / scale < DETAIL_MIN_MM


def _details(result: "RunResult", scale: int, unit_m: float, move: Callable[[Any], Any], row: Region,
             page: Region) -> tuple[tuple[Detail, ...], int]:
    """One detail per scan that has zones: first in the main sheet's row, then on extra detail sheets."""
    with_zones = sorted({z.scan_id.split(";")[0] for z in result.zones})
    extents = {s.scan_id: move(s.extent) for s in result.scans if not s.extent.is_empty}
    wanted = [s for s in with_zones if s in extents]
    per_row = max(1, int((row.w + GAP) // 75.0))
    boxes = [Region(row.x0 + i * (row.w + GAP) / per_row, row.y0 + 6.0, row.x0 + (i + 1) * (row.w + GAP) / per_row - GAP,
                    row.y1) for i in range(per_row)]
    cols, rows = 4, 2
    cell_w, cell_h = (page.w - (cols - 1) * GAP) / cols, (page.h - (rows - 1) * GAP) / rows
    extra = [Region(page.x0 + c * (cell_w + GAP), page.y1 - (r + 1) * cell_h - r * GAP + 6.0,
                    page.x0 + c * (cell_w + GAP) + cell_w, page.y1 - r * (cell_h + GAP)) for r in range(rows)
             for c in range(cols)]
    out: list[Detail] = []
    for i, sid in enumerate(wanted):
        if i < per_row:
            sheet_no, paper = 1, boxes[i]
        else:
            k = i - per_row
            sheet_no = 2 + k // DETAILS_PER_EXTRA_SHEET
            if sheet_no > 1 + MAX_EXTRA_SHEETS:
                return tuple(out), len(wanted) - i
            paper = extra[k % DETAILS_PER_EXTRA_SHEET]
        x0, y0, x1, y1 = extents[sid].bounds
        m = 0.08 * max(x1 - x0, y1 - y0)
        model = Region(x0 - m, y0 - m, x1 + m, y1 + m)
        n = usual_scale(fit_scale(model, paper, unit_m))
        if n >= scale:  # no larger than the overview: nothing to gain
            continue
        out.append(Detail(f"D{len(out) + 1}", sid, model, n, sheet_no, paper))
    return tuple(out), 0


def callouts(msp: Any, plan: SheetPlan, layer: str, h: float, text_style: str) -> None:
    """On the overview, a dashed box and a name for each detail view."""
    for d in plan.details:
        m = d.model
        msp.add_lwpolyline([(m.x0, m.y0), (m.x1, m.y0), (m.x1, m.y1), (m.x0, m.y1)], close=True,
                           dxfattribs={"layer": layer})
        msp.add_text(d.name, height=h, dxfattribs={"layer": layer, "style": text_style}).set_placement(
            (m.x0, m.y1 + 0.3 * h))


def delete_sheets(doc: "Drawing", is_ours: Callable[[Any], bool]) -> None:
    """Remove paper-space layouts an earlier run made (everything on them ours but the sheet's own
    main viewport), nothing else."""
    for layout in list(doc.layouts):
        if layout.is_modelspace:
            continue
        entities = list(layout)
        theirs = [e for e in entities if not is_ours(e) and not (e.dxftype() == "VIEWPORT" and e.dxf.get("id") == 1)]
        if not theirs and any(is_ours(e) for e in entities):
            if len(doc.layouts) > 2:
                doc.layouts.delete(layout.name)
            else:  # a drawing keeps at least one layout: empty it instead
                for e in entities:
                    layout.delete_entity(e)


class _Pen:
    """Paper-space drawing on one layer, every entity marked ours."""

    def __init__(self, layout: Any, layer: str, mark: tuple[str, str], text_style: str, font: str):
        self.layout, self.layer, self.mark, self.style = layout, layer, mark, text_style
        self.font = fonts.make_font(font, 1.0)

    def _own(self, e: Any) -> Any:
        e.set_xdata(self.mark[0], [(1000, self.mark[1])])
        return e

    def width(self, text: str, h: float) -> float:
        return self.font.text_width(text) * h

    def text(self, s: str, x: float, y: float, h: float, align: str = "LEFT", layer: str | None = None) -> None:
        t = self.layout.add_text(s, height=h, dxfattribs={"layer": layer or self.layer, "style": self.style})
        t.set_placement((x, y), align=TextEntityAlignment[align])
        self._own(t)

    def mtext(self, s: str, x: float, y: float, h: float, width: float) -> Any:
        m = self.layout.add_mtext(s, dxfattribs={"layer": self.layer, "style": self.style, "char_height": h,
                                                 "width": width})
        m.set_location((x, y), attachment_point=const.MTEXT_TOP_LEFT)
        return self._own(m)

    def line(self, a: tuple[float, float], b: tuple[float, float], **attribs: Any) -> None:
        self._own(self.layout.add_line(a, b, dxfattribs={"layer": self.layer, **attribs}))

    def rect(self, r: Region, **attribs: Any) -> None:
        self._own(self.layout.add_lwpolyline([(r.x0, r.y0), (r.x1, r.y0), (r.x1, r.y1), (r.x0, r.y1)], close=True,
                                             dxfattribs={"layer": self.layer, **attribs}))

    def fill(self, r: Region, aci: int, rgb: palette.RGB | None = None) -> None:
        hatch = self.layout.add_hatch(color=aci, dxfattribs={"layer": self.layer})
        if rgb is not None:
            hatch.rgb = rgb
        hatch.paths.add_polyline_path([(r.x0, r.y0), (r.x1, r.y0), (r.x1, r.y1), (r.x0, r.y1)], is_closed=True)
        self._own(hatch)

    def viewport(self, r: Region, model: Region, per_mm: float) -> Any:
        """A viewport filling ``r`` that shows model space at ``per_mm`` model units per paper mm."""
        vp = self.layout.add_viewport(center=r.centre, size=(r.w, r.h), view_center_point=model.centre,
                                      view_height=r.h * per_mm, dxfattribs={"layer": self.layer})
        return self._own(vp)


def add_sheets(doc: "Drawing", result: "RunResult", plan: SheetPlan, layer: str, style: "DxfStyle",
               mark: tuple[str, str], move: Callable[[Any], Any]) -> list[str]:
    """The plan drawn into paper-space layouts; returns their names (main sheet first)."""
    rows = defect_rows(result.zones, result.site.zones.classes, result.site.repair.basis)
    names: list[str] = []
    n_extra = max((d.sheet for d in plan.details), default=1) - 1
    per_page = _schedule_rows(plan.schedule)
    rest = rows[per_page:]
    full_rows = _schedule_rows(Region(FRAME_MM[0] + GAP, FRAME_MM[1] + 50.0, plan.width_mm - FRAME_MM[2] - GAP,
                                      plan.height_mm - FRAME_MM[3] - GAP))
    n_schedule = math.ceil(len(rest) / max(full_rows, 1)) if rest else 0
    total = 1 + n_extra + n_schedule
    for k in range(total):
        name = f"{style.prefix} {plan.size} sheet {k + 1}"
        layout = doc.layouts.new(name)
        layout.page_setup(size=(plan.width_mm, plan.height_mm), margins=(0, 0, 0, 0), units="mm")
        pen = _Pen(layout, layer, mark, style.text_style, style.font)
        _frame(pen, plan)
        _title(pen, result, plan, k + 1, total)
        if k == 0:
            vp = pen.viewport(plan.overview, plan.model, plan.per_mm)
            vp.frozen_layers = [f"{style.prefix}-NOTE"]  # the sheet has its own legend and cautions
            pen.text(f"Overview 1:{plan.scale}", plan.overview.x0, plan.overview.y1 + 1.5, 2.5)
            _details_on(pen, result, plan, 1, move, style.note_height_mm)
            _schedule(pen, rows[:per_page], plan.schedule, len(rows))
            _side(pen, result, plan)
            if plan.left_out:
                pen.text(f"{plan.left_out} scan(s) with zones have no detail view here; see the site report",
                         plan.schedule.x0, plan.schedule.y0 - 3.5, 1.8)
        elif k <= n_extra:
            _details_on(pen, result, plan, k + 1, move, style.note_height_mm)
        else:
            start = per_page + (k - 1 - n_extra) * full_rows
            region = Region(FRAME_MM[0] + GAP, FRAME_MM[1] + 50.0, plan.width_mm - FRAME_MM[2] - GAP,
                            plan.height_mm - FRAME_MM[3] - GAP)
            _schedule(pen, rows[start:start + full_rows], region, len(rows), first=start)
        names.append(name)
    return names


def _frame(pen: _Pen, plan: SheetPlan) -> None:
    left, bottom, right, top = FRAME_MM
    pen.rect(Region(left, bottom, plan.width_mm - right, plan.height_mm - top), lineweight=50)


def _details_on(pen: _Pen, result: "RunResult", plan: SheetPlan, sheet_no: int, move: Callable[[Any], Any],
                symbol_mm: float) -> None:
    """Detail viewports; the model's labels (sized for the overview) are frozen in them and each defect
    gets a paper-space label of its own at 2.5 mm, placed clear of the others, of their leaders and of
    the target symbols (``symbol_mm`` half-size on paper at the overview scale) inside the view."""
    prefix = result.site.dxf.prefix
    text_layers = [f"{prefix}-{c.name.upper()}-TEXT" for c in result.site.zones.classes]
    found = defects(result.zones, result.site.zones.classes)
    half = symbol_mm * plan.per_mm  # a target symbol's half-size in model units
    targets = np.array([shapely.box(x - half, y - half, x + half, y + half)
                        for s in result.scans for t in s.targets
                        for x, y in [move(shapely.Point(t.drawing)).coords[0]]], dtype=object)
    for d in plan.details:
        if d.sheet != sheet_no:
            continue
        per_mm = d.scale / 1000.0 / plan.unit_m
        vp = pen.viewport(d.paper, d.model, per_mm)
        vp.frozen_layers = [*text_layers, f"{prefix}-NOTE", f"{prefix}-ANNOTATION", f"{prefix}-DETAIL"]
        pen.text(f"{d.name}  scan {d.scan_id}  1:{d.scale}", d.paper.x0, d.paper.y0 - 4.0, NOTE_MM)
        mine = [f for f in found if d.scan_id in f.lowest.scan_id.split(";")]
        _paper_labels(pen, mine, d, per_mm, move, prefix, targets)


def _paper_labels(pen: _Pen, found: Sequence[Any], d: Detail, per_mm: float, move: Callable[[Any], Any],
                  prefix: str, symbols: np.ndarray | None = None) -> None:
    cx, cy = d.model.centre
    px, py = d.paper.centre

    def to_paper(g: Any) -> Any:
        return shapely.transform(move(g), lambda xy: np.column_stack([px + (xy[:, 0] - cx) / per_mm,
                                                                      py + (xy[:, 1] - cy) / per_mm]))

    r = d.paper
    frame = shapely.box(r.x0, r.y0, r.x1, r.y1)
    m = d.model  # only the symbols this view shows are brought onto paper
    sb = shapely.bounds(symbols) if symbols is not None and len(symbols) else np.zeros((0, 4))
    near = symbols[(sb[:, 0] <= m.x1) & (sb[:, 2] >= m.x0) & (sb[:, 1] <= m.y1) & (sb[:, 3] >= m.y0)] if len(sb) else []
    marks = [b for b in (to_paper(g) for g in near) if b.intersects(frame)]
    items = []
    for f in found:
        zone = to_paper(f.lowest.defect if not f.lowest.defect.is_empty else f.lowest.contour)
        items.append(Item(f.defect_id, zone.intersection(frame), pen.width(f.defect_id, LABEL_MM),
                          LABEL_MM * 1.35))
    for p in place_labels([it for it in items if not it.zone.is_empty], 1.0, marks, within=(r.x0, r.y0, r.x1, r.y1)):
        f = next(x for x in found if x.defect_id == p.key)
        layer = f"{prefix}-{f.highest_class.upper()}-TEXT"
        x0, y0, _, _ = p.box.bounds
        pen.text(p.key, x0, y0 + 0.35 * LABEL_MM, LABEL_MM, layer=layer)
        if not p.inside:
            pen.line(p.anchor, leader_end(p.box, p.anchor), layer=layer)


SCHEDULE_COLUMNS = (  # (heading, row key, format)
    ("Defect", "defect_id", "{}"), ("Element", "element", "{}"), ("Class", "class", "{}"),
    ("Affected m2", "affected_area_m2", "{:.3f}"), ("Outline m2", "outline_area_m2", "{:.3f}"),
    ("Footprint m2", "footprint_area_m2", "{:.3f}"), ("L x W m", None, ""), ("Depth mm", None, ""),
    ("Peak Hz", "peak_hz", "{:.0f}"), ("Conf.", "confidence", "{:.2f}"),
)
ROW_MM = 3.6


def _schedule_rows(r: Region) -> int:
    return max(0, int((r.h - 2 * ROW_MM) // ROW_MM))


def schedule_cells(row: dict[str, object]) -> list[str]:
    """One schedule row as the sheet prints it (the values of the quantities CSV's defect row)."""
    out = []
    for _, key, fmt in SCHEDULE_COLUMNS:
        if key is None:
            continue
        v = row[key]
        out.append("" if v == "" else fmt.format(v))
    lw = "" if row["footprint_length_m"] == "" else f"{row['footprint_length_m']:.2f} x {row['footprint_width_m']:.2f}"
    depth = "" if row["depth_low_m"] == "" else f"{row['depth_low_m'] * 1000:.0f}-{row['depth_high_m'] * 1000:.0f}"
    return out[:6] + [lw, depth] + out[6:]


def _schedule(pen: _Pen, rows: Sequence[dict[str, object]], r: Region, total: int, first: int = 0) -> None:
    h = 1.8
    heading = f"Zone schedule: defects at their highest class ({total} in all"
    heading += f"; {first + 1}-{first + len(rows)} here)" if len(rows) < total else ")"
    pen.text(heading, r.x0, r.y1 - ROW_MM, 2.5)
    table = [[c[0] for c in SCHEDULE_COLUMNS]] + [schedule_cells(row) for row in rows]
    widths = [max(pen.width(t[i], h) for t in table) + 2.5 for i in range(len(SCHEDULE_COLUMNS))]
    shrink = min(1.0, r.w / sum(widths))
    y = r.y1 - 2 * ROW_MM
    for j, cells in enumerate(table):
        x = r.x0
        for i, cell in enumerate(cells):
            pen.text(cell, x, y, h)
            x += widths[i] * shrink
        if j == 0:
            pen.line((r.x0, y - 1.0), (r.x0 + sum(widths) * shrink, y - 1.0))
        y -= ROW_MM
    if not rows:
        pen.text("no zone above the lowest class level", r.x0, y, h)


def _side(pen: _Pen, result: "RunResult", plan: SheetPlan) -> None:
    """Legend (classes left, line kinds right) and the cautions, above the title block."""
    r = plan.side
    cls = palette.for_site(result.site)
    top = r.y1 - LABEL_MM
    pen.text("Legend", r.x0, top, LABEL_MM)
    y = top - 5.0
    for c in result.site.zones.classes:
        pen.fill(Region(r.x0, y - 0.5, r.x0 + 6.0, y + 2.5), cls[c.name].aci, cls[c.name].rgb)
        pen.text(f"{c.name}: VER >= {c.threshold_db:g} dB", r.x0 + 8.0, y, NOTE_MM)
        y -= 4.0
    y2, x2 = top - 5.0, r.x0 + r.w / 2
    for label, key in (("estimated defect outline", "defect"), ("repair footprint", "repair"), ("scan extent", "extent")):
        pen.line((x2, y2 + 0.9), (x2 + 8.0, y2 + 0.9), layer=f"{result.site.dxf.prefix}-{_fixed_name(key)}",
                 ltscale=1.0 / plan.per_mm)
        pen.text(label, x2 + 10.0, y2, NOTE_MM)
        y2 -= 4.0
    y = min(y, y2) - GAP + 4.0
    pen.mtext("\\P".join(["Cautions", *CAUTIONS]), r.x0, y, NOTE_MM, r.w)


def _fixed_name(key: str) -> str:
    return {"defect": "DEFECT-OUTLINE", "repair": "REPAIR-FOOTPRINT", "extent": "SCAN-EXTENT"}[key]


def _title(pen: _Pen, result: "RunResult", plan: SheetPlan, number: int, total: int) -> None:
    r = plan.title
    pen.rect(r, lineweight=35)
    site = result.site
    elements = sorted({s.element for s in result.scans if s.element})
    when = sorted(s.surveyed[:10] for s in result.scans if s.surveyed)
    inspected = (when[0] if when[0] == when[-1] else f"{when[0]} to {when[-1]}") if when else "not recorded"
    element_text = (", ".join(elements) if len(elements) <= 4 else f"{elements[0]} ... {elements[-1]} ({len(elements)})") \
        if elements else "-"
    lines = [
        (3.5, "Screening zones from acoustic scans"),
        (2.5, f"{site.name}  {site.structure}".strip()),
        (1.8, f"Elements: {element_text}"),
        (1.8, f"Inspected: {inspected}"),
        (1.8, f"Run {result.started}, overlay {result.tool_version}"),
        (1.8, f"Scale 1:{plan.scale} on {plan.size}   Sheet {number} of {total}"),
    ]
    y = r.y1 - 5.0
    for h, s in lines:
        pen.text(s, r.x0 + 3.0, y, h)
        y -= h + 2.2
    _scale_bar(pen, plan, r.x0 + 3.0, r.y0 + 4.0)
    _north(pen, result, (r.x1 - 12.0, r.y0 + 14.0))


def _scale_bar(pen: _Pen, plan: SheetPlan, x: float, y: float) -> None:
    """A bar of a round length in metres, 25–60 mm long on paper."""
    mm_per_m = 1000.0 / plan.scale
    length = next(L for L in (0.1, 0.2, 0.5, 1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000)
                  if L * mm_per_m >= 25.0 or L == 5000)
    w = length * mm_per_m
    for i in range(4):
        seg = Region(x + i * w / 4, y, x + (i + 1) * w / 4, y + 1.5)
        if i % 2 == 0:
            pen.fill(seg, 250)
        pen.rect(seg)
    pen.text("0", x, y + 2.5, 1.8, "LEFT")
    pen.text(f"{length:g} m", x + w, y + 2.5, 1.8, "RIGHT")


def _north(pen: _Pen, result: "RunResult", at: tuple[float, float]) -> None:
    """An arrow to grid north as it lies in the drawing (from the map placement), or a note without one."""
    if result.to_map is None:
        pen.text("north: no map frame", at[0] - 10.0, at[1], 1.8)
        return
    angle = math.radians(90.0 - result.to_map.rotation_deg)
    dx, dy = math.cos(angle), math.sin(angle)
    tip = (at[0] + 8.0 * dx, at[1] + 8.0 * dy)
    tail = (at[0] - 8.0 * dx, at[1] - 8.0 * dy)
    pen.line(tail, tip, lineweight=35)
    for side in (-1, 1):
        a = angle + math.pi + side * math.radians(25)
        pen.line(tip, (tip[0] + 3.0 * math.cos(a), tip[1] + 3.0 * math.sin(a)), lineweight=35)
    pen.text("N", tip[0] + 1.5 * dx - 1.0, tip[1] + 1.5 * dy, 2.5)
