"""Pictures and the site report: written, right size, not blank; HTML well-formed and self-contained
(parsed with the standard library's html.parser), totals equal to the quantities CSV."""

from __future__ import annotations

import csv
import dataclasses
import io
import shutil
import struct
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import matplotlib.image as mpimg
import numpy as np
import pytest

from overlay import pictures
from overlay.cautions import CAUTIONS
from overlay.outputs import write_outputs

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
    assert names == {"site-map", "dxf-preview"} | {f"scan-{s.scan_id}" for s in result.scans} | {
        f"zone-{z.zone_id}" for s in result.scans for z in s.zones}
    for p in folder.glob("*.png"):
        data = p.read_bytes()
        assert len(data) > 5000, p.name
        w, h = _size(data)
        if p.stem.startswith("scan-"):
            assert (w, h) == (880, 660)
        elif p.stem.startswith("zone-"):
            assert (w, h) == (990, 396)
        assert w > 300 and h > 200


def test_a_map_with_zones_differs_from_one_without(demo: dict) -> None:
    result = demo["result"]
    scan = next(s for s in result.scans if s.zones)
    with_zones = _pixels(pictures.scan_preview(result, scan))
    without = _pixels(pictures.scan_preview(result, dataclasses.replace(scan, zones=[])))
    assert with_zones.shape == without.shape
    assert np.mean(np.any(np.abs(with_zones - without) > 0.05, axis=-1)) > 0.001
    # and neither is blank: many distinct colours
    assert len(np.unique(with_zones.reshape(-1, with_zones.shape[-1]), axis=0)) > 50


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
    """Rows of every table as lists of cell texts."""

    def __init__(self) -> None:
        super().__init__()
        self.rows: list[list[str]] = []
        self.cell: list[str] | None = None

    def handle_starttag(self, tag: str, attrs: list) -> None:
        if tag == "tr":
            self.rows.append([])
        elif tag in ("td", "th"):
            self.cell = []

    def handle_endtag(self, tag: str) -> None:
        if tag in ("td", "th") and self.cell is not None:
            self.rows[-1].append("".join(self.cell))
            self.cell = None

    def handle_data(self, data: str) -> None:
        if self.cell is not None:
            self.cell.append(data)


def test_html_totals_equal_the_quantities_csv(written: dict) -> None:
    csv_rows = [r for r in csv.DictReader(written["paths"]["quantities-csv"].open()) if r["row_kind"] == "element_total"]
    t = _Tables()
    t.feed(written["paths"]["html"].read_text(encoding="utf-8"))
    html_rows = {(r[0], r[1]): r for r in t.rows if len(r) == 8 and r[0] != "element"}
    assert len(html_rows) == len(csv_rows) > 0
    for r in csv_rows:
        h = html_rows[(r["element"], r["class"])]
        assert [h[2], h[3], h[4], h[5], h[6], h[7]] == [r["n_defects"], r["affected_area_m2"], r["element_share_pct"],
                                                        r["footprint_area_m2"], r["volume_low_m3"], r["volume_high_m3"]]


def test_report_loads_in_headless_chromium(written: dict, tmp_path: Path) -> None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    if browser is None:
        pytest.skip("Chromium not installed")
    shot = tmp_path / "report.png"
    done = subprocess.run(
        [browser, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}",
         "--enable-logging=stderr", "--log-level=0",
         f"--screenshot={shot}", "--window-size=1200,2000", written["paths"]["html"].as_uri()],
        capture_output=True, text=True, timeout=120)
    assert done.returncode == 0, done.stderr[-2000:]
    assert shot.exists() and shot.stat().st_size > 10000
    console = [line for line in done.stderr.splitlines() if "CONSOLE" in line]
    assert not [line for line in console if "error" in line.lower() or "Uncaught" in line], console


def test_no_pictures_writes_none(demo: dict, tmp_path: Path) -> None:
    paths = write_outputs(demo["result"], tmp_path, pictures=False).paths
    assert "html" not in paths and not (tmp_path / f"{demo['result'].site.basename}-pictures").exists()


def test_pdf_report_where_chromium_is_installed(demo: dict, tmp_path: Path, written: dict) -> None:
    from overlay.outputs import find_pdf_printer

    if find_pdf_printer() is None:
        pytest.skip("Chromium not installed")
    assert written["paths"]["pdf"].read_bytes()[:5] == b"%PDF-"  # by default where a printer exists
    paths = write_outputs(demo["result"], tmp_path, pdf=True).paths
    data = paths["pdf"].read_bytes()
    assert data[:5] == b"%PDF-" and len(data) > 50_000


def test_pictures_on_two_processes_equal_those_on_one(demo: dict) -> None:
    # the same PNG bytes whichever process draws them, in the same order; progress once per picture
    from overlay.outputs import draw_pictures, picture_names

    seen: list[int] = []
    one = draw_pictures(demo["result"], None, jobs=1)
    two = draw_pictures(demo["result"], None, jobs=2, progress=seen.append)
    assert list(two) == list(one) == picture_names(demo["result"], with_dxf=False)
    assert len(one) >= 8  # enough pictures that two processes are used
    assert all(two[k] == one[k] for k in one)
    assert sum(seen) == len(one)
