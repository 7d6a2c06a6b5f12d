"""The site report: one self-contained HTML file (pictures embedded, no network), cautions first."""

from __future__ import annotations

import base64
import html
from typing import TYPE_CHECKING

from .exporters.quantities_csv import quantity_rows

if TYPE_CHECKING:
    from .pipeline import RunResult

CSS = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;margin:2em auto;max-width:1100px;color:#222;line-height:1.4}
h1{font-size:1.5em;margin-bottom:0}h2{border-bottom:1px solid #bbb;padding-bottom:.2em;margin-top:2em}
.cautions{border:2px solid #D55E00;background:#fff4ec;padding:.6em 1em;border-radius:4px}
.cautions li{margin:.2em 0}table{border-collapse:collapse;margin:.6em 0;font-size:.9em}
td,th{border:1px solid #ccc;padding:.25em .5em;text-align:right}th{background:#f0f0f0}td.l,th.l{text-align:left}
img{max-width:100%;border:1px solid #ddd;margin:.4em 0}pre{background:#f7f7f7;padding:.6em;overflow-x:auto;font-size:.85em}
.meta td{text-align:left;border:none;padding:.1em .8em .1em 0}
"""


def _img(png: bytes, alt: str) -> str:
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{base64.b64encode(png).decode()}">'


def _table(rows: list[dict[str, object]], cols: list[tuple[str, str]]) -> str:
    head = "".join(f'<th class="{"l" if i < 2 else ""}">{html.escape(label)}</th>' for i, (_, label) in enumerate(cols))
    body = []
    for r in rows:
        cells = "".join(f'<td class="{"l" if i < 2 else ""}">{html.escape(str(r.get(k, "")))}</td>' for i, (k, _) in enumerate(cols))
        body.append(f"<tr>{cells}</tr>")
    return f"<table><tr>{head}</tr>{''.join(body)}</table>"


def site_report(result: "RunResult", images: dict[str, bytes]) -> str:
    """The HTML report; ``images`` by name: site-map, dxf-preview, scan-<id>, zone-<zone id>."""
    site = result.site
    esc = html.escape
    rows = quantity_rows(result)
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        f"<title>{esc(site.name)} — suspect zones</title><style>{CSS}</style></head><body>",
        f"<h1>{esc(site.name)} {esc(site.structure)}</h1>",
        f"<p>Suspect zones from acoustic laser-vibrometer scans. Run {esc(result.started)}, overlay {esc(result.tool_version)}.</p>",
        '<div class="cautions"><strong>Cautions</strong><ul>',
        *[f"<li>{esc(c)}</li>" for c in result.cautions],
        "</ul></div>",
        "<h2>Site and run</h2><table class='meta'>",
        *[f"<tr><td>{esc(k)}</td><td>{esc(str(v))}</td></tr>" for k, v in result.settings().items()],
        f"<tr><td>scans</td><td>{len(result.scans)}</td></tr><tr><td>zones</td><td>{len(result.zones)}</td></tr>",
        "</table>",
    ]
    if "site-map" in images:
        parts += ["<h2>Site map</h2>", _img(images["site-map"], "site map with all zones")]
    totals = [r for r in rows if r["row_kind"] == "element_total"]
    parts += [
        "<h2>Quantities per element and class</h2>",
        f"<p>Basis: {esc(site.basis)}; cutting margin {site.margin_m:g} m; {esc(site.footprint)} footprints. "
        "Classes are nested: each class counts every defect reaching it once — never add classes. "
        "Depths are order-of-magnitude estimates.</p>",
        _table(totals, [("element", "element"), ("class", "class"), ("n_defects", "defects"),
                        ("affected_area_m2", "affected m²"), ("element_share_pct", "share %"),
                        ("footprint_area_m2", "footprint m²"), ("volume_low_m3", "volume low m³"),
                        ("volume_high_m3", "volume high m³")]),
    ]
    assets = [r for r in rows if r["row_kind"] == "asset_total"]
    if assets:
        parts += ["<h2>Quantities per asset (cut by the asset outlines)</h2>",
                  _table(assets, [("element", "asset"), ("class", "class"), ("n_defects", "defects"),
                                  ("affected_area_m2", "affected m²"), ("element_share_pct", "share %")])]
    zone_rows = [r for r in rows if r["row_kind"] == "zone"]
    parts += ["<h2>Zones</h2>",
              _table(zone_rows, [("zone_id", "zone"), ("class", "class"), ("element", "element"),
                                 ("contour_area_m2", "contour m²"), ("outline_area_m2", "outline m²"),
                                 ("footprint_length_m", "footprint L m"), ("footprint_width_m", "W m"),
                                 ("depth_low_m", "depth low m"), ("depth_high_m", "depth high m"),
                                 ("peak_hz", "peak Hz"), ("confidence", "confidence")])]
    unit = site.drawing_unit
    for s in result.scans:
        parts += [f"<h2>Scan {esc(s.scan_id)} — {esc(s.element)}</h2>",
                  f"<p>{s.n_points} points, {int(s.valid.sum())} valid; "
                  + (f"gate {esc(s.gate.describe())}; " if s.gate else "")
                  + (f"reference {esc(s.reference.describe())}; " if s.reference else "")
                  + f"incidence correction {esc(s.incidence)}.</p>",
                  f"<pre>{esc(s.fit_describe)}, tolerance {site.tolerance_m * 1000:g} mm, "
                  f"{'passed' if s.fit_passed else 'MISFIT ACCEPTED BY OVERRIDE'}\n"
                  + esc("\n".join(s.fit.report(unit))) + "</pre>"]
        if f"scan-{s.scan_id}" in images:
            parts.append(_img(images[f"scan-{s.scan_id}"], f"VER map of scan {s.scan_id}"))
        if f"field-{s.scan_id}" in images:
            parts.append(_img(images[f"field-{s.scan_id}"], f"sound field of scan {s.scan_id}, the reference of its VER"))
        for z in s.zones:
            if f"zone-{z.zone_id}" in images:
                parts.append(_img(images[f"zone-{z.zone_id}"], f"spectrum of zone {z.zone_id}"))
    if "dxf-preview" in images:
        parts += ["<h2>The DXF as written</h2>", _img(images["dxf-preview"], "rendering of the written DXF")]
    if result.warnings:
        parts += ["<h2>Warnings</h2><ul>", *[f"<li>{esc(w)}</li>" for w in result.warnings], "</ul>"]
    parts.append("</body></html>")
    return "\n".join(parts)
