"""The site report in HTML, cautions first: one self-contained page for a small site, a folder of
pages for a campaign.

Up to ``PAGE_LIMIT_SCANS`` scans the report is one file with every picture embedded (it opens
anywhere, no network).  Beyond that one page would grow by half a megabyte per scan, so the
report becomes a folder: an index (cautions, settings, quantities, the site map and a thumbnail
per element) and one page per element (its picture, defects, zones, scans, fits and pictures),
the pictures referenced as files from ``<basename>-pictures/`` — the compact ones (scan maps on one
colour scale, keyed on each page; defect spectra), which a campaign draws in a tenth of the time.  Every table comes from
overlay.quantities and overlay.outputs.report_text, the rows the CSV and the text report print.
"""

from __future__ import annotations

import base64
import html
from typing import TYPE_CHECKING, Callable, Sequence

from overlay.outputs.report_text import (
    ID_SCHEME,
    calibration_rows,
    calibration_summary,
    dims,
    fit_text,
    fmt,
    interval,
    recorded_calibration,
    settings_lines,
    span,
)
from overlay.quantities import (
    asset_rows,
    class_columns,
    defect_rows,
    element_rows,
    zone_rows,
)

if TYPE_CHECKING:
    from overlay.job import RunResult
    from overlay.scan import ScanResult

