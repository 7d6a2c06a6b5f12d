"""Pictures and the site report: written, right size, not blank; HTML well-formed and self-contained
(parsed with the standard library's html.parser), totals equal to the quantities CSV."""

from __future__ import annotations

import csv
import dataclasses
import io
import re
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image as mpimg
import matplotlib.text
import numpy as np
import pytest

from overlay.cautions import CAUTIONS
from overlay.outputs import pictures, plotting
from overlay.outputs.write import write_outputs

VOID = {"meta", "img", "br", "hr", "link", "input"}


def _size(png: bytes) -> tuple[int, int]:
    assert png[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", png[16:24])


def _pixels(png: bytes) -> np.ndarray:
    return mpimg.imread(io.BytesIO(png), format="png")


@pytest.fixture(scope="module")
def written(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    out = tmp_path_factory.mktemp("pics")
    return {"paths": write_outputs(demo["result"], out).paths, "result": demo["result"]}


def test_every_picture_is_written_with_its_size(written: dict) -> None:
    folder = written["paths"]["pictures"]
    result = written["result"]
    names = {p.stem for p in folder.glob("*.png")}
    expected = {"site-map", "dxf-preview"} | {f"scan-{s.scan_id}" for s in result.scans}
    expected |= {f"element-{z.element}" for z in result.zones} | {f"defect-{z.defect_id}" for z in result.zones}
    expected |= {f"field-{s.scan_id}" for s in result.scans if s.reference.level_db is not None}
    assert names == expected
    for p in folder.glob("*.png"):
        data = p.read_bytes()
        assert len(data) > 5000, p.name
        w, h = _size(data)
        if p.stem.startswith(("scan-", "element-", "field-")):
            assert (w, h) == (880, 660)
        elif p.stem.startswith("defect-"):
            assert (w, h) == (990, 396)
        assert w > 300 and h > 200


def test_a_map_with_zones_differs_from_one_without(demo: dict) -> None:
    result = demo["result"]
    scan = next(s for s in result.scans if pictures.zones_of(result, s))
    with_zones = _pixels(pictures.scan_preview(result, scan))
    without = _pixels(pictures.scan_preview(dataclasses.replace(result, mosaic=[]), scan))
    assert with_zones.shape == without.shape
    assert np.mean(np.any(np.abs(with_zones - without) > 0.05, axis=-1)) > 0.001
    # and neither is blank: many distinct colours
    assert len(np.unique(with_zones.reshape(-1, with_zones.shape[-1]), axis=0)) > 50


ZONE_ID = re.compile(r"[A-Za-z0-9_-]+\.(?:watch|suspect|probable)\.\d\d(?:\+\d+)?")


@pytest.mark.parametrize("compact", [False, True], ids=["site", "campaign"])
def test_picture_ids_and_numbers_match_the_zone_table(written: dict, monkeypatch: pytest.MonkeyPatch,
                                                      compact: bool) -> None:
    # one source of truth: every zone id a picture shows (in its texts or its file name) is a row of the
    # quantities CSV, and a defect sheet's areas, peak and confidence read the same as those rows — in
    # the full pictures of a site and the compact ones of a campaign
    from overlay.outputs import write as outputs

    rows = list(csv.DictReader(written["paths"]["quantities-csv"].open()))
    zones = {r["zone_id"]: r for r in rows if r["row_kind"] == "zone"}
    defects = {r["defect_id"]: r for r in rows if r["row_kind"] == "defect"}
    texts: dict[str, list[str]] = {}
    drawn: list[str] = []
    real_png = plotting.png

    def capture(fig):  # the texts of the figure about to be rendered
        drawn.append("\n".join(t.get_text() for t in fig.findobj(matplotlib.text.Text)))
        return real_png(fig)

    monkeypatch.setattr(plotting, "png", capture)
    for name, kind, key in outputs._picture_tasks(written["result"], None):
        outputs._share(written["result"], None)
        outputs._SHARED["compact"] = compact
        outputs._draw((name, kind, key))
        texts[name] = drawn[-1]
    outputs._SHARED.clear()
    seen = set()
    for name, text in texts.items():
        for zid in ZONE_ID.findall(text):
            assert zid in zones, (name, zid)
            seen.add(zid)
        if name.startswith("defect-"):
            did = name[len("defect-"):]
            assert did in defects
            d = defects[did]
            for c in written["result"].site.zones.classes:
                area = float(d[f"contour_{c.name}_m2"])
                if area > 0:
                    assert f"{c.name} {area:.4f}" in text, (name, c.name)
            assert f"outline {float(d['outline_area_m2']):.4f} m²" in text
            top = zones[d["zone_id"]]
            assert f"{top['zone_id']}: peak {float(top['peak_hz']):.0f} Hz, confidence {float(top['confidence']):.2f}" in text
    assert {d["defect_id"] for d in defects.values()} <= seen  # every defect is named in some picture
    assert set(defects) == {n[len("defect-"):] for n in texts if n.startswith("defect-")}


class _Checker(HTMLParser):
    def __init__(self) -> None:
        super().__init__()
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.urls: list[str] = []
        self.text: list[str] = []
        self.imgs = 0

    def handle_starttag(self, tag: str, attrs: list) -> None:
        for k, v in attrs:
            if k in ("src", "href") and v and not v.startswith("data:") and not v.startswith("#"):
                self.urls.append(v)
        if tag == "img":
            self.imgs += 1
        if tag not in VOID:
            self.stack.append(tag)

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"unexpected </{tag}> with open {self.stack[-3:]}")
        else:
            self.stack.pop()

    def handle_data(self, data: str) -> None:
        self.text.append(data)


def test_html_report_is_well_formed_self_contained_and_complete(written: dict) -> None:
    text = written["paths"]["html"].read_text(encoding="utf-8")
    assert text.startswith("<!DOCTYPE html>")
    c = _Checker()
    c.feed(text)
    c.close()
    assert c.errors == [] and c.stack == []
    assert c.urls == []  # self-contained: no external source or link
    assert "http://" not in text and "https://" not in text
    body = " ".join(c.text)
    for caution in CAUTIONS:
        assert caution in body
    for z in written["result"].zones:
        assert z.zone_id in body
    assert c.imgs == len(list(written["paths"]["pictures"].glob("*.png")))


class _Tables(HTMLParser):
    """Every table as a list of rows, each a list of cell texts (the first row holds the headers)."""

    def __init__(self) -> None:
        super().__init__()
        self.tables: list[list[list[str]]] = []
        self.cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list) -> None:
        if tag == "table":
            self.tables.append([])
        elif tag == "tr":
            self.tables[-1].append([])
        elif tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self.cell is not None:
            self.tables[-1][-1].append("".join(self.cell))
            self.cell = None

    def handle_data(self, data: str) -> None:
        if self.cell is not None:
            self.cell.append(data)

    def table(self, first_headers: list[str]) -> list[dict[str, str]]:
        """The one table whose headers start so, as dicts by header."""
        found = [t for t in self.tables if t and t[0][:len(first_headers)] == first_headers]
        assert len(found) == 1, [t[0] for t in self.tables if t]
        head, *body = found[0]
        return [dict(zip(head, r)) for r in body]


