"""Quantities CSV for the repair contractor: one row per zone, then one per (element, class).

Classes are nested (a higher class lies inside the lower one), so areas of
different classes must not be added up; each class total stands alone.
"""

from __future__ import annotations

import csv
from collections import defaultdict
from pathlib import Path
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from ..pipeline import RunResult

COLUMNS = ("row_kind", "element", "class", "zone_id", "scan_id", "n_zones", "area_m2", "perimeter_m",
           "peak_hz", "confidence")


def quantity_rows(result: "RunResult") -> list[dict[str, object]]:
    """Zone rows followed by per-(element, class) totals; areas in m²."""
    rows: list[dict[str, object]] = []
    totals: dict[tuple[str, str], list[float]] = defaultdict(lambda: [0, 0.0, 0.0])
    order = {c.name: i for i, c in enumerate(result.site.classes)}
    for z in sorted(result.zones, key=lambda z: (z.element, order[z.class_name], z.zone_id)):
        rows.append({"row_kind": "zone", "element": z.element, "class": z.class_name, "zone_id": z.zone_id,
                     "scan_id": z.scan_id, "n_zones": 1, "area_m2": round(z.area_m2, 4),
                     "perimeter_m": round(z.perimeter_m, 3),
                     "peak_hz": "" if z.peak_hz != z.peak_hz else round(z.peak_hz, 1),
                     "confidence": z.confidence})
        t = totals[(z.element, z.class_name)]
        t[0] += 1
        t[1] += z.area_m2
        t[2] += z.perimeter_m
    for (element, cls), (n, area, perim) in sorted(totals.items(), key=lambda kv: (kv[0][0], order[kv[0][1]])):
        rows.append({"row_kind": "element_total", "element": element, "class": cls, "zone_id": "", "scan_id": "",
                     "n_zones": int(n), "area_m2": round(area, 4), "perimeter_m": round(perim, 3),
                     "peak_hz": "", "confidence": ""})
    return rows


class QuantitiesCsvExporter:
    name = "quantities-csv"
    suffix = "-quantities.csv"
    description = "affected area per zone and per (element, class), m² (CSV)"

    def write(self, result: "RunResult", path: Path) -> None:
        with path.open("w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=COLUMNS)
            w.writeheader()
            w.writerows(quantity_rows(result))
