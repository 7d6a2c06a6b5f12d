"""The drawing as a CAD user meets it: readable and plottable.

Outside references: the DXF reference (HATCH group 62 colour 256 = BYLAYER; LTYPE table entries
and group 6 linetype names; VIEWPORT height and view height; $EXTMIN/$EXTMAX; MTEXT line spacing
5/3 of the character height); ezdxf's auditor and its bounding-box module as an independent
measure of what is drawn; GDAL's OGR DXF driver (Debian gdal-bin) and LibreCAD's printer (Debian
librecad) as other readers; lettering heights of ISO 3098-1 — 2.5 mm for labels, 1.8 mm for notes,
the two smallest nominal heights (from memory; common drafting practice either way).
"""

from __future__ import annotations

import csv
import dataclasses
import os
import shutil
import subprocess
from pathlib import Path

import ezdxf
import numpy as np
import pytest
import shapely
from ezdxf import bbox

from overlay.exporters.dxf import APPID, DxfExporter, fixed_layers, is_ours, layer_names
from overlay.io.site import read_site
from overlay.job import run_site
from overlay.outputs import palette
from overlay.outputs.write import write_outputs
from overlay.quantities import defects

from .conftest import write_bundle, write_site


@pytest.fixture(scope="module")
def drawn(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("drawing")
    paths = write_outputs(demo["result"], out, pictures=False).paths
    return {"paths": paths, "result": demo["result"], "doc": ezdxf.readfile(paths["dxf"])}


def _label_boxes(doc, result) -> dict[str, shapely.Polygon]:
    """Each defect label's box as ezdxf's MTEXT measurement gives it (its font metrics and line spacing,
    not our placement's estimate), hung from the top-left insertion point."""
    from ezdxf.tools.text_size import mtext_size

    layers = {layer_names(c.name)["text"] for c in result.site.zones.classes}
    out = {}
    for m in doc.modelspace().query("MTEXT"):
        if m.dxf.layer in layers:
            size = mtext_size(m)
            x, y = m.dxf.insert[0], m.dxf.insert[1]
            out[m.plain_text().split("\n")[0]] = shapely.box(x, y - size.total_height, x + size.total_width, y)
    return out


def _check_labels(doc, result) -> int:
    boxes = _label_boxes(doc, result)
    found = defects(result.zones, result.site.zones.classes)
    assert set(boxes) == {d.defect_id for d in found}  # one label per defect
    keys = sorted(boxes)
    for i, a in enumerate(keys):
        for b in keys[i + 1:]:
            assert boxes[a].intersection(boxes[b]).area <= 1e-9, (a, b)
    zone = {d.defect_id: d.lowest.defect.union(d.lowest.contour) for d in found}
    for k, box in boxes.items():
        for other, z in zone.items():
            if other != k:
                assert not box.intersects(z), (k, other)
    layers = {layer_names(c.name)["text"] for c in result.site.zones.classes}
    leaders = [shapely.LineString([e.dxf.start.vec2, e.dxf.end.vec2]) for e in doc.modelspace().query("LINE")
               if e.dxf.layer in layers]
    h = min(b.bounds[3] - b.bounds[1] for b in boxes.values()) / 2  # half a (two-line) label's height
    for line in leaders:  # a leader reaches its own label (to within half a line) and crosses no other
        near = sorted(boxes.values(), key=line.distance)
        assert line.distance(near[0]) <= h / 2 and not any(line.intersects(b) for b in near[1:]), line
    assert len(leaders) == sum(1 for d in found if not boxes[d.defect_id].intersects(zone[d.defect_id]))
    return len(boxes)


def _text_box(t) -> shapely.Polygon:
    """A TEXT entity's box from ezdxf's own measurement of its font (left-aligned, unrotated text)."""
    from ezdxf.tools.text_size import text_size

    size = text_size(t)
    x, y = t.dxf.insert[0], t.dxf.insert[1]
    return shapely.box(x, y - (size.total_height - size.cap_height), x + size.width, y + size.cap_height)


def test_audit_clean_for_a_new_drawing_and_onto_the_owners(drawn: dict, demo: dict, tmp_path: Path) -> None:
    assert not drawn["doc"].audit().has_errors  # the demo draws onto the owner's plan
    site = dataclasses.replace(demo["result"].site, dxf=dataclasses.replace(demo["result"].site.dxf, base=None))
    path = tmp_path / "new.dxf"
    DxfExporter().write(dataclasses.replace(demo["result"], site=site), path)
    auditor = ezdxf.readfile(path).audit()
    assert not auditor.has_errors, [str(e) for e in auditor.errors]


def test_fills_by_layer_in_the_class_colour_and_a_dashed_defect_outline(drawn: dict) -> None:
    doc, result = drawn["doc"], drawn["result"]
    colours = palette.for_site(result.site)
    for c in result.site.zones.classes:
        names = layer_names(c.name)
        hatches = doc.modelspace().query(f'HATCH[layer=="{names["fill"]}"]')
        assert hatches and all(h.dxf.color == 256 for h in hatches)  # BYLAYER
        layer = doc.layers.get(names["fill"])
        assert layer.rgb == colours[c.name].rgb and layer.color == colours[c.name].aci
    defect = doc.layers.get(fixed_layers()["defect"])
    lt = doc.linetypes.get(defect.dxf.linetype)
    assert len(lt.pattern_tags.tags) > 0 and defect.dxf.linetype != "Continuous"
    # told apart in black and white: linetype or lineweight differ between footprints, extents and outlines
    looks = {k: (doc.layers.get(fixed_layers()[k]).dxf.linetype, doc.layers.get(fixed_layers()[k]).dxf.lineweight)
             for k in ("defect", "repair", "extent")}
    assert len(set(looks.values())) == 3


def test_one_label_per_defect_clear_of_each_other_and_of_other_defects(drawn: dict) -> None:
    assert _check_labels(drawn["doc"], drawn["result"]) == 6


def test_scan_and_target_names_clear_of_each_other_and_of_the_labels(drawn: dict) -> None:
    doc, result = drawn["doc"], drawn["result"]
    names = [t for t in doc.modelspace().query("TEXT") if t.dxf.layer == fixed_layers()["annotation"]]
    targets = {t.name for s in result.scans for t in s.targets}
    assert {t.dxf.text for t in names} == targets | {f"scan {s.scan_id}" for s in result.scans}  # each once
    boxes = [_text_box(t) for t in names]
    for i, a in enumerate(boxes):
        assert all(a.intersection(b).area <= 1e-9 for b in boxes[i + 1:]), names[i].dxf.text
    labels = list(_label_boxes(doc, result).values())
    assert not any(a.intersects(b) for a in boxes for b in labels)


def test_tag_attributes_hidden_on_the_class_text_layer(drawn: dict) -> None:
    for ref in drawn["doc"].modelspace().query("INSERT[name==\"OVL_ZONE_TAG\"]"):
        assert all(a.dxf.layer == ref.dxf.layer and a.is_invisible for a in ref.attribs)
        assert ref.dxf.layer.endswith("-TEXT")


def _plot_scale(doc) -> int:
    sheet = next(lo for lo in doc.layouts if lo.name.startswith("OVL "))
    title = [t.dxf.text for t in sheet.query("TEXT") if t.dxf.text.startswith("Scale 1:")]
    return int(title[0].split("1:")[1].split()[0])


def test_text_heights_print_legibly_at_the_plot_scale(drawn: dict) -> None:
    doc = drawn["doc"]
    n = _plot_scale(doc)
    unit_m = 1.0  # the demo drawing is in metres
    mm = lambda h: h * unit_m * 1000 / n  # noqa: E731 - paper millimetres of a model height
    labels = [m.dxf.char_height for m in doc.modelspace().query("MTEXT") if m.dxf.layer.endswith("-TEXT")]
    notes = [t.dxf.height for t in doc.modelspace().query("TEXT") if is_ours(t) or t.has_xdata(APPID)]
    assert labels and min(mm(h) for h in labels) >= 2.5 - 1e-9  # ISO 3098-1 (from memory): labels 2.5 mm
    assert notes and min(mm(h) for h in notes) >= 1.8 - 1e-9  # notes 1.8 mm
    sheet = next(lo for lo in doc.layouts if lo.name.startswith("OVL "))
    assert min(t.dxf.height for t in sheet.query("TEXT")) >= 1.8 - 1e-9


def test_legend_and_note_off_the_owners_drawing(drawn: dict, demo: dict) -> None:
    base = ezdxf.readfile(demo["root"] / "site" / "as-built.dxf")
    theirs = bbox.extents(base.modelspace())
    note = bbox.extents(drawn["doc"].modelspace().query(f'*[layer=="{fixed_layers()["note"]}"]'))
    assert note.has_data
    assert note.extmax.y < theirs.extmin.y  # the whole legend and note lie below the owner's drawing


def test_opens_zoomed_to_what_is_drawn(drawn: dict) -> None:
    doc = drawn["doc"]
    real = bbox.extents(doc.modelspace())
    lo, hi = doc.header["$EXTMIN"], doc.header["$EXTMAX"]
    size = max(real.size.x, real.size.y)
    assert abs(lo[0] - real.extmin.x) <= 0.01 * size and abs(hi[1] - real.extmax.y) <= 0.01 * size
    vport = doc.viewports.get_config("*Active")[0]
    assert abs(vport.dxf.center[0] - real.center.x) <= 0.01 * size
    assert vport.dxf.height >= real.size.y


def test_the_sheet_shows_the_structure_at_the_plot_scale_with_the_schedule(drawn: dict) -> None:
    doc = drawn["doc"]
    n = _plot_scale(doc)
    sheet = next(lo for lo in doc.layouts if lo.name.startswith("OVL "))
    assert sheet.dxf_layout.dxf.paper_width == 420 and sheet.dxf_layout.dxf.paper_height == 297  # A3
    views = [v for v in sheet.query("VIEWPORT") if v.dxf.get("id", 0) != 1]
    scales = sorted(round(v.dxf.view_height * 1000 / v.dxf.height) for v in views)  # model m per paper m
    assert n in scales  # the overview at the plot scale; the other views are details at larger scales
    assert all(s < n for s in scales if s != n)
    rows = [r for r in csv.DictReader(drawn["paths"]["quantities-csv"].open()) if r["row_kind"] == "defect"]
    texts = [t for t in sheet.query("TEXT")]
    by_y: dict[float, list] = {}
    for t in texts:
        by_y.setdefault(round(t.dxf.insert[1], 2), []).append(t)
    printed = {}
    for line in by_y.values():
        cells = [t.dxf.text for t in sorted(line, key=lambda t: t.dxf.insert[0])]
        if cells and cells[0] in {r["defect_id"] for r in rows}:
            printed[cells[0]] = cells
    assert set(printed) == {r["defect_id"] for r in rows}  # every defect row of the CSV, and no other
    for r in rows:
        cells = printed[r["defect_id"]]
        assert cells[1] == r["element"] and cells[2] == r["class"]
        assert cells[3] == f"{float(r['affected_area_m2']):.3f}" and cells[5] == f"{float(r['footprint_area_m2']):.3f}"


def test_detail_labels_clear_of_each_other_their_leaders_and_the_target_symbols(drawn: dict) -> None:
    doc, result = drawn["doc"], drawn["result"]
    sheet = next(lo for lo in doc.layouts if lo.name.startswith("OVL "))
    layers = {layer_names(c.name)["text"] for c in result.site.zones.classes}
    labels = [_text_box(t) for t in sheet.query("TEXT") if t.dxf.layer in layers]
    leaders = [shapely.LineString([e.dxf.start.vec2, e.dxf.end.vec2]) for e in sheet.query("LINE") if e.dxf.layer in layers]
    assert len(labels) >= len(defects(result.zones, result.site.zones.classes))  # each defect in at least one detail
    for i, a in enumerate(labels):
        assert all(a.intersection(b).area <= 1e-9 for b in labels[i + 1:])
    for line in leaders:
        near = sorted(labels, key=line.distance)  # its own label (within 0.5 mm), and it crosses no other
        assert line.distance(near[0]) <= 0.5 and not any(line.intersects(b) for b in near[1:])
    # the target symbols as the detail views show them: model points through each viewport onto paper
    views = [v for v in sheet.query("VIEWPORT") if v.dxf.get("id", 0) != 1]
    n = _plot_scale(doc)
    half = 1.8 * n / 1000.0  # a symbol's half-size in model metres (1.8 mm note height at the plot scale)
    for v in views:
        k = v.dxf.height / v.dxf.view_height  # paper mm per model metre
        cx, cy = v.dxf.view_center_point.vec2
        px, py = v.dxf.center.vec2
        frame = shapely.box(px - v.dxf.width / 2, py - v.dxf.height / 2, px + v.dxf.width / 2, py + v.dxf.height / 2)
        for s in result.scans:
            for t in s.targets:
                x, y = px + (t.drawing[0] - cx) * k, py + (t.drawing[1] - cy) * k
                symbol = shapely.box(x - half * k, y - half * k, x + half * k, y + half * k)
                if symbol.intersects(frame):
                    assert not any(symbol.intersects(b) for b in labels), t.name


def test_ogr_reads_hatch_colours_and_labels(drawn: dict) -> None:
    if shutil.which("ogrinfo") is None:
        pytest.skip("GDAL command-line tools (Debian gdal-bin) not installed")
    path = drawn["paths"]["dxf"]
    result = drawn["result"]
    colours = palette.for_site(result.site)
    for c in result.site.zones.classes:
        done = subprocess.run(["ogrinfo", "-al", str(path), "-where", f"Layer='{layer_names(c.name)['fill']}'"],
                              capture_output=True, text=True, check=True)
        assert f"BRUSH(fc:{colours[c.name].hex}" in done.stdout  # OGR's style string carries the class colour
    done = subprocess.run(["ogrinfo", "-al", str(path), "-where", "SubClasses LIKE '%MText%'"],
                          capture_output=True, text=True, check=True)
    for d in defects(result.zones, result.site.zones.classes):
        assert f"Text (String) = {d.defect_id}" in done.stdout


def test_the_sheet_renders_not_blank(drawn: dict, tmp_path: Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    from ezdxf.addons.drawing import Frontend, RenderContext
    from ezdxf.addons.drawing.matplotlib import MatplotlibBackend

    doc = drawn["doc"]
    sheet = next(lo for lo in doc.layouts if lo.name.startswith("OVL "))
    fig = plt.figure(figsize=(8.4, 5.94))
    ax = fig.add_axes([0, 0, 1, 1])
    Frontend(RenderContext(doc), MatplotlibBackend(ax)).draw_layout(sheet, finalize=True)
    png = tmp_path / "sheet.png"
    fig.savefig(png, dpi=100)
    plt.close(fig)
    img = plt.imread(png)
    assert img.std() > 0.05 and (img[..., :3].sum(axis=-1) < 1.5).mean() > 0.01  # drawn, with dark ink on it


def test_librecad_prints_the_drawing(drawn: dict, tmp_path: Path) -> None:
    if shutil.which("librecad") is None:
        pytest.skip("LibreCAD (Debian librecad) not installed")
    env = dict(os.environ, QT_QPA_PLATFORM="offscreen", XDG_RUNTIME_DIR=str(tmp_path))
    done = subprocess.run(["librecad", "dxf2pdf", "-a", "-p", "420x297", "-t", str(tmp_path), str(drawn["paths"]["dxf"])],
                          capture_output=True, text=True, timeout=180, env=env)
    pdf = tmp_path / (drawn["paths"]["dxf"].stem + ".pdf")
    assert done.returncode == 0 and pdf.exists() and pdf.stat().st_size > 1000, done.stderr[-500:]


def test_dense_campaign_labels_stay_apart(tmp_path: Path) -> None:
    # 30 defects within 2 m²: a ready-VER scan of 1.4 m × 1.4 m with 30 bumps on a jittered 6 × 5 lattice
    rng = np.random.default_rng(11)
    n = 71
    rr, cc = np.mgrid[0:n, 0:n]
    x, y = cc * 0.02, rr * 0.02
    ver = np.zeros_like(x, dtype=float)
    for i in range(6):
        for j in range(5):
            cx, cy = 0.15 + 0.22 * i + rng.uniform(-0.02, 0.02), 0.2 + 0.25 * j + rng.uniform(-0.02, 0.02)
            ver += 20.0 * np.exp(-((x - cx) ** 2 + (y - cy) ** 2) / (2 * 0.045 ** 2))
    write_bundle(tmp_path / "S-D", n_rows=n, n_cols=n, spacing=0.02, payload="ver", ver=ver.ravel(),
                 points_header="id,row,col,x,y,ver_db", scan_id="S-D")
    result = run_site(read_site(write_site(tmp_path, ["S-D"])))
    assert len(defects(result.zones, result.site.zones.classes)) == 30
    path = tmp_path / "dense.dxf"
    DxfExporter().write(result, path)
    doc = ezdxf.readfile(path)
    assert _check_labels(doc, result) == 30
    assert not doc.audit().has_errors