def _number(cell: str) -> float:
    return float(cell.split()[0])


def test_html_tables_equal_the_quantities_csv(written: dict) -> None:
    # the primary table (each defect once) and the class contours read the same in both
    rows = list(csv.DictReader(written["paths"]["quantities-csv"].open()))
    t = _Tables()
    t.feed(written["paths"]["html"].read_text(encoding="utf-8"))
    totals = {(r["element"], r["highest class"]): r for r in t.table(["element", "highest class"])}
    csv_totals = [r for r in rows if r["row_kind"] == "element_total"]
    assert len(totals) == len(csv_totals) > 0
    for r in csv_totals:
        h = totals[(r["element"], r["class"])]
        assert int(h["defects"]) == int(r["n_defects"])
        for col, key in (("affected", "affected_area_m2"), ("share", "element_share_pct"), ("footprint", "footprint_area_m2")):
            assert _number(h[col]) == pytest.approx(float(r[key]), abs=6e-4), col
        low, high = h["volume"].split()[0].split("-")
        assert (float(low), float(high)) == pytest.approx((float(r["volume_low_m3"]), float(r["volume_high_m3"])), abs=6e-5)
    zones = {r["zone"]: r for r in t.table(["zone", "element", "class"])}
    csv_zones = [r for r in rows if r["row_kind"] == "zone"]
    assert set(zones) == {r["zone_id"] for r in csv_zones}
    for r in csv_zones:
        h = zones[r["zone_id"]]
        assert _number(h["contour"]) == pytest.approx(float(r["contour_area_m2"]), abs=6e-5)
        assert _number(h["outline"]) == pytest.approx(float(r["outline_area_m2"]), abs=6e-5)
        assert _number(h["confidence"]) == pytest.approx(float(r["confidence"]), abs=6e-3)
    defects = t.table(["defect", "element", "highest class"])
    assert sorted(d["defect"] for d in defects) == sorted(r["defect_id"] for r in rows if r["row_kind"] == "defect")


