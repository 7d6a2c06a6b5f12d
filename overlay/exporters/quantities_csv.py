"""Quantities CSV for the repair contractor: the tables of overlay.quantities, one row kind after another.

Primary: one ``defect`` row per defect at the highest class it reaches (each defect once), then
per element and per owner's asset the totals by highest class, then the class contours for
information, then the cautions (a spreadsheet is a report too).  Areas m², lengths and depths m,
volumes m³; a contour-area column per class (``contour_<class>_m2``).  docs/outputs.md describes
every row kind and column.
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import TYPE_CHECKING

from overlay.quantities import COLUMNS, class_columns, quantity_rows

if TYPE_CHECKING:
    from overlay.job import RunResult


class QuantitiesCsvExporter:
    name = "quantities-csv"
    suffix = "-quantities.csv"
    description = "per defect (at its highest class), element and asset: affected area, repair footprint, volume (CSV)"

    def write(self, result: "RunResult", path: Path) -> None:
        cols = list(COLUMNS[:-1]) + list(class_columns(result.site.zones.classes)) + [COLUMNS[-1]]
        with path.open("w", newline="", encoding="utf-8") as fh:
            w = csv.DictWriter(fh, fieldnames=cols, restval="")
            w.writeheader()
            w.writerows(quantity_rows(result))
