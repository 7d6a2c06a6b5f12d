"""Quantities CSV for the repair contractor: one row per zone, then one per (element, class).

Then, when the owner's asset layer is known, one row per (asset, class) with the
affected area cut by the asset outlines (a defect across two panels counts in
both, each with its own part).  Each zone's affected area is its estimated defect outline (``basis = outline``,
the default) or its class contour.  Classes are nested, so a defect appears in
every class it reaches; a class total counts each defect once and answers
"what does it take to repair every defect of at least this class".  Do not add
totals of different classes.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import TYPE_CHECKING

from ..quantities import defect_rows, rounded

if TYPE_CHECKING:
    from ..pipeline import RunResult
    from ..zones import Zone

COLUMNS = (
    "row_kind", "element", "class", "zone_id", "defect_id", "scan_id", "n_defects", "basis",
    "contour_area_m2", "outline_area_m2", "affected_area_m2",
    "footprint_length_m", "footprint_width_m", "footprint_area_m2",
    "depth_low_m", "depth_high_m", "volume_low_m3", "volume_high_m3",
    "element_area_m2", "element_share_pct", "peak_hz", "confidence", "note",
)




def affected_area(z: "Zone", basis: str) -> float:
    return z.outline_area_m2 if basis == "outline" else z.area_m2


def quantity_rows(result: "RunResult") -> list[dict[str, object]]:
    """Zone rows followed by per-(element, class) totals; areas m², lengths m, volumes m³."""
    basis = result.site.basis
    areas = result.element_areas
    order = {c.name: i for i, c in enumerate(result.site.classes)}
    zones = sorted(result.zones, key=lambda z: (z.element, order[z.class_name], z.zone_id))
    rows: list[dict[str, object]] = []
    for z in zones:
        a = affected_area(z, basis)
        el = areas.get(z.element, float("nan"))
        rows.append({
            "row_kind": "zone", "element": z.element, "class": z.class_name, "zone_id": z.zone_id,
            "defect_id": z.defect_id, "scan_id": z.scan_id, "n_defects": 1, "basis": basis,
            "contour_area_m2": rounded(z.area_m2, 4), "outline_area_m2": rounded(z.outline_area_m2, 4), "affected_area_m2": rounded(a, 4),
            "footprint_length_m": rounded(z.footprint_length_m, 3), "footprint_width_m": rounded(z.footprint_width_m, 3),
            "footprint_area_m2": rounded(z.footprint_area_m2, 4), "depth_low_m": rounded(z.depth_low_m, 4),
            "depth_high_m": rounded(z.depth_high_m, 4), "volume_low_m3": rounded(z.volume_low_m3, 5),
            "volume_high_m3": rounded(z.volume_high_m3, 5), "element_area_m2": rounded(el, 3),
            "element_share_pct": rounded(100 * a / el, 3), "peak_hz": rounded(z.peak_hz, 1), "confidence": z.confidence,
        })
    rows.extend(dict.fromkeys(COLUMNS, "") | r for r in defect_rows(result.zones, result.site.classes, basis))
    groups: dict[tuple[str, str], dict[str, "Zone"]] = {}
    for z in zones:
        key = z.defect_id if basis == "outline" else z.zone_id
        groups.setdefault((z.element, z.class_name), {}).setdefault(key, z)
    for (element, cls), members in groups.items():
        ms = list(members.values())
        a = sum(affected_area(z, basis) for z in ms)
        el = areas.get(element, float("nan"))
        rows.append({
            "row_kind": "element_total", "element": element, "class": cls, "zone_id": "", "defect_id": "", "scan_id": "",
            "n_defects": len(ms), "basis": basis, "contour_area_m2": rounded(sum(z.area_m2 for z in ms), 4),
            "outline_area_m2": rounded(sum(z.outline_area_m2 for z in ms), 4), "affected_area_m2": rounded(a, 4),
            "footprint_length_m": "", "footprint_width_m": "",
            "footprint_area_m2": rounded(sum(z.footprint_area_m2 for z in ms), 4),
            "depth_low_m": "", "depth_high_m": "",
            "volume_low_m3": rounded(sum(z.volume_low_m3 for z in ms), 5), "volume_high_m3": rounded(sum(z.volume_high_m3 for z in ms), 5),
            "element_area_m2": rounded(el, 3), "element_share_pct": rounded(100 * a / el, 3), "peak_hz": "", "confidence": "",
        })
    rows.extend(asset_rows(result))
    # the cautions travel with the quantities: a spreadsheet is a report too
    rows.extend({"row_kind": "caution", "note": c} for c in result.cautions)
    return rows


def asset_rows(result: "RunResult") -> list[dict[str, object]]:
    """Per (asset, class): the affected area cut by the owner's asset outlines, each defect once."""
    basis = result.site.basis
    groups: dict[tuple[str, str], dict[str, float]] = {}
    for p in result.asset_pieces:
        key = p["defect_id"] if basis == "outline" else p["zone_id"]
        groups.setdefault((p["asset_id"], p["class"]), {})[key] = p["area_m2"]
    order = {c.name: i for i, c in enumerate(result.site.classes)}
    out: list[dict[str, object]] = []
    for (asset, cls), parts in sorted(groups.items(), key=lambda kv: (kv[0][0], order[kv[0][1]])):
        a = sum(parts.values())
        el = result.element_areas.get(asset, float("nan"))
        row: dict[str, object] = {c: "" for c in COLUMNS}
        row.update({"row_kind": "asset_total", "element": asset, "class": cls, "n_defects": len(parts), "basis": basis,
                    "affected_area_m2": rounded(a, 4), "element_area_m2": rounded(el, 3), "element_share_pct": rounded(100 * a / el, 3)})
        out.append(row)
    return out


class QuantitiesCsvExporter:
    name = "quantities-csv"
    suffix = "-quantities.csv"
    description = "affected area, repair footprint and removal volume per zone and per (element, class) (CSV)"

    def write(self, result: "RunResult", path: Path) -> None:
        with path.open("w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=COLUMNS, restval="")
            w.writeheader()
            w.writerows(quantity_rows(result))