def _loads_in_chromium(page: Path, tmp_path: Path) -> None:
    """A screenshot of ``page`` in headless Chromium, with no console error (skipped without Chromium)."""
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Chromium not installed")
    shot = tmp_path / "page.png"
    done = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
         "--enable-logging=stderr", "--log-level=0", "--allow-file-access-from-files",
         f"--screenshot={shot}", "--window-size=1200,2000", page.as_uri()],
        capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert shot.exists() and shot.stat().st_size > 10000
    console = [line for line in done.stderr.splitlines() if "CONSOLE" in line]
    assert not [line for line in console if "error" in line.lower() or "Uncaught" in line], console


def test_report_loads_in_headless_chromium(written: dict, tmp_path: Path) -> None:
    _loads_in_chromium(written["paths"]["html"], tmp_path)


def test_no_pictures_writes_none(demo: dict, tmp_path: Path) -> None:
    paths = write_outputs(demo["result"], tmp_path, pictures=False).paths
    assert "html" not in paths and not (tmp_path / f"{demo['result'].site.outputs.basename}-pictures").exists()


def test_pdf_report_where_chromium_is_installed(demo: dict, tmp_path: Path, written: dict) -> None:
    from overlay.outputs.write import find_pdf_printer

    if find_pdf_printer() is None:
        pytest.skip("Chromium not installed")
    assert written["paths"]["pdf"].read_bytes()[:5] == b"%PDF-"  # by default where a printer exists
    paths = write_outputs(demo["result"], tmp_path, pdf=True).paths
    data = paths["pdf"].read_bytes()
    assert data[:5] == b"%PDF-" and len(data) > 50_000


def test_pictures_on_two_processes_equal_those_on_one(demo: dict) -> None:
    # the same PNG bytes whichever process draws them, in the same order; progress once per picture
    from overlay.outputs.write import draw_pictures, picture_names

    seen: list[int] = []
    one = draw_pictures(demo["result"], None, jobs=1)
    two = draw_pictures(demo["result"], None, jobs=2, progress=seen.append)
    assert list(two) == list(one) == picture_names(demo["result"], with_dxf=False)
    assert len(one) >= 8  # enough pictures that two processes are used
    assert all(two[k] == one[k] for k in one)
    assert sum(seen) == len(one)


PY_WORDS = re.compile(r"\b(?:nan|NaN|None|True|False|inf)\b")


def _visible_text(html_text: str) -> str:
    c = _Checker()
    c.feed(html_text)
    return " ".join(c.text)


def test_no_python_values_in_anything_a_person_reads(written: dict) -> None:
    # the text and HTML reports and the quantities CSV: '-' or a word, never a Python value
    paths = written["paths"]
    for key in ("report", "quantities-csv"):
        found = PY_WORDS.findall(paths[key].read_text(encoding="utf-8"))
        assert not found, (key, found[:5])
    assert not PY_WORDS.findall(_visible_text(paths["html"].read_text(encoding="utf-8")))


def test_text_report_defect_rows_read_as_the_csv(written: dict) -> None:
    rows = [r for r in csv.DictReader(written["paths"]["quantities-csv"].open()) if r["row_kind"] == "defect"]
    lines = written["paths"]["report"].read_text(encoding="utf-8").splitlines()
    for r in rows:
        line = next(x for x in lines if x.split()[:1] == [r["defect_id"]])
        assert f"{float(r['affected_area_m2']):.4f} m2" in line and f" {r['class']} " in line
        assert f"{float(r['depth_low_m']):.3f}-{float(r['depth_high_m']):.3f} m" in line  # depths in m, as the CSV