PAGE_LIMIT_SCANS = 20  # above this many scans the report is a folder of pages
CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:2em auto;max-width:1100px;color:#222;line-height:1.4}
h1{font-size:1.5em;margin-bottom:0}h2{border-bottom:1px solid #bbb;padding-bottom:.2em;margin-top:2em}
.cautions{border:2px solid #D55E00;background:#fff4ec;padding:.6em 1em;border-radius:4px}
.cautions li{margin:.2em 0}table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
td,th{border:1px solid #ccc;padding:.25em .5em;text-align:right}th{background:#f0f0f0}td.l,th.l{text-align:left}
img{max-width:100%;border:1px solid #ddd;margin:.4em 0}pre{background:#f7f7f7;padding:.6em;overflow-x:auto;font-size:.85em}
.meta td{text-align:left;border:none;padding:.1em .8em .1em 0}.thumbs a{display:inline-block;margin:.3em;text-align:center}
.thumbs img{width:260px}
"""
Picture = Callable[[str, str], str]  # (picture name, alt text) → an <img> tag, or "" when not drawn


def embedded(images: dict[str, bytes]) -> Picture:
    def img(name: str, alt: str) -> str:
        if name not in images:
            return ""
        return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{base64.b64encode(images[name]).decode()}">'
    return img


def linked(names: set[str], folder: str) -> Picture:
    def img(name: str, alt: str) -> str:
        if name not in names:
            return ""
        return f'<img alt="{html.escape(alt)}" src="{html.escape(folder)}/{html.escape(name)}.png" loading="lazy">'
    return img


def _table(rows: Sequence[dict[str, object]], cols: Sequence[tuple[str, str, Callable[[dict], str]]]) -> str:
    head = "".join(f'<th class="{"l" if i < 2 else ""}">{html.escape(label)}</th>' for i, (_, label, _) in enumerate(cols))
    body = ["<tr>" + "".join(f'<td class="{"l" if i < 2 else ""}">{html.escape(show(r))}</td>'
                             for i, (_, _, show) in enumerate(cols)) + "</tr>" for r in rows]
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def _col(key: str, label: str, spec: str = "", unit: str = "") -> tuple[str, str, Callable[[dict], str]]:
    return key, label, lambda r: fmt(r.get(key, ""), spec, unit)


def _head(result: "RunResult", title: str) -> list[str]:
    esc = html.escape
    return ["<!DOCTYPE html>", '<html lang="en"><head><meta charset="utf-8">',
            f"<title>{esc(title)}</title><style>{CSS}</style></head><body>",
            f"<h1>{esc(title)}</h1>",
            f"<p>Screening zones from acoustic laser-vibrometer scans. Run {esc(result.started)}, "
            f"overlay {esc(result.tool_version)}.</p>",
            '<div class="cautions"><strong>Cautions</strong><ul>',
            *[f"<li>{esc(c)}</li>" for c in result.cautions], "</ul></div>"]


def _quantities(result: "RunResult", elements: set[str] | None = None) -> list[str]:
    site = result.site
    keep = (lambda r: True) if elements is None else (lambda r: r["element"] in elements)
    basis = "the estimated defect outline" if site.repair.basis == "outline" else "the lowest class contour"
    parts = ["<h2>Repair quantities: each defect once, at the highest class it reaches</h2>",
             f"<p>Priced on {basis}; cutting margin {site.repair.margin_m:g} m; {html.escape(site.repair.footprint)} footprints. "
             "A defect counts in one class only — its highest — so these rows may be added up. "
             "Depths are order-of-magnitude estimates.</p>",
             _table([r for r in element_rows(result) if keep(r)],
                    [_col("element", "element"), _col("class", "highest class"), _col("n_defects", "defects"),
                     _col("affected_area_m2", "affected", ".4f", "m²"), _col("element_share_pct", "share", ".3f", "%"),
                     _col("footprint_area_m2", "footprint", ".4f", "m²"),
                     ("volume", "volume", lambda r: span(r["volume_low_m3"], r["volume_high_m3"], ".4f", "m³"))])]
    assets = [r for r in asset_rows(result) if keep(r)]
    if assets:
        parts += ["<h3>Per asset of the owner's register (outlines cut by the asset outlines)</h3>",
                  _table(assets, [_col("element", "asset"), _col("class", "highest class"), _col("n_defects", "defects"),
                                  _col("affected_area_m2", "affected", ".4f", "m²"),
                                  _col("element_share_pct", "share", ".3f", "%"),
                                  _col("footprint_area_m2", "footprint", ".4f", "m²"),
                                  ("volume", "volume", lambda r: span(r["volume_low_m3"], r["volume_high_m3"], ".4f", "m³"))])]
    cols = class_columns(site.zones.classes)
    parts += ["<h3>Defects</h3>",
              _table([r for r in defect_rows(result.zones, site.zones.classes, site.repair.basis) if keep(r)],
                     [_col("defect_id", "defect"), _col("element", "element"), _col("class", "highest class"),
                      _col("affected_area_m2", "affected", ".4f", "m²"), _col("outline_basis", "outline from"),
                      *[_col(c, f"{k.name} contour", ".4f", "m²") for c, k in zip(cols, site.zones.classes)],
                      ("footprint", "footprint", lambda r: dims(r["footprint_length_m"], r["footprint_width_m"])),
                      ("depth", "depth", lambda r: span(r["depth_low_m"], r["depth_high_m"], ".3f", "m")),
                      _col("peak_hz", "peak", ".0f", "Hz"), _col("confidence", "confidence", ".2f")])]
    zones = [r for r in zone_rows(result) if keep(r)]
    parts += ["<h3>Class contours (information: a defect has a zone in every class it reaches)</h3>",
              f"<p>{html.escape(ID_SCHEME)}.</p>",
              _table(zones, [_col("zone_id", "zone"), _col("element", "element"), _col("class", "class"),
                             _col("contour_area_m2", "contour", ".4f", "m²"), _col("outline_area_m2", "outline", ".4f", "m²"),
                             ("depth", "depth", lambda r: span(r["depth_low_m"], r["depth_high_m"], ".3f", "m")),
                             _col("peak_hz", "peak", ".0f", "Hz"), _col("confidence", "confidence", ".2f")])]
    return parts


def _agreement(result: "RunResult", img: Picture) -> list[str]:
    """The agreement with sounding of the calibration the class levels come from (when the site names one)."""
    d = recorded_calibration(result)
    if d is None:
        return []
    rows = calibration_rows(d)
    return ["<h2>Agreement with sounding</h2>",
            f"<p>The class levels come from the calibration {html.escape(calibration_summary(result) or '')}. "
            "Sounding is a reference, not the truth: it misses small and deep hollows and traces edges generously. "
            "Intervals are 95 % Wilson score intervals.</p>",
            _table(rows, [_col("class", "class"), _col("level_db", "level", "g", "dB"),
                          ("sensitivity", "sensitivity", lambda r: interval(r["sensitivity"], r["sensitivity_95"])),
                          ("specificity", "specificity", lambda r: interval(r["specificity"], r["specificity_95"])),
                          _col("kappa", "kappa", ".2f"), _col("iou", "area IoU", ".2f"),
                          _col("found", "sounded area found", ".2f")]),
            img("calibration-roc", "ROC curve of VER against the sounding verdicts")]


def _scan(s: "ScanResult", result: "RunResult", img: Picture) -> list[str]:
    esc = html.escape
    site = result.site
    parts = [f"<h2>Scan {esc(s.scan_id)} — {esc(s.element or 'no element')}</h2>",
             f"<p>{s.n_points} points, {int(s.valid.sum())} valid, spacing {s.spacing_m:.3f} m; "
             + (f"gate {esc(s.gate.describe())}; " if s.gate else "")
             + (f"reference {esc(s.reference.describe())}; " if s.reference else "")
             + f"incidence correction {esc(s.incidence)}.</p>",
             f"<pre>{esc(s.fit_summary)}, tolerance {site.registration.tolerance_m * 1000:g} mm, "
             f"{'passed' if s.fit_passed else 'MISFIT ACCEPTED BY OVERRIDE'}\n"
             f"{esc(fit_text(s, site.drawing_unit, result.unit_m))}\n" + esc("\n".join(s.fit.report(site.drawing_unit)))
             + "</pre>",
             img(f"scan-{s.scan_id}", f"VER map of scan {s.scan_id}"),
             img(f"field-{s.scan_id}", f"sound field of scan {s.scan_id}, the reference of its VER")]
    return parts


def _defect_pictures(result: "RunResult", img: Picture, elements: set[str] | None = None) -> list[str]:
    from overlay.outputs.write import file_stem

    rows = [r for r in defect_rows(result.zones, result.site.zones.classes, result.site.repair.basis)
            if elements is None or r["element"] in elements]
    return [img(f"defect-{file_stem(str(r['defect_id']))}", f"spectrum of defect {r['defect_id']}") for r in rows]


def site_report(result: "RunResult", images: dict[str, bytes]) -> str:
    """The single self-contained page (small sites): every picture embedded."""
    img = embedded(images)
    site = result.site
    parts = _head(result, f"{site.name} {site.structure} — screening zones".strip())
    parts += ["<h2>Site and run</h2><table class='meta'>",
              *[f"<tr><td>{html.escape(k)}</td><td>{html.escape(v)}</td></tr>" for k, v in settings_lines(result)],
              "</table>", "<h2>Site map</h2>", img("site-map", "site map with all zones")]
    from overlay.outputs.write import elements_with_zones, file_stem

    for e in elements_with_zones(result):
        parts.append(img(f"element-{file_stem(e)}", f"zones of element {e}"))
    parts += _quantities(result)
    parts += _agreement(result, img)
    for s in result.scans:
        parts += _scan(s, result, img)
    parts += ["<h2>Defect spectra</h2>", *_defect_pictures(result, img)]
    parts += ["<h2>The DXF as written</h2>", img("dxf-preview", "rendering of the written DXF")]
    if result.warnings:
        parts += ["<h2>Warnings</h2><ul>", *[f"<li>{html.escape(w)}</li>" for w in result.warnings], "</ul>"]
    parts.append("</body></html>")
    return "\n".join(p for p in parts if p)


def element_page_name(element: str) -> str:
    from overlay.outputs.write import file_stem

    return f"element-{file_stem(element)}.html"


def page_names(result: "RunResult") -> list[str]:
    """The pages of the folder report: the index and one per scanned element."""
    return ["index.html", *[element_page_name(e) for e in _scanned_elements(result)]]


def _scanned_elements(result: "RunResult") -> list[str]:
    return sorted({s.element or NO_ELEMENT for s in result.scans})


NO_ELEMENT = "no element"


def _ver_key(result: "RunResult") -> str:
    """The colour key of the campaign pictures' one VER scale, as a CSS gradient (no picture to draw)."""
    from matplotlib import colormaps
    from matplotlib.colors import to_hex

    from overlay.outputs.pictures import ver_scale
    from overlay.outputs.plotting import VER_CMAP

    lo, hi = ver_scale(result)
    cmap = colormaps[VER_CMAP]
    stops = ", ".join(f"{to_hex(cmap(k / 10))} {k * 10}%" for k in range(11))
    return (f'<p>Scan pictures: vibration energy ratio from {lo:g} dB <span style="display:inline-block;width:240px;'
            f'height:.9em;vertical-align:middle;background:linear-gradient(to right, {stops})"></span> '
            f"{hi:g} dB and above; class contours in the colours of the drawing.</p>")


def report_pages(result: "RunResult", img: Picture) -> dict[str, str]:
    """The folder report (campaigns): ``index.html`` and one page per scanned element, by file name.
    ``img`` links the pictures (or embeds them, for printing)."""
    from overlay.outputs.write import elements_with_zones, file_stem

    site = result.site
    esc = html.escape
    with_zones = elements_with_zones(result)
    index = _head(result, f"{site.name} {site.structure} — screening zones".strip())
    index += ["<h2>Site and run</h2><table class='meta'>",
              *[f"<tr><td>{esc(k)}</td><td>{esc(v)}</td></tr>" for k, v in settings_lines(result)], "</table>",
              "<h2>Site map</h2>", img("site-map", "site map with all zones"),
              "<h2>Elements with zones</h2><div class='thumbs'>"]
    for e in with_zones:
        index.append(f'<a href="{esc(element_page_name(e))}">{img(f"element-{file_stem(e)}", f"zones of {e}")}'
                     f"<br>{esc(e)}</a>")
    index.append("</div>")
    index += _quantities(result)
    index += _agreement(result, img)
    without = [e for e in _scanned_elements(result) if e not in with_zones]
    if without:
        index += ["<h2>Elements scanned without a zone</h2><p>",
                  ", ".join(f'<a href="{esc(element_page_name(e))}">{esc(e)}</a>' for e in without), "</p>"]
    index += ["<h2>The DXF as written</h2>", img("dxf-preview", "rendering of the written DXF")]
    if result.warnings:
        index += ["<h2>Warnings</h2><ul>", *[f"<li>{esc(w)}</li>" for w in result.warnings], "</ul>"]
    index.append("</body></html>")
    pages = {"index.html": "\n".join(p for p in index if p)}
    for e in _scanned_elements(result):
        page = _head(result, f"{site.name} {site.structure} — element {e}".strip())
        page += ['<p><a href="index.html">back to the site</a></p>', img(f"element-{file_stem(e)}", f"zones of {e}")]
        page += _quantities(result, {e})
        page.append(_ver_key(result))
        for s in result.scans:
            if (s.element or NO_ELEMENT) == e:
                page += _scan(s, result, img)
        page += ["<h2>Defect spectra</h2>", *_defect_pictures(result, img, {e}), "</body></html>"]
        pages[element_page_name(e)] = "\n".join(p for p in page if p)
    return pages