@pytest.fixture(scope="module")
def folder_report(demo: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    # a campaign-sized report without a campaign's run time: the page limit lowered below the demo's scans
    from overlay.outputs import report_html

    out = tmp_path_factory.mktemp("folder")
    limit = report_html.PAGE_LIMIT_SCANS
    report_html.PAGE_LIMIT_SCANS = 2
    try:
        paths = write_outputs(demo["result"], out, pdf=False).paths
    finally:
        report_html.PAGE_LIMIT_SCANS = limit
    return {"paths": paths, "result": demo["result"], "out": out}


def test_large_report_is_a_folder_of_pages_with_linked_pictures(folder_report: dict) -> None:
    paths, result = folder_report["paths"], folder_report["result"]
    index = paths["html"]
    assert index.name == "index.html" and index.parent.name == f"{result.site.outputs.basename}-report"
    assert not (folder_report["out"] / f"{result.site.outputs.basename}-report.html").exists()
    pages = sorted(index.parent.glob("*.html"))
    assert len(pages) == 1 + len({s.element for s in result.scans})
    linked: set[str] = set()
    for page in pages:
        text = page.read_text(encoding="utf-8")
        c = _Checker()
        c.feed(text)
        c.close()
        assert c.errors == [] and c.stack == [], page.name
        assert "data:image" not in text  # pictures are files, not embedded
        for url in c.urls:
            assert (page.parent / url).resolve().is_file(), (page.name, url)  # every link resolves
            linked.add((page.parent / url).resolve().name)
        body = " ".join(c.text)
        for caution in CAUTIONS:
            assert caution in body, page.name
        assert not PY_WORDS.findall(body), page.name
    # every picture of the run is shown on some page, and every element page is linked from the index
    assert {p.name for p in paths["pictures"].glob("*.png")} <= linked
    assert {p.name for p in pages} - {"index.html"} <= linked


def test_folder_report_loads_in_headless_chromium(folder_report: dict, tmp_path: Path) -> None:
    _loads_in_chromium(folder_report["paths"]["html"], tmp_path)


def test_grid_scans_are_drawn_as_images_placed_by_their_affine_lattice(demo: dict) -> None:
    # a regular grid registered by a similarity is an affine image of (column, row): the preview draws
    # it as an image under that map (fast), and the map puts every cell centre on its point; a
    # projective angle scan (S-105) has no such map and stays a triangulation
    result = demo["result"]
    for scan in result.scans:
        ok = scan.valid & np.isfinite(scan.ver_db)
        grid = pictures._grid_image(scan, scan.ver_db, ok)
        if scan.scan_id == "S-105":
            assert grid is None
            continue
        assert grid is not None, scan.scan_id
        image, to_drawing = grid
        rc = scan.grid_rc
        have = rc[:, 0] >= 0
        placed = to_drawing.transform(np.column_stack([rc[have, 1], rc[have, 0]]).astype(float))
        spacing = np.min(np.hypot(*np.diff(scan.point_xy[have][:2], axis=0).T))
        assert np.abs(placed - scan.point_xy[have]).max() <= pictures.GRID_SLACK * spacing
        use = have & ok
        assert np.array_equal(image[rc[use, 0], rc[use, 1]], scan.ver_db[use])
        assert image.mask[rc[have & ~ok, 0], rc[have & ~ok, 1]].all()  # dropouts are holes, not zeros


def test_campaign_pictures_are_compact_and_keyed(folder_report: dict) -> None:
    # a campaign's scan maps: the compact size, on one colour scale whose key each element page shows
    paths, result = folder_report["paths"], folder_report["result"]
    w, h = (round(v * plotting.DPI) for v in pictures.THUMB_SIZE)
    for s in result.scans:
        png = (paths["pictures"] / f"scan-{s.scan_id}.png").read_bytes()
        assert _size(png) == (w, h)
        img = _pixels(png)
        assert len(np.unique(img.reshape(-1, img.shape[-1]), axis=0)) > 50  # not blank
    lo, hi = pictures.ver_scale(result)
    assert (lo, hi) == (0.0, result.site.zones.classes[-1].threshold_db + 5.0)
    for page in paths["html"].parent.glob("element-*.html"):
        assert f"from {lo:g} dB" in page.read_text() and "linear-gradient" in page.read_text()
